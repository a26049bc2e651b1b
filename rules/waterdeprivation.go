package rules

import (
	"fmt"
	"slices"
	"strings"
	"time"
)

// RuleWaterDeprivationTest reads a charted water deprivation test with its
// desmopressin challenge by the published criteria.
const RuleWaterDeprivationTest = "water-deprivation-test"

// WaterDeprivationPolicy says how a test is recognised in the data and read.
type WaterDeprivationPolicy struct {
	// A test is a desmopressin dose given within ShowDays, preceded within
	// DeprivationHours by at least MinUrineResultsBefore urine
	// osmolalities; the response is the highest urine osmolality within
	// AfterDoseHours of the dose.
	ShowDays              float64 `json:"showDays"`
	DeprivationHours      float64 `json:"deprivationHours"`
	MinUrineResultsBefore int     `json:"minUrineResultsBefore"`
	AfterDoseHours        float64 `json:"afterDoseHours"`
	// Dehydration is adequate when the serum osmolality or the sodium
	// rose above these, or the urine concentrated to more than
	// ConcentratedRatio times the serum osmolality.
	AdequateSerumOsmolalityAbove float64 `json:"adequateSerumOsmolalityAbove"`
	AdequateSodiumAbove          float64 `json:"adequateSodiumAbove"`
	AdequateSource               string  `json:"adequateSource"`
	ConcentratedRatio            float64 `json:"concentratedRatio"`
	// The rise in urine osmolality after desmopressin, in per cent.
	NoResponseRiseBelow       float64 `json:"noResponseRiseBelow"`
	PartialCentralRiseAtLeast float64 `json:"partialCentralRiseAtLeast"`
	CentralRiseAbove          float64 `json:"centralRiseAbove"`
	CriteriaSource            string  `json:"criteriaSource"`
	AccuracySource            string  `json:"accuracySource"`
	// PlateauRisePerHourBelow: the urine had stopped concentrating when
	// the dose was given.
	PlateauRisePerHourBelow  float64 `json:"plateauRisePerHourBelow"`
	PlateauSource            string  `json:"plateauSource"`
	WeightLossPercentAtLeast float64 `json:"weightLossPercentAtLeast"`
	WeightLossSource         string  `json:"weightLossSource"`
	Copeptin                 struct {
		StimulatedSodiumAtLeast  float64 `json:"stimulatedSodiumAtLeast"`
		PrimaryPolydipsiaAbove   float64 `json:"primaryPolydipsiaAbove"`
		StimulatedSource         string  `json:"stimulatedSource"`
		BaselineNephrogenicAbove float64 `json:"baselineNephrogenicAbove"`
		BaselineSource           string  `json:"baselineSource"`
	} `json:"copeptin"`
}

func (p WaterDeprivationPolicy) validate() error {
	c := p.Copeptin
	switch {
	case p.ShowDays <= 0 || p.DeprivationHours <= 0 || p.MinUrineResultsBefore < 1 || p.AfterDoseHours <= 0:
		return fmt.Errorf("waterDeprivation needs showDays, deprivationHours, minUrineResultsBefore and afterDoseHours")
	case p.AdequateSerumOsmolalityAbove <= 0 || p.AdequateSodiumAbove <= 0 || p.ConcentratedRatio <= 1 || p.PlateauRisePerHourBelow <= 0:
		return fmt.Errorf("waterDeprivation needs the adequate-dehydration thresholds and a concentrated ratio above 1")
	case !(0 < p.NoResponseRiseBelow && p.NoResponseRiseBelow <= p.PartialCentralRiseAtLeast && p.PartialCentralRiseAtLeast < p.CentralRiseAbove):
		return fmt.Errorf("waterDeprivation rises must order as noResponseRiseBelow <= partialCentralRiseAtLeast < centralRiseAbove")
	case c.StimulatedSodiumAtLeast <= 0 || c.PrimaryPolydipsiaAbove <= 0 || c.BaselineNephrogenicAbove <= 0 || p.WeightLossPercentAtLeast <= 0:
		return fmt.Errorf("waterDeprivation needs the copeptin thresholds and the weight loss")
	case p.AdequateSource == "" || p.PlateauSource == "" || p.CriteriaSource == "" || p.AccuracySource == "" || p.WeightLossSource == "" || c.StimulatedSource == "" || c.BaselineSource == "":
		return fmt.Errorf("waterDeprivation needs every source")
	}
	return nil
}

