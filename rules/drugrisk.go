package rules

import (
	"fmt"
	"math"
	"slices"
	"sort"
	"strings"
	"time"
)

// Rule ids of the drug-risk check.
const (
	RuleDrugHyponatremia    = "drug-hyponatremia-risk"
	RuleDrugNewStart        = "drug-hyponatremia-new-start"
	RuleDrugNDI             = "drug-nephrogenic-di-risk"
	RuleLithiumNoSodium     = "lithium-no-recent-sodium"
	RuleRaiserHypernatremia = "sodium-raising-drug-hypernatremia"
)

// drugContext is what every drug card of one call shares.
type drugContext struct {
	at          time.Time
	latest      *Measurement // within the policy age
	last        *Measurement // the last sodium of any age
	age         int
	ageKnown    bool
	fall        float64 // fall from the peak in the policy window
	serumOsm    *Measurement
	urineOsm    *Measurement
	activeRisk  map[string]string   // ingredient → how it is on the chart (active)
	draftRisk   map[string][]string // ingredient → the draft orders of it
	thiazide    string              // a thiazide active or drafted, by name
	activeNames map[string]bool     // every active ingredient, for renewals
}

// drugRiskFindings judges the selected draft orders against the knowledge
// base and this patient: one finding per knowledge-base entry per call (the
// most urgent of its effects), covering every selected draft of it (an oral
// and an intravenous furosemide give one card naming both), and naming the
// other risk drugs of the chart and the session. The judgement depends on
// the ingredient and the patient only, so it is the same for every order a
// finding covers.
func (r *Ruleset) drugRiskFindings(f Facts) []Finding {
	p := r.policy.DrugRisk
	c := drugContext{at: f.At, activeRisk: map[string]string{}, draftRisk: map[string][]string{}, activeNames: map[string]bool{}}
	if l, ok := latestWithin(f.Labs[Sodium], f.At, p.SodiumMaxAgeHours); ok {
		c.latest = &l
	}
	if l, ok := latestWithin(f.Labs[Sodium], f.At, math.Inf(1)); ok {
		c.last = &l
	}
	c.age, c.ageKnown = f.Patient.AgeYears(f.At)
	if w := window(f.Labs[Sodium], f.At, p.FallWindowHours); w != nil {
		c.fall = w.FallFromPeak
	}
	if c.latest != nil {
		c.serumOsm = nearest(f.Labs[SerumOsmolality], *c.latest, p.LabPairHours, f)
	}
	if c.serumOsm != nil {
		c.urineOsm = nearest(f.Labs[UrineOsmolality], *c.serumOsm, p.LabPairHours, f)
	}
	for _, o := range f.Medications {
		if o.Status != "active" {
			continue
		}
		for _, m := range r.MatchDrug(o.Medication) {
			c.activeNames[m.Ingredient.Name] = true
			if _, ok := m.Ingredient.Effect(EffectHyponatremia); ok && !m.Ingredient.IntendedToRaiseSodium {
				c.activeRisk[m.Ingredient.Name] = o.Reference
				if m.Ingredient.Class == "thiazide" {
					c.thiazide = m.Ingredient.Name
				}
			}
		}
	}
	var names []string // the selected entries, in the order first drafted
	selected := map[string][]drafted{}
	for _, o := range f.DraftOrders {
		for _, m := range r.MatchDrug(o.Medication) {
			name := m.Ingredient.Name
			if _, ok := m.Ingredient.Effect(EffectHyponatremia); ok && !m.Ingredient.IntendedToRaiseSodium {
				c.draftRisk[name] = append(c.draftRisk[name], o.Reference)
				if m.Ingredient.Class == "thiazide" && c.thiazide == "" {
					c.thiazide = name
				}
			}
			// A water-balance drug (a vaptan, desmopressin) is judged by the
			// infusion check alone: one order, one card.
			_, _, waterDrug := r.policy.WaterDrugs.match(o.Medication)
			if o.Selected && !waterDrug && !slices.ContainsFunc(selected[name], func(d drafted) bool { return d.o.Reference == o.Reference }) {
				if selected[name] == nil {
					names = append(names, name)
				}
				selected[name] = append(selected[name], drafted{o, m})
			}
		}
	}
	var out []Finding
	for _, name := range names {
		if fd, ok := r.judgeDrug(c, selected[name]); ok {
			out = append(out, fd)
		}
	}
	return out
}

