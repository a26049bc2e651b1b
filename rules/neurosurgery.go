package rules

import (
	"fmt"
	"math"
	"slices"
	"strings"
	"time"
)

// RuleDesmopressinAfterNeurosurgery flags desmopressin active or drafted
// within the policy window after pituitary surgery or a craniotomy while
// sodium is low or falling: continued into the water-retention phase that
// can follow the early polyuria, it causes severe hyponatremia.
const RuleDesmopressinAfterNeurosurgery = "desmopressin-after-neurosurgery"

// NeurosurgeryPolicy names the procedures after which the course of water
// balance is watched, the window, and when the sodium counts as low or
// falling.
type NeurosurgeryPolicy struct {
	Procedures       []ConditionCodes `json:"procedures"`
	WindowDays       float64          `json:"windowDays"`
	SodiumBelow      float64          `json:"sodiumBelow"`
	FallIn24hAtLeast float64          `json:"fallIn24hAtLeast"`
	Source           string           `json:"source"`
	// Course gives the postoperative days in which each phase of the
	// classic sequence typically falls.
	Course struct {
		PolyuricUntilDay  float64 `json:"polyuricUntilDay"`
		RetentionUntilDay float64 `json:"retentionUntilDay"`
		Source            string  `json:"source"`
	} `json:"course"`
}

func (n NeurosurgeryPolicy) validate() error {
	if n.WindowDays <= 0 || n.SodiumBelow <= 0 || n.FallIn24hAtLeast <= 0 || n.Source == "" || len(n.Procedures) == 0 {
		return fmt.Errorf("neurosurgery needs a window, a sodium threshold, a fall, procedures and a source")
	}
	if c := n.Course; c.PolyuricUntilDay <= 0 || c.RetentionUntilDay <= c.PolyuricUntilDay || c.Source == "" {
		return fmt.Errorf("neurosurgery.course needs polyuricUntilDay < retentionUntilDay and a source")
	}
	for i, p := range n.Procedures {
		if !p.complete() {
			return fmt.Errorf("neurosurgery.procedures[%d] needs a name (factor), a system, codes and a source", i)
		}
	}
	return nil
}

// neurosurgicalContext is the latest listed procedure within the window
// before the evaluation time, with what it is.
type neurosurgicalContext struct {
	Procedure Procedure
	What      string
	Days      float64
}

// recentNeurosurgery finds the latest listed procedure within the window.
func (r *Ruleset) recentNeurosurgery(f Facts) (neurosurgicalContext, bool) {
	n := r.policy.Neurosurgery
	var best neurosurgicalContext
	found := false
	for _, p := range f.Procedures {
		days := f.At.Sub(p.At).Hours() / 24
		if days < 0 || days > n.WindowDays || (found && !p.At.After(best.Procedure.At)) {
			continue
		}
		for _, c := range n.Procedures {
			if codesMatch(c, p.Codings) {
				best, found = neurosurgicalContext{Procedure: p, What: c.Factor, Days: days}, true
				break
			}
		}
	}
	return best, found
}

// codesMatch reports whether any coding is one of c's codes or prefixes
// in c's system.
func codesMatch(c ConditionCodes, cs []Coding) bool {
	for _, x := range cs {
		if x.System == c.System && c.matches(x.Code) {
			return true
		}
	}
	return false
}

// retentionSigns says why the sodium is a concern after neurosurgery: below
// the threshold, or fallen by the policy amount in 24 h; with the figures.
func (r *Ruleset) retentionSigns(f Facts) (string, map[string]float64, bool) {
	n := r.policy.Neurosurgery
	latest, ok := latestWithin(f.Labs[Sodium], f.At, r.policy.Projection.SodiumMaxAgeHours)
	if !ok {
		return "", nil, false
	}
	fig := map[string]float64{"sodiumLatest": latest.Value}
	fall := 0.0
	if w := AnalyseSodium(f.Labs[Sodium], f.At).Window24h; w != nil {
		fall = w.FallFromPeak
		fig["fallFromPeak24h"] = Round(fall, 1)
	}
	var why []string
	if latest.Value < n.SodiumBelow {
		why = append(why, fmt.Sprintf("sodium %s mmol/L, below %g", show(Sodium, latest.Value), n.SodiumBelow))
	}
	if fall >= n.FallIn24hAtLeast {
		why = append(why, fmt.Sprintf("a fall of %s mmol/L in 24 h", naChange.of(fall)))
	}
	if len(why) == 0 {
		return "", nil, false
	}
	return strings.Join(why, " and "), fig, true
}