// WaterDeprivationOutcome is what a test's figures fit.
type WaterDeprivationOutcome string

// The outcomes of a water deprivation test read by the criteria.
const (
	WDTNotAdequate        WaterDeprivationOutcome = "stopped before adequate dehydration"
	WDTNormalOrPolydipsia WaterDeprivationOutcome = "a normal concentrating response: primary polydipsia or no diabetes insipidus"
	WDTCompleteCentral    WaterDeprivationOutcome = "complete central diabetes insipidus (vasopressin deficiency)"
	WDTCentral            WaterDeprivationOutcome = "central diabetes insipidus, though the urine was above the serum osmolality before desmopressin (possibly partial)"
	WDTPartialCentral     WaterDeprivationOutcome = "partial central diabetes insipidus"
	WDTNephrogenic        WaterDeprivationOutcome = "nephrogenic diabetes insipidus (vasopressin resistance)"
	WDTIndeterminate      WaterDeprivationOutcome = "none of the published ranges"
	WDTNoResponse         WaterDeprivationOutcome = "no reading: no urine osmolality after desmopressin"
	WDTNoSerumOsmolality  WaterDeprivationOutcome = "no reading: no serum osmolality at the end of deprivation"
)

// WaterDeprivationReading is a test found in the data and its figures.
type WaterDeprivationReading struct {
	Dose              MedicationOrder
	DoseAt            time.Time
	Start             time.Time    // the first result of the deprivation phase
	UrineEnd          Measurement  // the last urine osmolality before the dose
	UrineAfter        *Measurement // the highest within the response window
	SerumEnd          *Measurement // the last serum osmolality before the dose
	SodiumEnd         *Measurement
	UrinePlasmaRatio  *float64
	RisePercent       *float64
	Adequate          bool
	Outcome           WaterDeprivationOutcome
	WeightLossPercent *float64
	WeightFirst       *Measurement
	WeightLast        *Measurement
	// LastRisePerHour is the urine's change per hour between its last two
	// results before the dose.
	LastRisePerHour *float64
}

// ReadWaterDeprivationTest finds the latest test in the data and reads it;
// ok is false when there is none, or its response window is still open
// with no result after the dose.
func (r *Ruleset) ReadWaterDeprivationTest(f Facts) (WaterDeprivationReading, bool) {
	p := r.policy.WaterDeprivation
	var doses []MedicationOrder
	for _, o := range f.Given {
		if o.GivenAt != nil && f.At.Sub(*o.GivenAt).Hours() <= p.ShowDays*24 && r.isDesmopressin(o) {
			doses = append(doses, o)
		}
	}
	slices.SortFunc(doses, func(a, b MedicationOrder) int { return b.GivenAt.Compare(*a.GivenAt) }) // newest first
	for i, d := range doses {
		if w, ok, done := r.readTestAt(f, d, doses[i+1:]); done {
			return w, ok
		}
	}
	return WaterDeprivationReading{}, false
}