// drafted is one selected draft order of a knowledge-base entry and how it
// was recognised.
type drafted struct {
	o MedicationOrder
	m DrugMatch
}

// nearest is the measurement of s closest in time to ref, within hours and
// not after the evaluation time.
func nearest(s []Measurement, ref Measurement, hours float64, f Facts) *Measurement {
	var best *Measurement
	for i, m := range s {
		if m.At.After(f.At) || absDuration(m.At.Sub(ref.At)).Hours() > hours {
			continue
		}
		if best == nil || absDuration(m.At.Sub(ref.At)) < absDuration(best.At.Sub(ref.At)) {
			best = &s[i]
		}
	}
	return best
}

// drugVerdict is one effect's judgement before the most urgent is chosen.
type drugVerdict struct {
	rule      string
	indicator Indicator
	effect    DrugEffect
	summary   string
}

// judgeDrug judges the drafts of one knowledge-base entry. A finding about
// one draft order carries it as Order and suggests removing it; a finding
// about several carries no Order and suggests no removal (which of the
// drafts to keep is the prescriber's choice; the detail names each), only
// the sodium check, which serves them all.
func (r *Ruleset) judgeDrug(c drugContext, ds []drafted) (Finding, bool) {
	p := r.policy.DrugRisk
	d := ds[0].m.Ingredient
	renewal := c.activeNames[d.Name]
	multipliers := c.multipliers(p, d)
	refs := make([]string, len(ds))
	var by []string
	code := ""
	for i, x := range ds {
		refs[i] = x.o.Reference
		if !slices.Contains(by, x.m.By) {
			by = append(by, x.m.By)
		}
		if code == "" {
			code = x.m.Code
		}
	}
	others := c.otherRiskDrugs(d.Name, refs)
	var vs []drugVerdict
	if d.IntendedToRaiseSodium {
		if c.latest != nil && c.latest.Value > p.HypernatremiaAbove {
			e := d.Effects[0]
			vs = append(vs, drugVerdict{RuleRaiserHypernatremia, Warning, e,
				fmt.Sprintf("%s raises sodium, which is already %s mmol/L", capitalise(d.Name), show(Sodium, c.latest.Value))})
		}
	} else if e, ok := d.Effect(EffectHyponatremia); ok {
		if v, ok := c.hyponatremiaVerdict(p, d, e, renewal, multipliers); ok {
			vs = append(vs, v)
		}
	}
	if e, ok := d.Effect(EffectNephrogenicDI); ok && !d.IntendedToRaiseSodium {
		if v, ok := c.ndiVerdict(p, d, e); ok {
			vs = append(vs, v)
		}
	}
	if len(vs) == 0 {
		return Finding{}, false
	}
	best := vs[0]
	for _, v := range vs[1:] {
		if v.indicator > best.indicator {
			best = v
		}
	}
	fig := map[string]float64{}
	if c.last != nil {
		fig["sodiumLatest"] = c.last.Value
		fig["sodiumAgeHours"] = Round(c.lastAgeHours(), 1)
	}
	attrs := map[string]any{"ingredient": d.Name, "effect": best.effect.Effect, "evidence": best.effect.Evidence,
		"matchedBy": strings.Join(by, "; ")}
	if code != "" { // a class-level match has no ingredient code
		attrs["ingredientRxcui"] = code
	}
	if len(multipliers) > 0 {
		attrs["riskMultipliers"] = multipliers
	}
	if len(others) > 0 {
		attrs["otherRiskDrugs"] = others
	}
	fd := Finding{Rule: best.rule, Indicator: best.indicator, Summary: shorten(best.summary, 139),
		Detail: r.drugDetail(c, ds, vs, renewal, multipliers, others), Figures: fig, Attributes: attrs, Product: "drug:" + strings.ToLower(d.Name),
		Advice: []Advice{r.drugRecheck(best.rule)}}
	if len(ds) == 1 {
		fd.Order, fd.Draft = refs[0], DraftKey(ds[0].o)
		fd.Advice = append(fd.Advice, Advice{Kind: AdviseWithdraw, Label: "Remove this draft order"})
	}
	return fd, true
}

