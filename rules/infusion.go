package rules

import (
	"fmt"
	"math"
	"strings"
	"time"
)

// Rule ids of the infusion check.
const (
	RuleLimitExceeded   = "sodium-limit-exceeded"
	RuleProjectedOver   = "sodium-projected-over-limit"
	RuleNoProjection    = "hypertonic-projection-unavailable"
	RuleHypertonicOrder = "hypertonic-saline-projection"
)

// hypertonicAtLeast is the infusate Na + K (mmol/L) from which a fluid is
// treated as hypertonic saline: 3% sodium chloride is 513 (FDA label [V]).
const hypertonicAtLeast = 500

// infusionFindings judges each selected draft order whose sodium content is
// known (the limit rules apply only to an order that moves sodium the way
// the limit restricts):
//   - critical: the measured change already exceeds a limit and the order
//     moves sodium further the same way, or the projected 24-h total exceeds
//     the limit at high demyelination risk;
//   - warning: the projected 24-h total exceeds the limit, or a hypertonic
//     order cannot be projected (an input is missing);
//   - info: any other hypertonic order, with its projection;
//   - nothing otherwise.
func (r *Ruleset) infusionFindings(f Facts) []Finding {
	var out []Finding
	for _, o := range f.DraftOrders {
		if !o.Selected {
			continue
		}
		a := r.AssessInfusion(f, o)
		if a.Composition == nil {
			continue
		}
		if fd, ok := r.judge(a); ok {
			out = append(out, fd)
		}
	}
	return out
}

func (r *Ruleset) judge(a InfusionAssessment) (Finding, bool) {
	hypertonic := a.Composition.NaK() >= hypertonicAtLeast
	word, sign := "rise", 1.0
	if a.Hypernatremia {
		word, sign = "fall", -1
	}
	fd := Finding{Figures: a.figures()}
	exceeded := a.Achieved24h > a.Limit24h || (a.Limit48h > 0 && a.Achieved48h > a.Limit48h)
	sameWay := a.DeltaPerLitre != nil && sign**a.DeltaPerLitre > 0
	switch {
	case a.Latest != nil && exceeded && sameWay:
		fd.Rule, fd.Indicator = RuleLimitExceeded, Critical
		fd.Summary = fmt.Sprintf("Sodium already %s %.1f mmol/L in 24 h (limit %g); this order moves it further",
			pastTense(word), a.Achieved24h, a.Limit24h)
	case a.ProjectedTotal24h != nil && sameWay && sign**a.ProjectedTotal24h > a.Limit24h:
		fd.Rule, fd.Indicator = RuleProjectedOver, Warning
		if len(a.Risk) > 0 && !a.Hypernatremia {
			fd.Indicator = Critical
		}
		fd.Summary = fmt.Sprintf("Projected sodium %s %.1f mmol/L in 24 h with this order, above the %g mmol/L limit",
			word, math.Abs(*a.ProjectedTotal24h), a.Limit24h)
	case hypertonic && a.ProjectedChange24h == nil:
		fd.Rule, fd.Indicator = RuleNoProjection, Warning
		fd.Summary = "Hypertonic saline order: sodium change not projected; missing " + shorten(a.Missing[0], 70)
	case hypertonic:
		fd.Rule, fd.Indicator = RuleHypertonicOrder, Info
		fd.Summary = fmt.Sprintf("Hypertonic saline: projected sodium %s %.1f mmol/L in 24 h (limit %g mmol/L)",
			word, math.Abs(*a.ProjectedTotal24h), a.Limit24h)
	default:
		return Finding{}, false
	}
	fd.Detail = r.detail(a, word)
	return fd, true
}

func pastTense(word string) string {
	if word == "rise" {
		return "rose"
	}
	return "fell"
}

func shorten(s string, n int) string {
	if r := []rune(s); len(r) > n {
		return string(r[:n-1]) + "…"
	}
	return s
}

// figures are the machine-readable numbers (DESIGN §5 names).
func (a InfusionAssessment) figures() map[string]float64 {
	fig := map[string]float64{"limit24h": a.Limit24h, "infusateNaKmmolPerL": Round(a.Composition.NaK(), 1)}
	if a.Limit48h > 0 {
		fig["limit48h"] = a.Limit48h
	}
	if len(a.Risk) > 0 {
		fig["odsHighRisk"] = 1
	} else {
		fig["odsHighRisk"] = 0
	}
	if a.Latest != nil {
		fig["sodiumLatest"] = a.Latest.Value
	}
	if w := a.Trend.Window24h; w != nil {
		fig["riseFromNadir24h"], fig["fallFromPeak24h"] = w.RiseFromNadir, w.FallFromPeak
	}
	if w := a.Trend.Window48h; w != nil {
		fig["riseFromNadir48h"] = w.RiseFromNadir
	}
	set := func(name string, v *float64, decimals int) {
		if v != nil {
			fig[name] = Round(*v, decimals)
		}
	}
	set("tbwLitres", a.TBWLitres, 1)
	set("deltaPerLitre", a.DeltaPerLitre, 2)
	set("volume24hLitres", a.Volume24hLitres, 3)
	set("projectedChange24h", a.ProjectedChange24h, 1)
	set("projectedTotal24h", a.ProjectedTotal24h, 1)
	set("maxRateMlPerHour", a.MaxRateMlPerHour, 1)
	return fig
}

