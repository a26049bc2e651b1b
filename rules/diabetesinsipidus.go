package rules

import (
	"fmt"
	"math"
	"strings"
	"time"
)

// diluteUrineForDI reports whether the urine near the sodium is dilute for
// the diabetes insipidus pattern: an osmolality below the policy's, or,
// without one, a specific gravity below the policy's; with the data line.
func (r *Ruleset) diluteUrineForDI(c chart, fig map[string]float64) (string, bool) {
	cd := r.policy.ChartReview.ConcentratingDefect
	if c.urineOs != nil {
		fig["urineOsmolality"] = c.urineOs.Value
		return fmt.Sprintf("- Urine osmolality %s mOsm/kg (%s): below %g, dilute urine for this sodium (%s)\n",
			show(UrineOsmolality, c.urineOs.Value), stamp(c.urineOs.At), cd.UrineOsmolalityBelow, cd.Source), c.urineOs.Value < cd.UrineOsmolalityBelow
	}
	sg := nearest(c.f.Labs[UrineSpecificGravity], *c.latest, r.policy.ChartReview.LabPairHours, c.f)
	if sg == nil {
		return "", false
	}
	fig["urineSpecificGravity"] = sg.Value
	return fmt.Sprintf("- Urine specific gravity %s (%s%s; no urine osmolality within %g h): below %g, dilute urine for this sodium (%s)\n",
		show(UrineSpecificGravity, sg.Value), measuredBy(*sg), stamp(sg.At), r.policy.ChartReview.LabPairHours, cd.SpecificGravityBelow,
		cd.PostoperativeSource), sg.Value < cd.SpecificGravityBelow
}

// polyuria is what the charted urine output says, by the definition that
// fits the patient: an adult's volume per day, a child's per m², or the
// hourly output sustained after neurosurgery.
type polyuria struct {
	line string
	is   bool
}

// readPolyuria judges the recent charted urine output.
func (r *Ruleset) readPolyuria(c chart, fig map[string]float64, neuro bool) polyuria {
	cd := r.policy.ChartReview.ConcentratingDefect
	u := ReadUrineLosses(r.policy.UrineLosses, c.f)
	if u.RateMlPerHour == nil {
		return polyuria{line: "- Urine output: not charted in the last hours (polyuria cannot be judged)\n"}
	}
	perDay := *u.RateMlPerHour * 24
	fig["urineOutputMlPerHour"] = Round(*u.RateMlPerHour, 0)
	line := fmt.Sprintf("- Urine output %s mL/h over the last %s h, about %s mL/day", orderRate.of(*u.RateMlPerHour), hoursSpan.of(u.Hours), mlPerDay.of(perDay))
	if neuro {
		if h, ok := sustainedOutput(u.Volumes, cd.PostoperativeMlPerHourAbove); ok && h >= cd.PostoperativeHours {
			fig["polyuria"] = 1
			return polyuria{is: true, line: line + fmt.Sprintf(": above %g mL/h in every charted period of the last %s h, polyuria "+
				"after neurosurgery (%s)\n", cd.PostoperativeMlPerHourAbove, hoursSpan.of(h), cd.PostoperativeSource)}
		}
	}
	child, known := r.isChild(c.f)
	switch {
	case !known:
		return polyuria{line: line + "; polyuria is not judged: the age is unknown, and a child's definition is per body-surface area\n"}
	case child:
		w, okW := latestWithin(c.f.Labs[BodyWeight], c.f.At, r.policy.Projection.WeightMaxAgeHours)
		h, okH := latestWithin(c.f.Labs[BodyHeight], c.f.At, r.policy.ChartReview.HeightMaxAgeHours)
		if !okW || !okH {
			return polyuria{line: line + fmt.Sprintf("; a child's polyuria is judged per body-surface area, which needs a recent %s\n", missingSize(okW, okH))}
		}
		bsa, err := MostellerBSA(h.Value, w.Value)
		if err != nil {
			return polyuria{line: line + "; body-surface area not computed: " + err.Error() + "\n"}
		}
		perM2 := perDay / bsa
		fig["urineOutputMlPerM2PerDay"], fig["bsaM2"] = Round(perM2, 0), Round(bsa, 2)
		if perM2 > cd.PolyuriaChildMlPerM2PerDay {
			fig["polyuria"] = 1
			return polyuria{is: true, line: line + fmt.Sprintf(", %s mL/m²/day for %s m² (Mosteller): polyuria for a child, above %g mL/m²/day (%s)\n",
				mlPerDay.of(perM2), ratioOrBSA.of(bsa), cd.PolyuriaChildMlPerM2PerDay, cd.PolyuriaSource)}
		}
		return polyuria{line: line + fmt.Sprintf(", %s mL/m²/day for %s m² (Mosteller): not polyuria for a child (%g mL/m²/day or less; %s)\n",
			mlPerDay.of(perM2), ratioOrBSA.of(bsa), cd.PolyuriaChildMlPerM2PerDay, cd.PolyuriaSource)}
	case perDay > cd.PolyuriaAdultMlPerDay:
		fig["polyuria"] = 1
		return polyuria{is: true, line: line + fmt.Sprintf(": polyuria, above %g mL/day (%s)\n", cd.PolyuriaAdultMlPerDay, cd.PolyuriaSource)}
	}
	return polyuria{line: line + fmt.Sprintf(": not polyuria (%g mL/day or less; %s)\n", cd.PolyuriaAdultMlPerDay, cd.PolyuriaSource)}
}