// isDesmopressin reports whether o is for a water drug the policy marks
// as the antidiuretic (desmopressin).
func (r *Ruleset) isDesmopressin(o MedicationOrder) bool {
	d, _, ok := r.policy.WaterDrugs.match(o.Medication)
	return ok && d.Antidiuretic
}

// DesmopressinTokens are the "system|code" search tokens (RxNorm, ATC) of
// the antidiuretic of the water-drug policy, sorted, for a prefetch query.
func (r *Ruleset) DesmopressinTokens() []string {
	var out []string
	for _, d := range r.policy.WaterDrugs.Drugs {
		if !d.Antidiuretic {
			continue
		}
		for _, c := range d.RxNorm {
			out = append(out, SystemRxNorm+"|"+c)
		}
		for _, c := range d.ATC {
			out = append(out, SystemATC+"|"+c)
		}
	}
	slices.Sort(out)
	return out
}

// postoperativeDay is the day clinicians count: calendar days, in the
// display zone, since the procedure's date, the day of surgery being day 0.
func (r *Ruleset) postoperativeDay(ctx neurosurgicalContext) float64 {
	return r.dayAfter(ctx.Procedure.At, ctx.Procedure.At.Add(time.Duration(ctx.Days*float64(24*time.Hour))))
}

// dayAfter counts calendar days, in the display zone, from from's date to
// t's (the day of from being day 0).
func (r *Ruleset) dayAfter(from, t time.Time) float64 {
	zone := r.displayZone()
	y1, m1, d1 := from.In(zone).Date()
	y2, m2, d2 := t.In(zone).Date()
	return math.Round(time.Date(y2, m2, d2, 0, 0, 0, 0, time.UTC).Sub(time.Date(y1, m1, d1, 0, 0, 0, 0, time.UTC)).Hours() / 24)
}

// The patterns of the data that the course after neurosurgery reads.
type coursePattern int

const (
	phasePolyuric  coursePattern = iota // dilute urine with a high or rising sodium
	phaseRetention                      // a low or falling sodium
)

// phaseLine says which phase of the classic sequence the data fit on this
// postoperative day, and what may come next.
func (r *Ruleset) phaseLine(f Facts, ctx neurosurgicalContext, p coursePattern) string {
	n := r.policy.Neurosurgery
	c := n.Course
	day := r.postoperativeDay(ctx)
	// A sodium below the threshold after the polyuric days and more than a
	// day ago is a retention phase already passed.
	var retained *Measurement
	for i, m := range f.Labs[Sodium] {
		d := r.dayAfter(ctx.Procedure.At, m.At)
		if d >= c.PolyuricUntilDay && f.At.Sub(m.At).Hours() > 24 && m.Value < n.SodiumBelow && (retained == nil || m.Value < retained.Value) {
			retained = &f.Labs[Sodium][i]
		}
	}
	var fit string
	switch {
	case p == phasePolyuric && retained != nil:
		fit = fmt.Sprintf("dilute urine on day %g, after a sodium of %s on %s, fits the third phase: diabetes insipidus after the "+
			"retention phase, which may last", day, show(Sodium, retained.Value), retained.At.In(r.displayZone()).Format("2006-01-02"))
	case p == phasePolyuric && day <= c.PolyuricUntilDay:
		fit = fmt.Sprintf("dilute urine on day %g fits the first, polyuric phase (vasopressin deficiency); a phase of water retention "+
			"can follow, typically up to about day %g, when desmopressin given for the polyuria can cause severe hyponatremia", day, c.RetentionUntilDay)
	case p == phasePolyuric && day > c.RetentionUntilDay:
		fit = fmt.Sprintf("dilute urine on day %g, after the days of the retention phase, fits the third phase: diabetes insipidus that may last", day)
	case p == phasePolyuric:
		fit = fmt.Sprintf("dilute urine on day %g falls in the days when water retention typically occurs: the first phase lasting longer, "+
			"or the third phase after a short retention", day)
	case day >= c.PolyuricUntilDay && day <= c.RetentionUntilDay:
		fit = fmt.Sprintf("a low or falling sodium on day %g fits the second phase, water retention (vasopressin released from the "+
			"injured gland), typically days %g to %g; lasting diabetes insipidus may follow it", day, c.PolyuricUntilDay, c.RetentionUntilDay)
	case day < c.PolyuricUntilDay:
		fit = fmt.Sprintf("a low or falling sodium on day %g, earlier than the typical retention days (%g to %g): retention, often "+
			"without a polyuric phase before it, can begin now", day, c.PolyuricUntilDay, c.RetentionUntilDay)
	default:
		fit = fmt.Sprintf("a low or falling sodium on day %g, after the typical retention days (%g to %g)", day, c.PolyuricUntilDay,
			c.RetentionUntilDay)
	}
	given := ""
	var doses []MedicationOrder
	for _, o := range f.Given {
		if r.isDesmopressin(o) && o.GivenAt != nil && o.GivenAt.After(ctx.Procedure.At) {
			doses = append(doses, o)
		}
	}
	if len(doses) > 0 {
		last := doses[0]
		for _, o := range doses {
			if o.GivenAt.After(*last.GivenAt) {
				last = o
			}
		}
		given = fmt.Sprintf("; desmopressin doses given since: %d, the last %s", len(doses), stamp(*last.GivenAt))
	}
	var ordered []string
	for _, o := range f.Medications {
		if r.isDesmopressin(o) {
			ordered = append(ordered, o.Reference)
		}
	}
	if len(ordered) > 0 {
		given += "; desmopressin ordered: " + strings.Join(ordered, ", ")
	}
	return fmt.Sprintf("- Course after %s (%s, day %g%s): %s (%s)\n", ctx.What, ctx.Procedure.At.In(r.displayZone()).Format("2006-01-02"), day,
		given, fit, c.Source)
}