// drugRecheck is the sodium check a drug card suggests: now and after the
// first weeks for a new start, else within the policy interval.
func (r *Ruleset) drugRecheck(rule string) Advice {
	p := r.policy.DrugRisk
	if rule == RuleDrugNewStart || rule == RuleLithiumNoSodium {
		return Advice{Kind: AdviseRecheck, RecheckHours: 0, FollowUpHours: p.NewStartFollowUpHours,
			Label: fmt.Sprintf("Check serum sodium now and in %s days", orderHours.of(p.NewStartFollowUpHours/24))}
	}
	return recheckAdvice(p.LowSodiumRecheckHours)
}

// lastAgeHours is how old the last sodium is, in hours.
func (c drugContext) lastAgeHours() float64 {
	if c.last == nil {
		return math.Inf(1)
	}
	return c.at.Sub(c.last.At).Hours()
}

// drugThresholds states the thresholds that apply to a card for d, and
// only those.
func (r *Ruleset) drugThresholds(d DrugIngredient) string {
	p := r.policy.DrugRisk
	var parts []string
	if _, ok := d.Effect(EffectHyponatremia); ok && !d.IntendedToRaiseSodium {
		var below []string
		for _, b := range p.Bands {
			below = append(below, fmt.Sprintf("%g", b.Below))
		}
		parts = append(parts, fmt.Sprintf("sodium below %s mmol/L; risk multipliers age %d or more, another hyponatremia-risk drug, "+
			"a thiazide, or a fall of %g mmol/L in %s days (%s)", strings.Join(below, ", "), p.ElderlyFromAge, p.FallAtLeast,
			orderHours.of(float64(p.FallWindowHours)/24), p.HyponatremiaCitation))
	}
	if _, ok := d.Effect(EffectNephrogenicDI); ok && !d.IntendedToRaiseSodium {
		parts = append(parts, fmt.Sprintf("sodium above %g mmol/L, or serum osmolality above %g with urine osmolality below %g mOsm/kg "+
			"within %g h of each other (%s)", p.HypernatremiaAbove, p.SerumOsmolalityAbove, p.UrineOsmolalityBelow, p.LabPairHours,
			p.NephrogenicDICitation))
	}
	if d.IntendedToRaiseSodium {
		parts = append(parts, fmt.Sprintf("sodium above %g mmol/L", p.HypernatremiaAbove))
	}
	if len(parts) == 0 {
		return ""
	}
	return "Thresholds: " + strings.Join(parts, "; ") + "."
}

// sodiumBand is the indicator the drug-risk bands give a drug that can
// lower sodium at sodium na (strong: its evidence is strong); ok is false
// above every band.
func (r *Ruleset) sodiumBand(na float64, strong bool) (Indicator, bool) {
	for _, b := range r.policy.DrugRisk.Bands {
		if na >= b.Below {
			continue
		}
		if !strong && b.WeakerEvidence != 0 {
			return b.WeakerEvidence, true
		}
		return b.Indicator, true
	}
	return 0, false
}

