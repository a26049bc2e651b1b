package rules

import (
	"fmt"
	"math"
	"strings"
	"time"
)

// BrainInjuryPolicy defines the brain-injury context in which cerebral salt
// wasting is the main alternative to SIADH, and what the SIADH pattern card
// reads to tell them apart: the weight and sodium moving together or
// apart, the fractional excretion of urate, and the thyroid and adrenal
// results the SIADH criteria require.
type BrainInjuryPolicy struct {
	// Conditions are the active diagnoses that make a brain-injury
	// context; a neurosurgical procedure within the neurosurgery window
	// does too.
	Conditions []ConditionCodes `json:"conditions"`
	// ConditionWithinDays: a listed condition counts when its onset (or
	// recorded date) is this recent; one without a date counts, said so.
	ConditionWithinDays float64 `json:"conditionWithinDays"`
	// NoRestriction lists conditions after which fluid restriction is
	// advised against whatever the labs show (subarachnoid haemorrhage).
	NoRestriction []ConditionCodes `json:"noRestriction"`
	// WeightWindowHours is how far back the weight and the sodium are
	// compared; WeightChangeAtLeastKg the change that counts; the sodium
	// compared with the first weight is one within WeightSodiumPairHours.
	WeightWindowHours     float64 `json:"weightWindowHours"`
	WeightSodiumPairHours float64 `json:"weightSodiumPairHours"`
	WeightChangeAtLeastKg float64 `json:"weightChangeAtLeastKg"`
	WeightSource          string  `json:"weightSource"`
	// UrinePairHours bounds the time between the urine and serum results of
	// one fractional excretion.
	UrinePairHours        float64 `json:"urinePairHours"`
	FEUrateNormalAbove    float64 `json:"feUrateNormalAbove"`
	FEUrateNormalBelow    float64 `json:"feUrateNormalBelow"`
	FEUrateSource         string  `json:"feUrateSource"`
	EndocrineMaxAgeDays   float64 `json:"endocrineMaxAgeDays"`
	EndocrineSource       string  `json:"endocrineSource"`
	SaltWastingSource     string  `json:"saltWastingSource"`
	RestrictionCautionSrc string  `json:"restrictionCautionSource"`
	NoRestrictionSource   string  `json:"noRestrictionSource"`
}

func (p BrainInjuryPolicy) validate() error {
	if len(p.Conditions) == 0 || p.WeightWindowHours <= 0 || p.WeightChangeAtLeastKg <= 0 || p.UrinePairHours <= 0 ||
		p.ConditionWithinDays <= 0 || p.WeightSodiumPairHours <= 0 ||
		p.FEUrateNormalAbove <= 0 || p.FEUrateNormalBelow <= p.FEUrateNormalAbove || p.EndocrineMaxAgeDays <= 0 {
		return fmt.Errorf("brainInjury needs conditions, a weight window and change, a urine pairing interval, the normal " +
			"fractional urate excretion range (above < below) and an age for thyroid and adrenal results")
	}
	if p.WeightSource == "" || p.FEUrateSource == "" || p.EndocrineSource == "" || p.SaltWastingSource == "" || p.RestrictionCautionSrc == "" ||
		p.NoRestrictionSource == "" || len(p.NoRestriction) == 0 {
		return fmt.Errorf("brainInjury needs every source")
	}
	for i, c := range append(append([]ConditionCodes(nil), p.Conditions...), p.NoRestriction...) {
		if !c.complete() {
			return fmt.Errorf("brainInjury condition list entry %d needs a name (factor), a system, codes and a source", i)
		}
	}
	return nil
}

// brainInjuryContext names what puts the patient in a brain-injury
// context: a listed procedure within the neurosurgery window, and active
// listed conditions; empty when nothing does.
func (r *Ruleset) brainInjuryContext(f Facts) []string {
	var out []string
	if ctx, ok := r.recentNeurosurgery(f); ok {
		out = append(out, fmt.Sprintf("%s on %s (%s)", ctx.What, ctx.Procedure.At.In(r.displayZone()).Format("2006-01-02"), ctx.Procedure.Reference))
	}
	for _, c := range r.recentConditions(f, r.policy.BrainInjury.Conditions) {
		out = append(out, c)
	}
	return out
}