func (r *Ruleset) detail(a InfusionAssessment, word string) string {
	l := r.policy.Limits
	var b strings.Builder
	line := func(format string, args ...any) { fmt.Fprintf(&b, "- "+format+"\n", args...) }
	stamp := func(t time.Time) string { return t.UTC().Format("2006-01-02 15:04 UTC") }
	b.WriteString("**Figures**\n\n")
	if a.Latest != nil {
		line("Latest sodium: %g mmol/L (%s, %s)", a.Latest.Value, stamp(a.Latest.At), a.Latest.Source)
	}
	if w := a.Trend.Window24h; w != nil {
		if a.Hypernatremia {
			line("Fall already measured: %g mmol/L from the peak of %g (%s) in the last 24 h", w.FallFromPeak, w.Peak.Value, stamp(w.Peak.At))
		} else {
			line("Rise already measured: %g mmol/L from the nadir of %g (%s) in the last 24 h", w.RiseFromNadir, w.Nadir.Value, stamp(w.Nadir.At))
		}
	}
	if w := a.Trend.Window48h; w != nil && !a.Hypernatremia {
		line("Rise in the last 48 h: %g mmol/L from the nadir of %g", w.RiseFromNadir, w.Nadir.Value)
	}
	switch {
	case a.Hypernatremia:
		line("Limit: a fall of %g mmol/L per 24 h and %g mmol/L per hour (%s)", l.HypernatremiaFall24h.Value,
			l.HypernatremiaFallPerHour.Value, l.HypernatremiaFall24h.Source)
	case len(a.Risk) > 0:
		line("Limit: %g mmol/L per 24 h at high osmotic-demyelination risk (%s), and %g per 48 h",
			l.HyponatremiaRise24hHighRisk.Value, l.HyponatremiaRise24hHighRisk.Source, l.HyponatremiaRise48h.Value)
	default:
		line("Limit: %g mmol/L per 24 h (%s) and %g mmol/L per 48 h (%s)", l.HyponatremiaRise24h.Value,
			l.HyponatremiaRise24h.Source, l.HyponatremiaRise48h.Value, l.HyponatremiaRise48h.Source)
	}
	for _, rf := range a.Risk {
		line("Demyelination risk factor: %s (%s)", rf.Factor, rf.Evidence)
	}
	if a.Weight != nil && a.TBWLitres != nil {
		line("Total body water: %.1f L, %s of %g kg weighed %s", *a.TBWLitres, a.TBWMethod, a.Weight.Value, stamp(a.Weight.At))
	}
	c := a.Composition
	line("Infusate: sodium %g + potassium %g mmol/L, from %s (%s)", Round(c.Na, 1), Round(c.K, 1), c.Basis, c.Source)
	if a.Volume24hLitres != nil {
		line("Volume in the next 24 h: %.3f L (%s)", *a.Volume24hLitres, a.VolumeBasis)
	}
	if a.DeltaPerLitre != nil {
		line("Change per litre (Adrogué–Madias): %+.2f mmol/L", *a.DeltaPerLitre)
	}
	if a.ProjectedChange24h != nil {
		line("Projected change from this order: %+.1f mmol/L; projected 24-h total: %+.1f mmol/L", *a.ProjectedChange24h, *a.ProjectedTotal24h)
	}
	switch {
	case a.LimitReached:
		line("The %s allowed in this 24-h window is already used", word)
	case a.MaxRateMlPerHour != nil:
		line("Largest rate that keeps the projected 24-h total within the limit: %.1f mL/h", *a.MaxRateMlPerHour)
	}
	if len(a.Missing) > 0 {
		b.WriteString("\n**Could not be computed without**: " + strings.Join(a.Missing, "; ") + ". Nothing was assumed in their place.\n")
	}
	b.WriteString("\n**Method**: mass balance ΔNa = V·(Na + K of the infusate − serum Na)/(TBW + V), the " +
		"Adrogué–Madias formula (N Engl J Med 2000) scaled to the 24-h volume (Chen & Shey, Kidney360 2021). " +
		"Rolling 24-h and 48-h windows end now. The projection ignores urine output, insensible and other " +
		"ongoing losses, and other fluids and drugs; measured sodium is the guide.")
	return b.String()
}