// sustainedOutput walks the recent collection periods, newest first (as
// ReadUrineLosses lists them), while each follows on from the one before
// it (within 15 minutes) and its rate is above mlPerHour, and returns the
// hours covered; ok is false when the newest is not above it.
func sustainedOutput(newestFirst []Measurement, mlPerHour float64) (float64, bool) {
	var hours float64
	var expectEnd time.Time
	for i, v := range newestFirst {
		if i > 0 && math.Abs(v.At.Sub(expectEnd).Minutes()) > 15 {
			break
		}
		if v.Value/v.PeriodHours <= mlPerHour {
			break
		}
		hours += v.PeriodHours
		expectEnd = v.At.Add(-time.Duration(v.PeriodHours * float64(time.Hour)))
	}
	return hours, hours > 0
}

func (r *Ruleset) concentratingDefect(c chart) (Finding, bool) {
	cd := r.policy.ChartReview.ConcentratingDefect
	fig := map[string]float64{}
	diluteLine, dilute := r.diluteUrineForDI(c, fig)
	if !dilute {
		return Finding{}, false
	}
	ctx, neuro := r.recentNeurosurgery(c.f)
	poly := r.readPolyuria(c, fig, neuro)
	high := c.latest.Value > cd.SodiumAbove || (c.serumOs != nil && c.serumOs.Value > cd.SerumOsmolalityAbove)
	// A rising sodium counts outside the correction of a hyponatremia (whose
	// own dilute urine is an aquaresis, judged by the infusion check).
	rising := false
	if w24, w48 := c.trend.Window24h, c.trend.Window48h; w24 != nil && w48 != nil && w48.Nadir.Value >= r.policy.ChartReview.HyponatremiaBelow {
		rising = w24.RiseFromNadir >= cd.SodiumRiseIn24hAtLeast && poly.is
		if rising {
			fig["riseFromNadir24h"] = Round(w24.RiseFromNadir, 1)
		}
	}
	if !high && !rising {
		return Finding{}, false
	}
	var b strings.Builder
	b.WriteString("**Figures**\n\n")
	r.commonLines(&b, c)
	if c.serumOs != nil {
		fmt.Fprintf(&b, "- Serum osmolality %s mOsm/kg (%s)\n", show(SerumOsmolality, c.serumOs.Value), stamp(c.serumOs.At))
	}
	if !high {
		fmt.Fprintf(&b, "- Sodium rose %s mmol/L in 24 h (a rise of %g or more with polyuria counts): a dilute diuresis with a normal "+
			"sodium can also be the excretion of fluids given, around surgery for one; the rise in sodium is what argues for DI\n",
			naChange.of(fig["riseFromNadir24h"]), cd.SodiumRiseIn24hAtLeast)
	}
	b.WriteString(diluteLine)
	b.WriteString(poly.line)
	drugs := r.activeDrugs(c.f, EffectNephrogenicDI)
	if len(drugs) > 0 {
		fmt.Fprintf(&b, "- Active drugs that can cause nephrogenic DI: %s\n", strings.Join(drugs, ", "))
	}
	date := ""
	if neuro {
		date = ctx.Procedure.At.In(r.displayZone()).Format("2006-01-02")
	}
	switch {
	case neuro && len(drugs) > 0:
		fmt.Fprintf(&b, "- Which way the data lean: both ways — %s on %s points to a central cause (vasopressin deficiency), "+
			"the drugs above to a nephrogenic one\n", ctx.What, date)
	case neuro:
		fmt.Fprintf(&b, "- Which way the data lean: %s on %s points to a central cause (vasopressin deficiency)\n", ctx.What, date)
	case len(drugs) > 0:
		b.WriteString("- Which way the data lean: the drugs above point to a nephrogenic cause (vasopressin resistance)\n")
	default:
		b.WriteString("- Which way the data lean: no neurosurgical procedure and no nephrogenic-DI drug found in the data\n")
	}
	if neuro {
		b.WriteString(r.phaseLine(c.f, ctx, phasePolyuric))
	}
	if high {
		fmt.Fprintf(&b, "\n**What tells them apart**: %s.", cd.EvaluationWhenHigh)
	} else {
		fmt.Fprintf(&b, "\n**What tells them apart, and the evaluation the policy suggests**: %s.", cd.Evaluation)
	}
	urine := show(UrineOsmolality, fig["urineOsmolality"]) + " mOsm/kg"
	if c.urineOs == nil {
		urine = "specific gravity " + show(UrineSpecificGravity, fig["urineSpecificGravity"])
	}
	summary := fmt.Sprintf("Dilute urine (%s) with sodium %s: pattern of a urinary concentrating defect", urine, show(Sodium, c.latest.Value))
	if !high {
		summary = fmt.Sprintf("Dilute urine (%s) and polyuria with sodium rising %s in 24 h to %s: possible diabetes insipidus", urine,
			naChange.of(fig["riseFromNadir24h"]), show(Sodium, c.latest.Value))
	}
	if len(drugs) > 0 {
		summary += "; on " + strings.Join(drugs, ", ")
	}
	return Finding{Rule: RuleConcentratingDefect, Summary: shorten(summary, 139), Detail: b.String(), Figures: fig}, true
}