// recentConditions names the active conditions of f in lists whose onset
// (or recorded date) is within the policy's days, or undated.
func (r *Ruleset) recentConditions(f Facts, lists []ConditionCodes) []string {
	bi := r.policy.BrainInjury
	var out []string
	seen := map[string]bool{}
	for _, c := range f.Conditions {
		if seen[c.Reference] || (c.Onset != nil && f.At.Sub(*c.Onset).Hours() > bi.ConditionWithinDays*24) {
			continue
		}
		for _, list := range lists {
			if !codesMatch(list, c.Codings) {
				continue
			}
			seen[c.Reference] = true
			when := "no onset or recorded date"
			if c.Onset != nil {
				when = "since " + c.Onset.In(r.displayZone()).Format("2006-01-02")
			}
			out = append(out, fmt.Sprintf("%s (%s, %s)", list.Factor, c.Reference, when))
			break
		}
	}
	return out
}

// volumeLean collects the signs in the data that bear on volume status:
// towards depletion (salt wasting) or towards water retention (SIADH).
type volumeLean struct {
	depletion, retention []string
}

func (v volumeLean) text() string {
	switch {
	case len(v.depletion) > 0 && len(v.retention) > 0:
		return "both ways"
	case len(v.depletion) > 0:
		return "towards salt wasting (volume depletion)"
	case len(v.retention) > 0:
		return "towards SIADH (water retention)"
	}
	return "neither way"
}

func (v volumeLean) saltWasting() bool { return len(v.depletion) > 0 && len(v.retention) == 0 }

// weightAndSodium compares the earliest and latest weights in the window
// with the sodium at the same times: both falling leans towards salt
// wasting, weight rising while sodium falls towards water retention.
func (r *Ruleset) weightAndSodium(b *strings.Builder, c chart, fig map[string]float64, lean *volumeLean) {
	bi := r.policy.BrainInjury
	from := c.f.At.Add(-time.Duration(bi.WeightWindowHours * float64(time.Hour)))
	var first, last *Measurement
	ws := c.f.Labs[BodyWeight]
	for i := range ws {
		if ws[i].At.Before(from) || ws[i].At.After(c.f.At) {
			continue
		}
		if first == nil {
			first = &ws[i]
		}
		last = &ws[i]
	}
	if first == nil || first == last {
		fmt.Fprintf(b, "- Weight against sodium: fewer than two weights in the last %s h\n", hoursSince.of(bi.WeightWindowHours))
		return
	}
	naThen := nearest(c.f.Labs[Sodium], *first, bi.WeightSodiumPairHours, c.f)
	if naThen == nil {
		fmt.Fprintf(b, "- Weight against sodium: no sodium within %g h of the weight of %s\n", bi.WeightSodiumPairHours, stamp(first.At))
		return
	}
	dW, dNa := last.Value-first.Value, c.latest.Value-naThen.Value
	fig["weightChangeKg"], fig["sodiumChangeWithWeight"] = Round(dW, 1), Round(dNa, 1)
	line := fmt.Sprintf("- Weight %s → %s kg (%s → %s) while sodium went %s (%s) → %s mmol/L (%s)", show(BodyWeight, first.Value),
		show(BodyWeight, last.Value), stamp(first.At), stamp(last.At), show(Sodium, naThen.Value), stamp(naThen.At), show(Sodium, c.latest.Value),
		stamp(c.latest.At))
	switch {
	case dNa >= 0:
		line += ": the sodium did not fall over these weights, so they do not bear on the difference"
	case dW <= -bi.WeightChangeAtLeastKg:
		lean.depletion = append(lean.depletion, "weight and sodium falling together")
		line += fmt.Sprintf(": both falling, which leans towards salt and water loss (salt wasting) (%s)", bi.WeightSource)
	case dW >= bi.WeightChangeAtLeastKg:
		lean.retention = append(lean.retention, "weight rising as sodium falls")
		line += fmt.Sprintf(": weight rising as sodium falls, which leans towards water retention (SIADH) (%s)", bi.WeightSource)
	default:
		line += fmt.Sprintf(": the weight changed less than %g kg while the sodium fell", bi.WeightChangeAtLeastKg)
	}
	b.WriteString(line + "\n")
}

