package rules

import (
	"fmt"
	"strings"
)

// Rule ids of the fluid-restriction check (draft NutritionOrders at
// order-select and order-sign).
const (
	// RuleRestrictionCaution: a restriction drafted where the data argue
	// against one (salt wasting, a subarachnoid haemorrhage, a vaptan, a
	// sodium already at the limit or high, a child's volume below
	// insensible losses).
	RuleRestrictionCaution = "fluid-restriction-caution"
	// RuleRestrictionReview: the restriction against the urine-to-plasma
	// electrolyte ratio band.
	RuleRestrictionReview = "fluid-restriction-review"
)

// FluidRestrictionPolicy says which draft NutritionOrders are fluid
// restrictions: a diet type or a fluid nutrient from these lists (a site
// adds its own codes by policy override).
type FluidRestrictionPolicy struct {
	DietTypes      []ConditionCodes `json:"dietTypes"`
	FluidNutrients []ConditionCodes `json:"fluidNutrients"`
	// VolumeSource says how the nutrient amount is read.
	VolumeSource string `json:"volumeSource"`
}

func (p FluidRestrictionPolicy) validate() error {
	if len(p.DietTypes)+len(p.FluidNutrients) == 0 || p.VolumeSource == "" {
		return fmt.Errorf("fluidRestriction needs diet types or fluid nutrients and a volumeSource")
	}
	for i, c := range append(append([]ConditionCodes(nil), p.DietTypes...), p.FluidNutrients...) {
		if !c.complete() {
			return fmt.Errorf("fluidRestriction code list entry %d needs a name (factor), a system, codes and a source", i)
		}
	}
	return nil
}

// fluidRestriction reports whether n is a fluid restriction and its daily
// volume in mL when a fluid nutrient states one.
func (r *Ruleset) fluidRestriction(n NutritionOrder) (*float64, bool) {
	p := r.policy.FluidRestriction
	is := false
	for _, list := range p.DietTypes {
		is = is || codesMatch(list, n.Types)
	}
	for _, nu := range n.Nutrients {
		fluid := false
		for _, list := range p.FluidNutrients {
			fluid = fluid || codesMatch(list, nu.Codings)
		}
		if !fluid {
			continue
		}
		is = true
		if nu.Amount != nil {
			if ml, ok := VolumeMl(*nu.Amount); ok {
				return &ml, true
			}
		}
	}
	return nil, is
}

// restrictionFindings checks each selected draft fluid restriction: one
// finding per order, a caution when the data argue against restricting,
// else the review against the ratio band.
func (r *Ruleset) restrictionFindings(f Facts) []Finding {
	var out []Finding
	for _, n := range f.DraftNutrition {
		ml, ok := r.fluidRestriction(n)
		if !n.Selected || !ok {
			continue
		}
		if fd, ok := r.judgeRestriction(f, n, ml); ok {
			fd.Indicator = r.cardRule(fd.Rule).Indicator
			fd.Order, fd.Product = n.Reference, "diet:fluid-restriction"
			out = append(out, fd)
		}
	}
	return out
}