// readTestAt reads the test that ends with dose d, given the earlier doses.
// done is false when d does not end a test (so an earlier dose may): a
// desmopressin dose in the deprivation window before it (treatment, not a
// test), fewer serial urine osmolalities than the policy asks, a sodium
// below the hyponatremia threshold in the window (a correction being
// clamped, not a deprivation), fewer than two weights in the window, or a
// dose within the neurosurgery window. With done true, ok is false while the
// response is still being collected.
func (r *Ruleset) readTestAt(f Facts, d MedicationOrder, earlier []MedicationOrder) (w WaterDeprivationReading, ok, done bool) {
	p := r.policy.WaterDeprivation
	dose := *d.GivenAt
	from := dose.Add(-time.Duration(p.DeprivationHours * float64(time.Hour)))
	until := dose.Add(time.Duration(p.AfterDoseHours * float64(time.Hour)))
	for _, e := range earlier {
		if e.GivenAt.After(from) {
			return w, false, false
		}
	}
	before := between(f.Labs[UrineOsmolality], from, dose)
	if len(before) < p.MinUrineResultsBefore {
		return w, false, false
	}
	for _, m := range between(f.Labs[Sodium], from, dose) {
		if m.Value < r.policy.ChartReview.HyponatremiaBelow {
			return w, false, false
		}
	}
	// A test is weighed through (the patient's weight is its safety stop),
	// and is not done in the weeks after neurosurgery, where desmopressin
	// after serial urine osmolalities is treatment of the postoperative
	// course.
	if len(between(f.Labs[BodyWeight], from, dose)) < 2 {
		return w, false, false
	}
	if ctx, ok := r.recentNeurosurgery(f); ok && ctx.Procedure.At.Before(dose) {
		return w, false, false
	}
	w = WaterDeprivationReading{Dose: d, DoseAt: dose, UrineEnd: before[len(before)-1], Start: before[0].At}
	if n := len(before); n >= 2 {
		if h := before[n-1].At.Sub(before[n-2].At).Hours(); h > 0 {
			perHour := (before[n-1].Value - before[n-2].Value) / h
			w.LastRisePerHour = &perHour
		}
	}
	for _, a := range []Analyte{Sodium, SerumOsmolality, BodyWeight} {
		if s := between(f.Labs[a], from, dose); len(s) > 0 && s[0].At.Before(w.Start) {
			w.Start = s[0].At
		}
	}
	for i, m := range f.Labs[UrineOsmolality] {
		if m.At.After(dose) && !m.At.After(until) && !m.At.After(f.At) && (w.UrineAfter == nil || m.Value > w.UrineAfter.Value) {
			w.UrineAfter = &f.Labs[UrineOsmolality][i]
		}
	}
	if w.UrineAfter == nil && f.At.Before(until) {
		return w, false, true // the response is still being collected
	}
	if s := between(f.Labs[SerumOsmolality], from, dose); len(s) > 0 {
		w.SerumEnd = &s[len(s)-1]
		ratio := w.UrineEnd.Value / w.SerumEnd.Value
		w.UrinePlasmaRatio = &ratio
	}
	if s := between(f.Labs[Sodium], from, dose); len(s) > 0 {
		w.SodiumEnd = &s[len(s)-1]
	}
	if ws := between(f.Labs[BodyWeight], from, dose); len(ws) >= 2 {
		w.WeightFirst, w.WeightLast = &ws[0], &ws[len(ws)-1]
		loss := (ws[0].Value - ws[len(ws)-1].Value) / ws[0].Value * 100
		w.WeightLossPercent = &loss
	}
	if w.UrineAfter != nil {
		rise := (w.UrineAfter.Value - w.UrineEnd.Value) / w.UrineEnd.Value * 100
		w.RisePercent = &rise
	}
	concentrated := w.UrinePlasmaRatio != nil && *w.UrinePlasmaRatio > p.ConcentratedRatio
	w.Adequate = concentrated || (w.SerumEnd != nil && w.SerumEnd.Value > p.AdequateSerumOsmolalityAbove) ||
		(w.SodiumEnd != nil && w.SodiumEnd.Value > p.AdequateSodiumAbove)
	w.Outcome = p.classify(w, concentrated)
	return w, true, true
}

// classify applies the criteria (Miller 1970) to a reading.
func (p WaterDeprivationPolicy) classify(w WaterDeprivationReading, concentrated bool) WaterDeprivationOutcome {
	switch {
	case !w.Adequate:
		return WDTNotAdequate
	case w.RisePercent == nil:
		return WDTNoResponse
	case w.UrinePlasmaRatio == nil:
		return WDTNoSerumOsmolality
	}
	rise := *w.RisePercent
	switch {
	case concentrated && rise < p.NoResponseRiseBelow:
		return WDTNormalOrPolydipsia
	case concentrated:
		return WDTIndeterminate
	case rise > p.CentralRiseAbove && *w.UrinePlasmaRatio < 1:
		return WDTCompleteCentral
	case rise > p.CentralRiseAbove:
		return WDTCentral
	case rise >= p.PartialCentralRiseAtLeast:
		return WDTPartialCentral
	case rise < p.NoResponseRiseBelow:
		return WDTNephrogenic
	}
	return WDTIndeterminate
}

// fromTheTest reports whether the chart's urine osmolality was taken
// during the water deprivation test read from its facts (up to the end of
// the response window).
func (r *Ruleset) fromTheTest(c chart) bool {
	w, ok := r.ReadWaterDeprivationTest(c.f)
	end := w.DoseAt.Add(time.Duration(r.policy.WaterDeprivation.AfterDoseHours * float64(time.Hour)))
	return ok && c.urineOs != nil && !c.urineOs.At.After(end)
}