// neurosurgeryFinding words the finding for the desmopressin orders named
// (what), in context ctx, for the reasons given.
func (r *Ruleset) neurosurgeryFinding(f Facts, what string, ctx neurosurgicalContext, why string, fig map[string]float64) Finding {
	n := r.policy.Neurosurgery
	zone := r.displayZone()
	days := r.postoperativeDay(ctx)
	fig["daysSinceProcedure"] = days
	rule := r.cardRule(RuleDesmopressinAfterNeurosurgery)
	var b strings.Builder
	b.WriteString("**Figures**\n\n")
	fmt.Fprintf(&b, "- Desmopressin: %s\n", what)
	fmt.Fprintf(&b, "- %s on %s (%s), day %g after it\n", capitalise(ctx.What), ctx.Procedure.At.In(zone).Format("2006-01-02"), ctx.Procedure.Reference, days)
	fmt.Fprintf(&b, "- Now: %s\n", why)
	if u, ok := latestWithin(f.Labs[UrineOsmolality], f.At, r.policy.ChartReview.LabPairHours); ok {
		fig["urineOsmolality"] = u.Value
		fmt.Fprintf(&b, "- Urine osmolality %s mOsm/kg (%s, %s)\n", show(UrineOsmolality, u.Value), stamp(u.At), u.Source)
	} else {
		fmt.Fprintf(&b, "- No urine osmolality within %g h\n", r.policy.ChartReview.LabPairHours)
	}
	b.WriteString(r.phaseLine(f, ctx, phaseRetention))
	fmt.Fprintf(&b, "- Flagged within %g days of the procedure when sodium is below %g mmol/L or falls %g mmol/L in 24 h\n",
		n.WindowDays, n.SodiumBelow, n.FallIn24hAtLeast)
	fmt.Fprintf(&b, "\n**The course**: %s\n\n**Labs cannot show**: which phase this is for certain; urine output and urine "+
		"osmolality help (concentrated urine with a falling sodium fits the retention phase). The treating team decides whether "+
		"desmopressin continues.", n.Source)
	trend := ""
	if fall := fig["fallFromPeak24h"]; fall >= n.FallIn24hAtLeast {
		trend = fmt.Sprintf(", down %s in 24 h", naChange.of(fall))
	}
	summary := fmt.Sprintf("Desmopressin on day %g after %s, sodium %s%s: the water-retention phase may have begun", days, ctx.What,
		show(Sodium, fig["sodiumLatest"]), trend)
	return Finding{Rule: RuleDesmopressinAfterNeurosurgery, Indicator: rule.Indicator, Summary: shorten(summary, 139), Detail: b.String(),
		Figures: fig, Product: "drug:desmopressin", Advice: []Advice{recheckAdvice(rule.RecheckHours)}}
}

// desmopressinAfterNeurosurgery is the chart review's finding for active
// desmopressin in that window.
func (r *Ruleset) desmopressinAfterNeurosurgery(c chart) (Finding, bool) {
	ctx, ok := r.recentNeurosurgery(c.f)
	if !ok {
		return Finding{}, false
	}
	var orders []string
	for _, o := range c.f.Medications {
		if r.isDesmopressin(o) {
			orders = append(orders, fmt.Sprintf("%s (%s, active)", o.Reference, orderText(o)))
		}
	}
	if len(orders) == 0 {
		return Finding{}, false
	}
	why, fig, ok := r.retentionSigns(c.f)
	if !ok {
		return Finding{}, false
	}
	return r.neurosurgeryFinding(c.f, strings.Join(orders, "; "), ctx, why, fig), true
}