func (r *Ruleset) judgeRestriction(f Facts, n NutritionOrder, ml *float64) (Finding, bool) {
	p := r.policy
	cp := p.ChartReview
	what := n.TypeText
	if what == "" {
		what = "fluid restriction"
	}
	vol := "no daily volume stated"
	if ml != nil {
		vol = mlPerDay.of(*ml) + " mL/day"
	} else if n.Instruction != "" {
		vol = "no daily volume coded; the instruction reads \"" + shorten(n.Instruction, 60) + "\""
	}
	var b strings.Builder
	b.WriteString("**Figures**\n\n")
	fmt.Fprintf(&b, "- Draft: %s (%s), %s (%s)\n", what, n.Reference, vol, p.FluidRestriction.VolumeSource)
	// A sodium as recent as the chart review reads (the SIADH pattern the
	// restriction answers).
	l, ok := latestWithin(f.Labs[Sodium], f.At, cp.SodiumMaxAgeHours)
	if !ok {
		fmt.Fprintf(&b, "- No sodium in the last %s h: the restriction cannot be checked against it\n", hoursSince.of(cp.SodiumMaxAgeHours))
		return Finding{Rule: RuleRestrictionReview, Detail: b.String(), Figures: map[string]float64{},
			Summary: "Fluid restriction drafted without a sodium in the last " + hoursSince.of(cp.SodiumMaxAgeHours) + " h"}, true
	}
	c := r.newChart(f, l)
	fig := map[string]float64{"sodiumLatest": l.Value}
	if ml != nil {
		fig["restrictionMlPerDay"] = *ml
	}
	r.commonLines(&b, c)
	// Each caution in full, and in a few words for the summary.
	var cautions, short []string
	caution := func(long, brief string) { cautions, short = append(cautions, long), append(short, brief) }
	// The reasons the SIADH card withholds a volume.
	if why, brief := r.restrictionWithheld(c); why != "" {
		caution(why, brief)
	}
	if after := r.noRestrictionAfter(f); after != "" {
		caution("after "+after+" fluid restriction is advised against ("+p.BrainInjury.NoRestrictionSource+")",
			"advised against after subarachnoid haemorrhage")
	}
	if l.Value > p.Projection.HypernatremiaAbove {
		caution(fmt.Sprintf("sodium %s mmol/L is above %g: restricting water raises it further", show(Sodium, l.Value),
			p.Projection.HypernatremiaAbove), fmt.Sprintf("sodium %s is above %g", show(Sodium, l.Value), p.Projection.HypernatremiaAbove))
	}
	if _, di := r.concentratingDefect(c); di {
		caution("the data show a diabetes insipidus pattern (dilute urine with a high or rising sodium): restricting water raises "+
			"sodium quickly", "a diabetes insipidus pattern")
	}
	hypo := l.Value < cp.HyponatremiaBelow
	if t := c.context; hypo && t.EffectiveOsmolality != nil && t.Class != Hypotonic {
		caution(fmt.Sprintf("the hyponatremia is not hypotonic (effective osmolality %s mOsm/kg): restricting water does not treat it",
			osmolal.of(*t.EffectiveOsmolality)), "the hyponatremia is not hypotonic")
	}
	if hypo && c.urineNa != nil && c.urineNa.Value <= cp.SIADH.UrineSodiumAbove {
		caution(fmt.Sprintf("urine sodium %s mmol/L (%s), %g or less, points to a low effective blood volume, where restriction "+
			"does not help (%s)", show(UrineSodium, c.urineNa.Value), stamp(c.urineNa.At), cp.SIADH.UrineSodiumAbove, cp.SIADH.Source),
			"a low urine sodium")
	}
	if hypo && c.urineOs != nil && c.urineOs.Value < cp.DiluteUrine.UrineOsmolalityBelow {
		caution(fmt.Sprintf("urine osmolality %s mOsm/kg is already maximally dilute: once intake falls, sodium can rise fast (%s)",
			show(UrineOsmolality, c.urineOs.Value), cp.DiluteUrine.Source), "maximally dilute urine")
	}
	var vol2 strings.Builder
	haematocritRising := r.volumeStatusLines(&vol2, c, fig)
	if context := r.brainInjuryContext(f); hypo && len(context) > 0 {
		if lean := r.brainInjuryLines(&vol2, c, fig, context, haematocritRising); lean.saltWasting() {
			caution("in a brain-injury context the data lean towards salt wasting, where restricting fluid can deepen "+
				"the volume depletion ("+p.BrainInjury.RestrictionCautionSrc+")", "the data lean towards salt wasting after brain injury")
		}
	} else if haematocritRising {
		caution("the haematocrit is rising, a sign of volume depletion, where restricting fluid can deepen it ("+
			p.BrainInjury.RestrictionCautionSrc+")", "the haematocrit is rising")
	}
	if child, known := r.isChild(f); known && child {
		if line, below := r.childRestriction(f, ml, fig); line != "" {
			b.WriteString(line)
			if below {
				caution("the volume is below this child's insensible losses", "below this child's insensible losses")
			}
		}
	}
	r.restrictionBandLine(&b, c, ml, fig, len(cautions) == 0)
	b.WriteString(vol2.String())
	if len(cautions) > 0 {
		fmt.Fprintf(&b, "\n**Why the data argue against restricting**: %s.", strings.Join(cautions, "; "))
		b.WriteString(" Whether to restrict, and by how much, is the treating team's decision under local protocol.")
		summary := fmt.Sprintf("Fluid restriction drafted (%s), but %s", vol, strings.Join(short, "; "))
		return Finding{Rule: RuleRestrictionCaution, Summary: shorten(summary, 139), Detail: b.String(), Figures: fig}, true
	}
	if l.Value >= cp.HyponatremiaBelow {
		return Finding{}, false // nothing to weigh the restriction against
	}
	b.WriteString("\nA fluid restriction raises sodium only when the urine removes more electrolyte-free water than is taken in; " +
		"the ratio band is a guide, and the sodium response over 24-48 h decides (the treating team judges).")
	summary := fmt.Sprintf("Fluid restriction drafted (%s) with sodium %s", vol, show(Sodium, l.Value))
	if band, ok := fig["bandMlPerDay"]; ok && ml != nil && *ml > band {
		summary += fmt.Sprintf(": above the about %s mL/day the urine-to-plasma ratio implies", mlPerDay.of(band))
	}
	return Finding{Rule: RuleRestrictionReview, Summary: shorten(summary, 139), Detail: b.String(), Figures: fig}, true
}