func (c drugContext) hyponatremiaVerdict(p DrugRiskPolicy, d DrugIngredient, e DrugEffect, renewal bool, multipliers []string) (drugVerdict, bool) {
	start := "new start"
	if renewal {
		start = "renewal"
	}
	if c.latest != nil {
		na := c.latest.Value
		for _, b := range p.Bands {
			if na >= b.Below {
				continue
			}
			ind := b.Indicator
			if e.Evidence != EvidenceStrong && b.WeakerEvidence != 0 {
				ind = b.WeakerEvidence
			}
			if renewal && na >= p.RenewalStepDownFrom {
				ind--
			}
			if ind < Info {
				return drugVerdict{}, false
			}
			return drugVerdict{RuleDrugHyponatremia, ind, e,
				fmt.Sprintf("%s (%s) can lower sodium (%s evidence); sodium is %s mmol/L", capitalise(d.Name), start, e.Evidence,
					show(Sodium, na))}, true
		}
	}
	if e.Evidence != EvidenceStrong || len(multipliers) == 0 || renewal {
		return drugVerdict{}, false
	}
	na := "no sodium on record"
	switch {
	case c.latest != nil:
		na = fmt.Sprintf("sodium %s mmol/L", show(Sodium, c.latest.Value))
	case c.last != nil:
		na = fmt.Sprintf("last sodium %s days old", daysSince.of(c.lastAgeHours()/24))
	}
	return drugVerdict{RuleDrugNewStart, Info, e,
		fmt.Sprintf("%s can lower sodium, most in the first weeks; %s; %s", capitalise(d.Name), strings.Join(multipliers, ", "), na)}, true
}

func (c drugContext) ndiVerdict(p DrugRiskPolicy, d DrugIngredient, e DrugEffect) (drugVerdict, bool) {
	switch {
	case c.latest != nil && c.latest.Value > p.HypernatremiaAbove:
		urine := ""
		if c.urineOsm != nil {
			urine = fmt.Sprintf(", urine osmolality %s mOsm/kg", show(UrineOsmolality, c.urineOsm.Value))
		}
		return drugVerdict{RuleDrugNDI, ndiIndicator(e), e,
			fmt.Sprintf("%s can cause nephrogenic DI; sodium is %s mmol/L%s", capitalise(d.Name), show(Sodium, c.latest.Value), urine)}, true
	case c.serumOsm != nil && c.urineOsm != nil && c.serumOsm.Value > p.SerumOsmolalityAbove && c.urineOsm.Value < p.UrineOsmolalityBelow:
		return drugVerdict{RuleDrugNDI, ndiIndicator(e), e,
			fmt.Sprintf("%s can cause nephrogenic DI; sodium %s, serum osmolality %s, urine osmolality %s mOsm/kg", capitalise(d.Name),
				show(Sodium, c.latest.Value), show(SerumOsmolality, c.serumOsm.Value), show(UrineOsmolality, c.urineOsm.Value))}, true
	case c.latest == nil && d.Class == "lithium":
		return drugVerdict{RuleLithiumNoSodium, Info, e,
			fmt.Sprintf("Lithium order: no serum sodium from the last %s days", orderHours.of(p.SodiumMaxAgeHours/24))}, true
	}
	return drugVerdict{}, false
}

// ndiIndicator: a warning for strong or moderate evidence, information for
// a drug known from case reports only.
func ndiIndicator(e DrugEffect) Indicator {
	if e.Evidence == EvidenceLimited {
		return Info
	}
	return Warning
}

// multipliers are the patient's hyponatremia risk multipliers for a new
// start of d.
func (c drugContext) multipliers(p DrugRiskPolicy, d DrugIngredient) []string {
	var out []string
	if c.ageKnown && c.age >= p.ElderlyFromAge {
		out = append(out, fmt.Sprintf("age %d", c.age))
	}
	for name := range c.activeRisk {
		if name != d.Name && name != c.thiazide {
			out = append(out, "another hyponatremia-risk drug")
			break
		}
	}
	if c.thiazide != "" && c.thiazide != d.Name {
		out = append(out, "a thiazide ("+c.thiazide+")")
	}
	if c.fall >= p.FallAtLeast {
		out = append(out, fmt.Sprintf("sodium fell %s mmol/L in %d days", naChange.of(c.fall), p.FallWindowHours/24))
	}
	return out
}