// between returns the results of s taken in (from, to].
func between(s []Measurement, from, to time.Time) []Measurement {
	var out []Measurement
	for _, m := range s {
		if m.At.After(from) && !m.At.After(to) {
			out = append(out, m)
		}
	}
	return out
}

// waterDeprivationTest is the chart review's finding for a charted test.
func (r *Ruleset) waterDeprivationTest(c chart) (Finding, bool) {
	w, ok := r.ReadWaterDeprivationTest(c.f)
	if !ok {
		return Finding{}, false
	}
	p := r.policy.WaterDeprivation
	fig := map[string]float64{"urineOsmolalityEnd": w.UrineEnd.Value, "adequateDehydration": 0}
	if w.Adequate {
		fig["adequateDehydration"] = 1
	}
	var b strings.Builder
	b.WriteString("**Figures**\n\n")
	fmt.Fprintf(&b, "- Desmopressin given %s (%s, %s), after serial urine osmolalities and with no desmopressin in the %g h "+
		"before it: read as the end of a water deprivation test\n", stamp(w.DoseAt), w.Dose.Reference, orderText(w.Dose), p.DeprivationHours)
	fmt.Fprintf(&b, "- Deprivation phase read from %s to the dose (%s h)\n", stamp(w.Start), hoursSpan.of(w.DoseAt.Sub(w.Start).Hours()))
	series := func(a Analyte, name, unit string) {
		var vals []string
		for _, m := range between(c.f.Labs[a], w.DoseAt.Add(-time.Duration(p.DeprivationHours*float64(time.Hour))),
			w.DoseAt.Add(time.Duration(p.AfterDoseHours*float64(time.Hour)))) {
			vals = append(vals, fmt.Sprintf("%s (%s)", show(a, m.Value), stamp(m.At)))
		}
		if len(vals) > 0 {
			fmt.Fprintf(&b, "- %s, %s: %s\n", name, unit, strings.Join(vals, ", "))
		} else {
			fmt.Fprintf(&b, "- %s: none charted during the test\n", name)
		}
	}
	series(Sodium, "Sodium", "mmol/L")
	series(SerumOsmolality, "Serum osmolality", "mOsm/kg")
	series(UrineOsmolality, "Urine osmolality", "mOsm/kg")
	if w.WeightLossPercent != nil {
		fig["weightLossPercent"] = Round(*w.WeightLossPercent, 1)
		line := fmt.Sprintf("- Weight %s → %s kg: %s%% lost", show(BodyWeight, w.WeightFirst.Value), show(BodyWeight, w.WeightLast.Value),
			percent.of(*w.WeightLossPercent))
		if Round(*w.WeightLossPercent, 1) >= p.WeightLossPercentAtLeast {
			line += fmt.Sprintf(", at or beyond the %g%% at which deprivation is usually stopped (%s)", p.WeightLossPercentAtLeast, p.WeightLossSource)
		}
		b.WriteString(line + "\n")
	} else {
		b.WriteString("- Weight: fewer than two weights during deprivation\n")
	}
	// Dehydration.
	var reached []string
	if w.SerumEnd != nil {
		fig["serumOsmolalityEnd"] = w.SerumEnd.Value
		reached = append(reached, fmt.Sprintf("serum osmolality %s (adequate above %g)", show(SerumOsmolality, w.SerumEnd.Value), p.AdequateSerumOsmolalityAbove))
	} else {
		reached = append(reached, "no serum osmolality")
	}
	if w.SodiumEnd != nil {
		reached = append(reached, fmt.Sprintf("sodium %s (adequate above %g)", show(Sodium, w.SodiumEnd.Value), p.AdequateSodiumAbove))
	}
	if w.UrinePlasmaRatio != nil {
		fig["urinePlasmaOsmolalityRatio"] = Round(*w.UrinePlasmaRatio, 2)
		reached = append(reached, fmt.Sprintf("urine-to-serum osmolality ratio %s (concentrated above %g)", ratioOrBSA.of(*w.UrinePlasmaRatio), p.ConcentratedRatio))
	}
	verdict := "adequate"
	if !w.Adequate {
		verdict = "NOT adequate: the test stopped before the stimulus was strong enough to read it"
	}
	fmt.Fprintf(&b, "- End of deprivation: %s — dehydration %s (%s)\n", strings.Join(reached, ", "), verdict, p.AdequateSource)
	if w.LastRisePerHour != nil {
		fig["urineRisePerHourBeforeDose"] = Round(*w.LastRisePerHour, 0)
		line := fmt.Sprintf("- Urine osmolality changed %s mOsm/kg per hour between its last two results before the dose", signedWhole(*w.LastRisePerHour))
		if *w.LastRisePerHour >= p.PlateauRisePerHourBelow {
			line += fmt.Sprintf(": still concentrating, while the criteria give desmopressin once the rise has fallen below %g per hour, "+
				"so part of the rise after it may be the deprivation continuing (%s)", p.PlateauRisePerHourBelow, p.PlateauSource)
		}
		b.WriteString(line + "\n")
	}
	if w.UrineAfter != nil {
		fig["urineOsmolalityAfterDesmopressin"] = w.UrineAfter.Value
		fig["risePercent"] = Round(*w.RisePercent, 1)
		fmt.Fprintf(&b, "- After desmopressin: urine osmolality %s → %s mOsm/kg (%s), a change of %s%%\n", show(UrineOsmolality, w.UrineEnd.Value),
			show(UrineOsmolality, w.UrineAfter.Value), stamp(w.UrineAfter.At), signedPercent(*w.RisePercent))
	} else {
		fmt.Fprintf(&b, "- After desmopressin: no urine osmolality within %g h of the dose; the response cannot be read\n", p.AfterDoseHours)
	}
	fmt.Fprintf(&b, "- Criteria: urine above %g × serum osmolality with a rise under %g%% is a normal response (primary polydipsia "+
		"cannot be told from normal this way); urine below serum with a rise above %g%% is complete central DI; a rise of %g–%g%% "+
		"partial central DI; urine below %g × serum with a rise under %g%% nephrogenic DI (%s)\n", p.ConcentratedRatio, p.NoResponseRiseBelow,
		p.CentralRiseAbove, p.PartialCentralRiseAtLeast, p.CentralRiseAbove, p.ConcentratedRatio, p.NoResponseRiseBelow, p.CriteriaSource)
	r.copeptinLines(&b, c.f, w, fig)
	if drugs := r.activeDrugs(c.f, EffectNephrogenicDI); len(drugs) > 0 {
		fmt.Fprintf(&b, "- Active drugs that can cause nephrogenic DI: %s\n", strings.Join(drugs, ", "))
	}
	if ctx := r.brainInjuryContext(c.f); len(ctx) > 0 {
		fmt.Fprintf(&b, "- Brain-injury context, a recognised cause of central DI: %s\n", strings.Join(ctx, "; "))
	}
	switch w.Outcome {
	case WDTNotAdequate:
		b.WriteString("- Reading: not classifiable — the test " + string(w.Outcome) + "; a low urine osmolality after a weak stimulus " +
			"can look like any of the ranges\n")
	case WDTNephrogenic:
		b.WriteString("- Reading: the figures fit " + string(w.Outcome))
		if *w.UrinePlasmaRatio >= 1 {
			b.WriteString("; with the urine above the serum osmolality, primary polydipsia with a washed-out renal medulla can look the same")
		}
		b.WriteString("\n")
	case WDTIndeterminate, WDTNoResponse, WDTNoSerumOsmolality:
		fmt.Fprintf(&b, "- Reading: %s\n", w.Outcome)
	default:
		fmt.Fprintf(&b, "- Reading: the figures fit %s\n", w.Outcome)
	}
	fmt.Fprintf(&b, "\n**Labs cannot show**: whether fluids were taken during the test, when the desmopressin was actually absorbed, "+
		"or a partial defect at the edges of the ranges; the indirect test misclassifies a share of patients (%s). The treating "+
		"team interprets the test with the history.", p.AccuracySource)
	var summary string
	switch {
	case !w.Adequate:
		var end []string
		if w.SerumEnd != nil {
			end = append(end, "serum osmolality "+show(SerumOsmolality, w.SerumEnd.Value))
		}
		if w.SodiumEnd != nil {
			end = append(end, "sodium "+show(Sodium, w.SodiumEnd.Value))
		}
		summary = "Water deprivation test stopped before adequate dehydration: not classifiable"
		if len(end) > 0 {
			summary = fmt.Sprintf("Water deprivation test stopped before adequate dehydration (%s): not classifiable", strings.Join(end, ", "))
		}
	case w.RisePercent != nil:
		summary = fmt.Sprintf("Water deprivation test: urine %s → %s mOsm/kg after desmopressin (%s%%): %s", show(UrineOsmolality, w.UrineEnd.Value),
			show(UrineOsmolality, w.UrineAfter.Value), signedPercent(*w.RisePercent), w.Outcome.short())
	default:
		summary = fmt.Sprintf("Water deprivation test (desmopressin %s): %s", stamp(w.DoseAt), w.Outcome.short())
	}
	return Finding{Rule: RuleWaterDeprivationTest, Summary: shorten(summary, 139), Detail: b.String(), Figures: fig}, true
}