// feUrate writes the fractional excretion of urate from the latest urine
// uric acid and creatinine of one sample with the serum values near it.
// Without a urine uric acid it says so only when asked to (sayMissing).
func (r *Ruleset) feUrate(b *strings.Builder, c chart, fig map[string]float64, sayMissing bool) {
	bi := r.policy.BrainInjury
	uu, ok := latestWithin(c.f.Labs[UrineUrate], c.f.At, r.policy.ChartReview.LabPairHours)
	if !ok {
		if sayMissing {
			fmt.Fprintf(b, "- Fractional excretion of urate: no urine uric acid in the last %g h\n", r.policy.ChartReview.LabPairHours)
		}
		return
	}
	// One spot sample: the urine creatinine within an hour of the urate.
	uc := nearest(c.f.Labs[UrineCreatinine], uu, 1, c.f)
	su := nearest(c.f.Labs[Urate], uu, bi.UrinePairHours, c.f)
	sc := nearest(c.f.Labs[Creatinine], uu, bi.UrinePairHours, c.f)
	if uc == nil || su == nil || sc == nil {
		var miss []string
		for _, m := range []struct {
			p    *Measurement
			name string
		}{{uc, "urine creatinine from the same sample"}, {su, "serum uric acid"}, {sc, "serum creatinine"}} {
			if m.p == nil {
				miss = append(miss, m.name)
			}
		}
		fmt.Fprintf(b, "- Fractional excretion of urate not computed: no %s within %g h of the urine uric acid (%s)\n",
			strings.Join(miss, " or "), bi.UrinePairHours, stamp(uu.At))
		return
	}
	fe := FractionalExcretion(uu.Value, su.Value, uc.Value*1000, sc.Value)
	if math.IsNaN(fe) || math.IsInf(fe, 0) {
		return
	}
	fig["feUrate"] = Round(fe, 1)
	line := fmt.Sprintf("- Fractional excretion of urate %s%% = (urine %s × serum creatinine %s) / (serum %s × urine creatinine %s mmol/L) × 100, "+
		"urine of %s", percent.of(fe), show(UrineUrate, uu.Value), show(Creatinine, sc.Value), show(Urate, su.Value),
		show(UrineCreatinine, uc.Value), stamp(uu.At))
	switch {
	case fe > bi.FEUrateNormalBelow:
		line += fmt.Sprintf(": above the normal %g–%g%%, as in both SIADH and salt wasting; a repeat once the sodium is corrected "+
			"tells them apart — it returns to normal in SIADH and stays high in salt wasting (%s)", bi.FEUrateNormalAbove, bi.FEUrateNormalBelow, bi.FEUrateSource)
	case fe < bi.FEUrateNormalAbove:
		line += fmt.Sprintf(": below the normal %g–%g%%, which fits neither SIADH nor salt wasting, where it is raised (%s)", bi.FEUrateNormalAbove,
			bi.FEUrateNormalBelow, bi.FEUrateSource)
	default:
		line += fmt.Sprintf(": within the normal %g–%g%% (%s)", bi.FEUrateNormalAbove, bi.FEUrateNormalBelow, bi.FEUrateSource)
	}
	b.WriteString(line + "\n")
}

// FractionalExcretion is the fraction of a filtered solute that is
// excreted, in per cent: (U_x × P_cr) / (P_x × U_cr) × 100, with each pair
// in one unit (common practice: the clearance ratio to creatinine).
func FractionalExcretion(urineX, plasmaX, urineCreatinine, plasmaCreatinine float64) float64 {
	if plasmaX <= 0 || urineCreatinine <= 0 {
		return math.NaN()
	}
	return urineX * plasmaCreatinine / (plasmaX * urineCreatinine) * 100
}

// endocrineLines says whether thyroid and adrenal results exist and what
// they were: the SIADH label needs both normal.
func (r *Ruleset) endocrineLines(b *strings.Builder, c chart, fig map[string]float64) {
	bi := r.policy.BrainInjury
	hours := bi.EndocrineMaxAgeDays * 24
	var parts []string
	for _, e := range []struct {
		a    Analyte
		name string
		fig  string
	}{{TSH, "TSH", "tsh"}, {Cortisol, "cortisol", "cortisol"}} {
		m, ok := latestWithin(c.f.Labs[e.a], c.f.At, hours)
		if !ok {
			parts = append(parts, fmt.Sprintf("%s: no result in the last %g days", e.name, bi.EndocrineMaxAgeDays))
			continue
		}
		fig[e.fig] = Round(m.Value, analytePrecision(e.a).decimals)
		parts = append(parts, fmt.Sprintf("%s %s %s (%s, %s)", e.name, show(e.a, m.Value), unitText(e.a), stamp(m.At), m.Source))
	}
	fmt.Fprintf(b, "- Thyroid and adrenal function: %s. Both must be normal before the label SIADH applies (%s); halite does not "+
		"judge whether they are: a cortisol depends on its timing and on any glucocorticoid given, and in pituitary disease a TSH "+
		"alone misses central hypothyroidism (a free T4 is needed)\n", strings.Join(parts, "; "), bi.EndocrineSource)
}

