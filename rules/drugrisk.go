package rules

import (
	"fmt"
	"math"
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
	activeRisk  map[string]string // ingredient → how it is on the chart (active)
	draftRisk   map[string]string // ingredient → draft reference
	thiazide    string            // a thiazide active or drafted, by name
	activeNames map[string]bool   // every active ingredient, for renewals
}

// drugRiskFindings judges each selected draft order against the knowledge
// base and this patient, one finding per risk ingredient (the most urgent of
// its effects), naming the other risk drugs of the chart and the session.
func (r *Ruleset) drugRiskFindings(f Facts) []Finding {
	p := r.policy.DrugRisk
	c := drugContext{at: f.At, activeRisk: map[string]string{}, draftRisk: map[string]string{}, activeNames: map[string]bool{}}
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
	type drafted struct {
		o  MedicationOrder
		ms []DrugMatch
	}
	var drafts []drafted
	for _, o := range f.DraftOrders {
		ms := r.MatchDrug(o.Medication)
		for _, m := range ms {
			if _, ok := m.Ingredient.Effect(EffectHyponatremia); ok && !m.Ingredient.IntendedToRaiseSodium {
				c.draftRisk[m.Ingredient.Name] = o.Reference
				if m.Ingredient.Class == "thiazide" && c.thiazide == "" {
					c.thiazide = m.Ingredient.Name
				}
			}
		}
		if o.Selected {
			drafts = append(drafts, drafted{o, ms})
		}
	}
	var out []Finding
	for _, d := range drafts {
		for _, m := range d.ms {
			if fd, ok := r.judgeDrug(c, d.o, m); ok {
				out = append(out, fd)
			}
		}
	}
	return out
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

func (r *Ruleset) judgeDrug(c drugContext, o MedicationOrder, m DrugMatch) (Finding, bool) {
	p := r.policy.DrugRisk
	d := m.Ingredient
	renewal := c.activeNames[d.Name]
	multipliers := c.multipliers(p, d)
	others := c.otherRiskDrugs(d.Name, o.Reference)
	var vs []drugVerdict
	if d.IntendedToRaiseSodium {
		if c.latest != nil && c.latest.Value > p.HypernatremiaAbove {
			e := d.Effects[0]
			vs = append(vs, drugVerdict{RuleRaiserHypernatremia, Warning, e,
				fmt.Sprintf("%s raises sodium, which is already %g mmol/L", capitalise(d.Name), c.latest.Value)})
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
	attrs := map[string]any{"ingredient": d.Name, "effect": best.effect.Effect, "evidence": best.effect.Evidence, "matchedBy": m.By}
	if m.Code != "" { // a class-level match has no ingredient code
		attrs["ingredientRxcui"] = m.Code
	}
	if len(multipliers) > 0 {
		attrs["riskMultipliers"] = multipliers
	}
	if len(others) > 0 {
		attrs["otherRiskDrugs"] = others
	}
	advice := []Advice{r.drugRecheck(best.rule, best.indicator), {Kind: AdviseWithdraw, Label: "Remove this draft order"}}
	return Finding{Rule: best.rule, Indicator: best.indicator, Summary: shorten(best.summary, 139),
		Detail: r.drugDetail(c, o, m, vs, renewal, multipliers, others), Figures: fig, Attributes: attrs,
		Order: o.Reference, Advice: advice}, true
}

// drugRecheck is the sodium check a drug card suggests: now and after the
// first weeks for a new start, else within the policy interval.
func (r *Ruleset) drugRecheck(rule string, ind Indicator) Advice {
	p := r.policy.DrugRisk
	if rule == RuleDrugNewStart || rule == RuleLithiumNoSodium {
		return Advice{Kind: AdviseRecheck, RecheckHours: 0, FollowUpHours: p.NewStartFollowUpHours,
			Label: fmt.Sprintf("Check serum sodium now and in %g days", p.NewStartFollowUpHours/24)}
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
				fmt.Sprintf("%s (%s) can lower sodium (%s evidence); sodium is %g mmol/L", capitalise(d.Name), start, e.Evidence, na)}, true
		}
	}
	if e.Evidence != EvidenceStrong || len(multipliers) == 0 || renewal {
		return drugVerdict{}, false
	}
	na := "no sodium on record"
	switch {
	case c.latest != nil:
		na = fmt.Sprintf("sodium %g mmol/L", c.latest.Value)
	case c.last != nil:
		na = fmt.Sprintf("last sodium %.0f days old", c.lastAgeHours()/24)
	}
	return drugVerdict{RuleDrugNewStart, Info, e,
		fmt.Sprintf("%s can lower sodium, most in the first weeks; %s; %s", capitalise(d.Name), strings.Join(multipliers, ", "), na)}, true
}

func (c drugContext) ndiVerdict(p DrugRiskPolicy, d DrugIngredient, e DrugEffect) (drugVerdict, bool) {
	switch {
	case c.latest != nil && c.latest.Value > p.HypernatremiaAbove:
		urine := ""
		if c.urineOsm != nil {
			urine = fmt.Sprintf(", urine osmolality %g mOsm/kg", c.urineOsm.Value)
		}
		return drugVerdict{RuleDrugNDI, ndiIndicator(e), e,
			fmt.Sprintf("%s can cause nephrogenic DI; sodium is %g mmol/L%s", capitalise(d.Name), c.latest.Value, urine)}, true
	case c.serumOsm != nil && c.urineOsm != nil && c.serumOsm.Value > p.SerumOsmolalityAbove && c.urineOsm.Value < p.UrineOsmolalityBelow:
		return drugVerdict{RuleDrugNDI, ndiIndicator(e), e,
			fmt.Sprintf("%s can cause nephrogenic DI; sodium %g, serum osmolality %g, urine osmolality %g mOsm/kg", capitalise(d.Name),
				c.latest.Value, c.serumOsm.Value, c.urineOsm.Value)}, true
	case c.latest == nil && d.Class == "lithium":
		return drugVerdict{RuleLithiumNoSodium, Info, e,
			fmt.Sprintf("Lithium order: no serum sodium from the last %g days", p.SodiumMaxAgeHours/24)}, true
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
		out = append(out, fmt.Sprintf("sodium fell %.1f mmol/L in %d days", c.fall, p.FallWindowHours/24))
	}
	return out
}

// otherRiskDrugs names the other hyponatremia-risk drugs active on the
// chart or drafted in the same session, sorted.
func (c drugContext) otherRiskDrugs(name, order string) []string {
	var out []string
	for n := range c.activeRisk {
		if n != name {
			out = append(out, n+" (active)")
		}
	}
	for n, ref := range c.draftRisk {
		if n != name && ref != order && c.activeRisk[n] == "" {
			out = append(out, n+" (draft)")
		}
	}
	sort.Strings(out)
	return out
}

func (r *Ruleset) drugDetail(c drugContext, o MedicationOrder, m DrugMatch, vs []drugVerdict, renewal bool, multipliers, others []string) string {
	p := r.policy.DrugRisk
	d := m.Ingredient
	var b strings.Builder
	line := func(format string, args ...any) { fmt.Fprintf(&b, "- "+format+"\n", args...) }
	b.WriteString("**Drug**\n\n")
	start := "a new start"
	if renewal {
		start = "a renewal (the ingredient is already active)"
	}
	line("Order %s: %s, recognised by %s; %s", o.Reference, d.Name, m.By, start)
	for _, v := range vs {
		e := v.effect
		mech := ""
		if e.Mechanism != "" {
			mech = " (" + e.Mechanism + ")"
		}
		line("Effect: %s%s; evidence %s (%s): %s. %s", e.Effect, mech, e.Evidence, r.EvidenceMeaning(e.Evidence), e.Citation, e.Note)
	}
	b.WriteString("\n**Patient**\n\n")
	switch {
	case c.latest != nil:
		line("Latest sodium: %g mmol/L (%s, %.0f h ago, %s)", c.latest.Value, stamp(c.latest.At), c.at.Sub(c.latest.At).Hours(), c.latest.Source)
	case c.last != nil:
		line("No sodium from the last %g days; the last, %g mmol/L, is %.0f days old (%s)", p.SodiumMaxAgeHours/24, c.last.Value,
			c.lastAgeHours()/24, stamp(c.last.At))
	default:
		line("No serum sodium on record")
	}
	if c.serumOsm != nil {
		line("Serum osmolality: %g mOsm/kg (%s)", c.serumOsm.Value, stamp(c.serumOsm.At))
	}
	if c.urineOsm != nil {
		line("Urine osmolality: %g mOsm/kg (%s)", c.urineOsm.Value, stamp(c.urineOsm.At))
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
		fmt.Fprintf(&b, "sodium at baseline and after the first %g days of a new start, when it is most likely to fall, and "+
			"symptoms of hyponatremia. ", p.NewStartFollowUpHours/24)
	}
	b.WriteString("Thresholds: " + p.Source)
	return b.String()
}