// short is the outcome as a summary says it.
func (o WaterDeprivationOutcome) short() string {
	switch o {
	case WDTNormalOrPolydipsia:
		return "fits a normal response or primary polydipsia"
	case WDTCompleteCentral:
		return "fits complete central DI"
	case WDTCentral:
		return "fits central DI (urine above serum before it)"
	case WDTPartialCentral:
		return "fits partial central DI"
	case WDTNephrogenic:
		return "fits nephrogenic DI"
	case WDTIndeterminate:
		return "between the published ranges"
	}
	return string(o)
}

// signedWhole writes a change to the whole unit with its sign.
func signedWhole(v float64) string {
	if Round(v, 0) > 0 {
		return "+" + osmolal.of(v)
	}
	return osmolal.of(v)
}

// signedPercent writes a change in per cent with its sign.
func signedPercent(v float64) string {
	if Round(v, 1) > 0 {
		return "+" + percent.of(v)
	}
	return percent.of(v)
}

// copeptinLines reads the copeptin results of the test, where a site maps
// its code: one taken with a sodium at or above the stimulated level
// (Fenske 2018, after hypertonic saline), and an unstimulated baseline
// before deprivation (Timper 2015).
func (r *Ruleset) copeptinLines(b *strings.Builder, f Facts, w WaterDeprivationReading, fig map[string]float64) {
	cp := r.policy.WaterDeprivation.Copeptin
	from := w.Start.Add(-24 * time.Hour)
	cs := between(f.Labs[Copeptin], from, w.DoseAt)
	if len(cs) == 0 {
		return
	}
	for _, m := range cs {
		na := nearest(f.Labs[Sodium], m, 1, f)
		switch {
		case m.At.Before(w.Start) || m.At.Equal(w.Start):
			fig["copeptinBaseline"] = m.Value
			lean := fmt.Sprintf("not above %g pmol/L", cp.BaselineNephrogenicAbove)
			if m.Value > cp.BaselineNephrogenicAbove {
				lean = fmt.Sprintf("above %g pmol/L, which points to nephrogenic DI", cp.BaselineNephrogenicAbove)
			}
			fmt.Fprintf(b, "- Copeptin %s pmol/L before deprivation (%s, unstimulated): %s (%s)\n", show(Copeptin, m.Value), stamp(m.At), lean, cp.BaselineSource)
		case na != nil && na.Value >= cp.StimulatedSodiumAtLeast:
			fig["copeptinStimulated"] = m.Value
			lean := fmt.Sprintf("%g pmol/L or less, which points to central DI", cp.PrimaryPolydipsiaAbove)
			if m.Value > cp.PrimaryPolydipsiaAbove {
				lean = fmt.Sprintf("above %g pmol/L, which points to primary polydipsia", cp.PrimaryPolydipsiaAbove)
			}
			fmt.Fprintf(b, "- Copeptin %s pmol/L with sodium %s (%s): %s; the published cut-off was measured after hypertonic saline, not "+
				"deprivation (%s)\n", show(Copeptin, m.Value), show(Sodium, na.Value), stamp(m.At), lean, cp.StimulatedSource)
		default:
			fmt.Fprintf(b, "- Copeptin %s pmol/L (%s): taken during deprivation without a sodium of %g or more within an hour, "+
				"so no published cut-off applies\n", show(Copeptin, m.Value), stamp(m.At), cp.StimulatedSodiumAtLeast)
		}
	}
}