// unitText is how an analyte's canonical unit is written for people.
func unitText(a Analyte) string {
	switch a {
	case TSH:
		return "mIU/L"
	case UrineSpecificGravity:
		return ""
	}
	return CanonicalUnit(a)
}

// noRestrictionAfter names a recent condition after which fluid
// restriction is advised against, or "".
func (r *Ruleset) noRestrictionAfter(f Facts) string {
	if cs := r.recentConditions(f, r.policy.BrainInjury.NoRestriction); len(cs) > 0 {
		return cs[0]
	}
	return ""
}

// brainInjuryLines writes, for a brain-injury context, the signs that bear
// on salt wasting against SIADH and which way they lean, and returns the
// lean.
func (r *Ruleset) brainInjuryLines(b *strings.Builder, c chart, fig map[string]float64, context []string, haematocritRising bool) volumeLean {
	bi := r.policy.BrainInjury
	var lean volumeLean
	if haematocritRising {
		lean.depletion = append(lean.depletion, "a rising haematocrit")
	}
	urea := nearest(c.f.Labs[Urea], *c.latest, r.policy.ChartReview.LabPairHours, c.f)
	creat := nearest(c.f.Labs[Creatinine], *c.latest, r.policy.ChartReview.LabPairHours, c.f)
	if urea != nil && creat != nil && creat.Value > 0 {
		ratio := BUNCreatinineRatio(urea.Value, creat.Value)
		fig["bunCreatinineRatio"] = Round(ratio, 1)
		above := r.policy.ChartReview.Restriction.HypovolaemiaBUNCreatinineAbove
		if ratio > above {
			lean.depletion = append(lean.depletion, "a urea nitrogen to creatinine ratio above "+fmt.Sprint(above))
			fmt.Fprintf(b, "- Blood urea nitrogen to creatinine ratio %s, above %g: leans hypovolaemic\n", ratioOrBSA.of(ratio), above)
		} else {
			fmt.Fprintf(b, "- Blood urea nitrogen to creatinine ratio %s (not above %g)\n", ratioOrBSA.of(ratio), above)
		}
	}
	r.weightAndSodium(b, c, fig, &lean)
	u := ReadUrineLosses(r.policy.UrineLosses, c.f)
	if u.RateMlPerHour != nil {
		perDay := *u.RateMlPerHour * 24
		fig["urineOutputMlPerHour"] = Round(*u.RateMlPerHour, 0)
		line := fmt.Sprintf("- Urine output %s mL/h over the last %s h, about %s mL/day", orderRate.of(*u.RateMlPerHour), hoursSpan.of(u.Hours), mlPerDay.of(perDay))
		cr := r.policy.ChartReview
		natriuresis := c.urineNa != nil && c.urineNa.Value > cr.SIADH.UrineSodiumAbove && c.urineOs != nil &&
			c.urineOs.Value >= cr.DiluteUrine.UrineOsmolalityBelow
		if child, known := r.isChild(c.f); known && !child && natriuresis && perDay > cr.ConcentratingDefect.PolyuriaAdultMlPerDay {
			lean.depletion = append(lean.depletion, "a large urine output with a high urine sodium")
			line += ", with the high urine sodium: a natriuresis that depletes volume if intake is lower (halite does not read the fluid balance)"
		}
		b.WriteString(line + "\n")
	} else {
		b.WriteString("- Urine output: not charted in the last hours\n")
	}
	if lean.saltWasting() {
		fig["leansSaltWasting"] = 1
	}
	fmt.Fprintf(b, "- Brain-injury context: %s. Here cerebral salt wasting is the main alternative to SIADH; which way the data "+
		"lean: %s", strings.Join(context, "; "), lean.text())
	if signs := append(append([]string(nil), lean.depletion...), lean.retention...); len(signs) > 0 {
		fmt.Fprintf(b, " (%s)", strings.Join(signs, ", "))
	}
	fmt.Fprintf(b, ". The two are managed differently: salt wasting by replacing salt and water, where fluid restriction can harm; "+
		"the treating team decides (%s)\n", bi.SaltWastingSource)
	if ctx, ok := r.recentNeurosurgery(c.f); ok && c.latest.Value < r.policy.Neurosurgery.SodiumBelow {
		b.WriteString(r.phaseLine(c.f, ctx, phaseRetention))
	}
	return lean
}