// restrictionBandLine writes the urine-to-plasma ratio and, when compare is
// set (no caution argues against restricting at all), its band and how the
// ordered volume compares; or which urine result is missing.
func (r *Ruleset) restrictionBandLine(b *strings.Builder, c chart, ml *float64, fig map[string]float64, compare bool) {
	cp := r.policy.ChartReview
	if c.urineNa == nil || c.urineK == nil {
		fmt.Fprintf(b, "- Urine-to-plasma electrolyte ratio not computed: %s within %g h of the sodium\n", missingUrineElectrolytes(c), cp.LabPairHours)
		return
	}
	ratio := (c.urineNa.Value + c.urineK.Value) / c.latest.Value
	fig["urinePlasmaElectrolyteRatio"] = Round(ratio, 2)
	if !compare {
		fmt.Fprintf(b, "- Urine-to-plasma electrolyte ratio (%s + %s)/%s = %s; no restriction volume is compared with it while the data "+
			"argue against restricting\n", show(UrineSodium, c.urineNa.Value), show(UrinePotassium, c.urineK.Value), show(Sodium, c.latest.Value),
			ratioOrBSA.of(ratio))
		return
	}
	band := r.restrictionBand(ratio)
	fig["bandMlPerDay"] = band.MlPerDayUpTo
	line := fmt.Sprintf("- Urine-to-plasma electrolyte ratio (%s + %s)/%s = %s: %s (%s)", show(UrineSodium, c.urineNa.Value),
		show(UrinePotassium, c.urineK.Value), show(Sodium, c.latest.Value), ratioOrBSA.of(ratio), band.Text, cp.Restriction.Scheme)
	if ml != nil && *ml > band.MlPerDayUpTo {
		line += fmt.Sprintf("; the ordered %s mL/day is above the about %s mL/day of this band", mlPerDay.of(*ml), mlPerDay.of(band.MlPerDayUpTo))
	}
	b.WriteString(line + "\n")
}

func missingUrineElectrolytes(c chart) string {
	switch {
	case c.urineNa == nil && c.urineK == nil:
		return "no urine sodium or potassium"
	case c.urineNa == nil:
		return "no urine sodium"
	}
	return "no urine potassium"
}

// childRestriction compares a child's restriction with its insensible
// losses per body-surface area; below reports a volume under them.
func (r *Ruleset) childRestriction(f Facts, ml *float64, fig map[string]float64) (line string, below bool) {
	p := r.policy
	rs := p.ChartReview.Restriction
	w, okW := latestWithin(f.Labs[BodyWeight], f.At, p.Projection.WeightMaxAgeHours)
	h, okH := latestWithin(f.Labs[BodyHeight], f.At, p.ChartReview.HeightMaxAgeHours)
	if !okW || !okH {
		return fmt.Sprintf("- Child: the volume cannot be set against insensible losses (about %g mL/m²/day) without a recent %s\n",
			rs.PaediatricInsensibleMlPerM2, missingSize(okW, okH)), false
	}
	bsa, err := MostellerBSA(h.Value, w.Value)
	if err != nil {
		return "- Child: body-surface area not computed: " + err.Error() + "\n", false
	}
	insensible := rs.PaediatricInsensibleMlPerM2 * bsa
	fig["bsaM2"], fig["insensibleMlPerDay"] = Round(bsa, 2), Round(insensible, 0)
	line = fmt.Sprintf("- Child: body-surface area %s m² (Mosteller; %s cm, %s kg); insensible losses about %g mL/m²/day, %s mL/day; a child's "+
		"restriction is insensible losses plus the urine output, never below them (%s)", ratioOrBSA.of(bsa), show(BodyHeight, h.Value),
		show(BodyWeight, w.Value), rs.PaediatricInsensibleMlPerM2, mlPerDay.of(insensible), rs.PaediatricSource)
	if u := ReadUrineLosses(p.UrineLosses, f); u.RateMlPerHour != nil {
		fig["urineOutputMlPerHour"] = Round(*u.RateMlPerHour, 0)
		line += fmt.Sprintf("; urine output %s mL/h (about %s mL/day) over the last %s h", orderRate.of(*u.RateMlPerHour),
			mlPerDay.of(*u.RateMlPerHour*24), hoursSpan.of(u.Hours))
	}
	if ml != nil && *ml < insensible {
		line += fmt.Sprintf(": the ordered %s mL/day is below the insensible losses", mlPerDay.of(*ml))
		below = true
	}
	return line + "\n", below
}