// otherRiskDrugs names the other hyponatremia-risk drugs active on the
// chart or drafted in the same session, sorted. An ingredient drafted only
// in the orders the finding covers (the other half of a combination
// product) has its own finding and is not named.
func (c drugContext) otherRiskDrugs(name string, orders []string) []string {
	var out []string
	for n := range c.activeRisk {
		if n != name {
			out = append(out, n+" (active)")
		}
	}
	for n, refs := range c.draftRisk {
		elsewhere := slices.ContainsFunc(refs, func(ref string) bool { return !slices.Contains(orders, ref) })
		if n != name && elsewhere && c.activeRisk[n] == "" {
			out = append(out, n+" (draft)")
		}
	}
	sort.Strings(out)
	return out
}

func (r *Ruleset) drugDetail(c drugContext, ds []drafted, vs []drugVerdict, renewal bool, multipliers, others []string) string {
	p := r.policy.DrugRisk
	d := ds[0].m.Ingredient
	var b strings.Builder
	line := func(format string, args ...any) { fmt.Fprintf(&b, "- "+format+"\n", args...) }
	b.WriteString("**Drug**\n\n")
	start := "a new start"
	if renewal {
		start = "a renewal (the ingredient is already active)"
	}
	for _, x := range ds {
		line("Order %s (%s): %s, recognised by %s; %s", x.o.Reference, orderText(x.o), d.Name, x.m.By, start)
	}
	for _, v := range vs {
		e := v.effect
		mech := ""
		if e.Mechanism != "" {
			mech = " (" + e.Mechanism + ")"
		}
		// A citation that is only a curation mark is no citation for a
		// clinician: the line then cites nothing rather than an empty slot.
		cite := ""
		if c := clinicianText(e.Citation); strings.TrimSpace(c) != "" {
			cite = ": " + c
		}
		line("Effect: %s%s; evidence %s (%s)%s. %s", effectWords(e.Effect), mech, e.Evidence, r.EvidenceMeaning(e.Evidence), cite, e.Note)
	}
	b.WriteString("\n**Patient**\n\n")
	switch {
	case c.latest != nil:
		line("Latest sodium: %s mmol/L (%s%s, %s h ago, %s)", show(Sodium, c.latest.Value), measuredBy(*c.latest), stamp(c.latest.At),
			hoursSince.of(c.at.Sub(c.latest.At).Hours()), c.latest.Source)
		b.WriteString(sameTimeLine(*c.latest))
	case c.last != nil:
		line("No sodium from the last %s days; the last, %s mmol/L, is %s days old (%s)", orderHours.of(p.SodiumMaxAgeHours/24),
			show(Sodium, c.last.Value), daysSince.of(c.lastAgeHours()/24), stamp(c.last.At))
	default:
		line("No serum sodium on record")
	}
	if c.serumOsm != nil {
		line("Serum osmolality: %s mOsm/kg (%s)", show(SerumOsmolality, c.serumOsm.Value), stamp(c.serumOsm.At))
	}
	if c.urineOsm != nil {
		line("Urine osmolality: %s mOsm/kg (%s)", show(UrineOsmolality, c.urineOsm.Value), stamp(c.urineOsm.At))
	}
	if !c.ageKnown {
		line("Age: not recorded (no birth date); the age multiplier was not checked")
	}
	if len(multipliers) > 0 {
		line("Risk multipliers: %s", strings.Join(multipliers, "; "))
	}
	if len(others) > 0 {
		line("Other hyponatremia-risk drugs: %s", strings.Join(others, ", "))
	}
	b.WriteString("\n**Monitoring**: ")
	if _, ok := d.Effect(EffectNephrogenicDI); ok && !d.IntendedToRaiseSodium {
		b.WriteString("sodium, serum and urine osmolality, and urine output (polyuria, thirst). ")
	}
	if _, ok := d.Effect(EffectHyponatremia); ok && !d.IntendedToRaiseSodium {
		fmt.Fprintf(&b, "sodium at baseline and after the first %s days of a new start, when it is most likely to fall, and "+
			"symptoms of hyponatremia. ", orderHours.of(p.NewStartFollowUpHours/24))
	}
	b.WriteString(r.drugThresholds(d))
	return b.String()
}
