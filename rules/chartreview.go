package rules

import (
	"cmp"
	"fmt"
	"math"
	"slices"
	"strings"
	"time"
)

// Rule ids of the chart review.
const (
	RuleOvercorrected       = "hyponatremia-overcorrected"
	RuleNearingLimit        = "hyponatremia-nearing-limit"
	RuleHyperTooFast        = "hypernatremia-corrected-too-fast"
	RuleProfoundOrFalling   = "sodium-profound-or-falling"
	RuleNotHypotonic        = "hyponatremia-not-hypotonic"
	RuleSIADHPattern        = "siadh-lab-pattern"
	RuleUrineStudiesMissing = "hyponatremia-urine-studies-missing"
	RuleDiluteUrine         = "hyponatremia-dilute-urine"
	RuleConcentratingDefect = "concentrating-defect-pattern"
)

// chart is what the chart review computes once per call.
type chart struct {
	f       Facts
	latest  *Measurement
	trend   SodiumTrend
	risk    []RiskFactor
	limits  InfusionAssessment // Limit24h/48h and achieved, by the infusion check's rules
	context TonicityContext
	urineNa *Measurement
	urineK  *Measurement
	urineOs *Measurement
	serumOs *Measurement
}

// chartFindings tells a clinician opening the chart what the sodium numbers
// mean, only when there is something to act on; one finding per rule,
// ordered most urgent first.
func (r *Ruleset) chartFindings(f Facts) []Finding {
	p := r.policy
	cp := p.ChartReview
	l, ok := latestWithin(f.Labs[Sodium], f.At, cp.SodiumMaxAgeHours)
	if !ok {
		return nil
	}
	c := r.newChart(f, l)
	var out []Finding
	testRead := false
	for _, judge := range []func(chart) (Finding, bool){r.desmopressinAfterNeurosurgery, r.overcorrection, r.hyperTooFast, r.profoundOrFalling,
		r.notHypotonic, r.siadhPattern, r.waterDeprivationTest, r.concentratingDefect} {
		fd, ok := judge(c)
		// A water deprivation test read supersedes the concentrating-defect
		// pattern its own results would show (a urine osmolality from the
		// test); a later one is a new finding.
		testRead = testRead || (ok && fd.Rule == RuleWaterDeprivationTest)
		if ok && fd.Rule == RuleConcentratingDefect && testRead && r.fromTheTest(c) {
			continue
		}
		if ok {
			rule := r.cardRule(fd.Rule)
			fd.Indicator = rule.Indicator
			if fd.Figures == nil {
				fd.Figures = map[string]float64{}
			}
			c.addFigures(fd.Figures)
			if recheckNatural(fd.Rule) {
				fd.Advice = []Advice{recheckAdvice(rule.RecheckHours)}
			}
			out = append(out, fd)
		}
	}
	sortByIndicator(out)
	return out
}

// newChart computes what the chart review and the restriction check read
// once per call, around the latest sodium l.
func (r *Ruleset) newChart(f Facts, l Measurement) chart {
	p := r.policy
	cp := p.ChartReview
	c := chart{f: f, latest: &l, trend: AnalyseSodium(f.Labs[Sodium], f.At), risk: DemyelinationRisk(p.DemyelinationRisk, f, f.At)}
	// A sodium that was below the hyponatremia threshold in the last 48 h is
	// the correction of a hyponatremia, even if it has overshot above 145.
	correcting := c.trend.Window48h != nil && c.trend.Window48h.Nadir.Value < cp.HyponatremiaBelow
	c.limits = InfusionAssessment{Trend: c.trend, Risk: c.risk, Latest: &l,
		Hypernatremia: l.Value > p.Projection.HypernatremiaAbove && !correcting}
	c.limits.setLimits(p.Limits)
	c.context = Tonicity(f, l, cp.LabPairHours)
	c.serumOs = nearest(f.Labs[SerumOsmolality], l, cp.LabPairHours, f)
	c.urineOs = nearest(f.Labs[UrineOsmolality], l, cp.LabPairHours, f)
	c.urineNa = nearest(f.Labs[UrineSodium], l, cp.LabPairHours, f)
	c.urineK = nearest(f.Labs[UrinePotassium], l, cp.LabPairHours, f)
	return c
}

// recheckNatural reports the chart rules whose natural suggestion is a
// sodium re-check (a dilute urine with a high or rising sodium among them:
// the sodium can climb while the cause is sought); the patterns of a low
// sodium suggest completing the work-up instead, or nothing.
func recheckNatural(rule string) bool {
	switch rule {
	case RuleOvercorrected, RuleNearingLimit, RuleHyperTooFast, RuleProfoundOrFalling, RuleDiluteUrine, RuleDesmopressinAfterNeurosurgery,
		RuleConcentratingDefect:
		return true
	}
	return false
}

// sortByIndicator orders findings most urgent first, keeping rule order
// within an indicator.
func sortByIndicator(fs []Finding) {
	slices.SortStableFunc(fs, func(a, b Finding) int { return cmp.Compare(b.Indicator, a.Indicator) })
}

// addFigures adds the chart's shared figures.
func (c chart) addFigures(fig map[string]float64) {
	fig["sodiumLatest"] = c.latest.Value
	if w := c.trend.Window24h; w != nil {
		fig["riseFromNadir24h"], fig["fallFromPeak24h"] = Round(w.RiseFromNadir, 1), Round(w.FallFromPeak, 1)
	}
	if w := c.trend.Window48h; w != nil {
		fig["riseFromNadir48h"], fig["fallFromPeak48h"] = Round(w.RiseFromNadir, 1), Round(w.FallFromPeak, 1)
	}
	fig["limit24h"] = c.limits.Limit24h
	if c.limits.Limit48h > 0 {
		fig["limit48h"] = c.limits.Limit48h
	}
	fig["odsHighRisk"] = 0
	if len(c.risk) > 0 {
		fig["odsHighRisk"] = 1
	}
	set := func(name string, v *float64, decimals int) {
		if v != nil {
			fig[name] = Round(*v, decimals)
		}
	}
	set("correctedSodiumKatz", c.context.CorrectedKatz, 1)
	set("correctedSodiumHillier", c.context.CorrectedHillier, 1)
	set("effectiveOsmolality", c.context.EffectiveOsmolality, 0)
	set("calculatedOsmolality", c.context.CalculatedOsmolality, 0)
	set("osmolalGap", c.context.OsmolalGap, 0)
}

// commonLines writes the lines every chart card carries: the sodium series used
// and the limits.
func (r *Ruleset) commonLines(b *strings.Builder, c chart) {
	fmt.Fprintf(b, "- Latest sodium: %s mmol/L (%s%s, %s)\n", show(Sodium, c.latest.Value), measuredBy(*c.latest), stamp(c.latest.At), c.latest.Source)
	b.WriteString(sameTimeLine(*c.latest))
	if w := c.trend.Window48h; w != nil {
		var vals []string
		for _, m := range w.Used {
			vals = append(vals, fmt.Sprintf("%s (%s)", show(Sodium, m.Value), stamp(m.At)))
		}
		fmt.Fprintf(b, "- Sodium in the last 48 h: %s\n", strings.Join(vals, ", "))
	}
	for _, rf := range c.risk {
		fmt.Fprintf(b, "- Demyelination risk factor: %s (%s)\n", rf.Factor, rf.Evidence)
	}
}

func (r *Ruleset) overcorrection(c chart) (Finding, bool) {
	cp, l := r.policy.ChartReview, r.policy.Limits
	a := c.limits
	if a.Hypernatremia {
		return Finding{}, false
	}
	w24, w48 := c.trend.Window24h, c.trend.Window48h
	if w48 == nil || w48.Nadir.Value >= cp.HyponatremiaBelow {
		return Finding{}, false // not the correction of a hyponatremia
	}
	limitSource := l.HyponatremiaRise24h.Source
	if len(c.risk) > 0 {
		limitSource = l.HyponatremiaRise24hHighRisk.Source
	}
	var b strings.Builder
	b.WriteString("**Figures**\n\n")
	r.commonLines(&b, c)
	fmt.Fprintf(&b, "- Rise from the nadir: %s mmol/L in 24 h, %s in 48 h (rolling windows ending now)\n", naChange.of(a.Achieved24h),
		naChange.of(a.Achieved48h))
	fmt.Fprintf(&b, "- Limits: %g mmol/L per 24 h (%s), %g per 48 h (%s)\n", a.Limit24h, limitSource, a.Limit48h, l.HyponatremiaRise48h.Source)
	fd := Finding{Figures: map[string]float64{}}
	switch {
	case a.Achieved24h > a.Limit24h || a.Achieved48h > a.Limit48h:
		fd.Rule = RuleOvercorrected
		switch {
		case a.Achieved48h > a.Limit48h && a.Achieved24h > a.Limit24h:
			fd.Summary = fmt.Sprintf("Sodium rose %s mmol/L in 24 h and %s in 48 h, above the %g and %g mmol/L limits",
				naChange.of(a.Achieved24h), naChange.of(a.Achieved48h), a.Limit24h, a.Limit48h)
		case a.Achieved48h > a.Limit48h:
			fd.Summary = fmt.Sprintf("Sodium rose %s mmol/L in 48 h, above the %g mmol/L limit", naChange.of(a.Achieved48h), a.Limit48h)
		default:
			fd.Summary = fmt.Sprintf("Sodium rose %s mmol/L in 24 h, above the %g mmol/L limit", naChange.of(a.Achieved24h), a.Limit24h)
		}
		b.WriteString("\nGuidelines describe re-lowering sodium after an overcorrection in patients at risk (Verbalis 2013; " +
			"Spasovski 2014; from memory); whether and how is the treating team's decision under local protocol.")
	case a.Limit48h > 0 && w24 != nil:
		// The tighter of the 24-h and 48-h allowances, and when its window,
		// counted from its nadir, closes.
		allowed, limit, nadir, hours := a.Limit24h-a.Achieved24h, a.Limit24h, w24.Nadir, 24.0
		if a48 := a.Limit48h - a.Achieved48h; a48 < allowed {
			allowed, limit, nadir, hours = a48, a.Limit48h, w48.Nadir, 48
		}
		closes := nadir.At.Add(time.Duration(hours) * time.Hour)
		if allowed > cp.NearLimitWithin || !closes.After(c.f.At) {
			return Finding{}, false
		}
		left := closes.Sub(c.f.At).Hours()
		allowed = math.Max(0, allowed)
		fd.Rule = RuleNearingLimit
		fd.Summary = fmt.Sprintf("Sodium rose %s mmol/L since the nadir; %s more allowed in the next %s h (%g-h limit %g)",
			naChange.of(a.Latest.Value-nadir.Value), naChange.of(allowed), hoursSince.of(left), hours, limit)
		fd.Figures["hoursLeftInWindow"], fd.Figures["riseStillAllowed"] = Round(left, 1), Round(allowed, 1)
		fmt.Fprintf(&b, "- The %g-h window from the nadir (%s) closes in %s h; %s mmol/L more is allowed until then\n",
			hours, stamp(nadir.At), hoursSpan.of(left), naChange.of(allowed))
	default:
		return Finding{}, false
	}
	fd.Detail = b.String() + "\n\n**Method**: rise = latest − lowest sodium in rolling 24-h and 48-h windows ending now (the value at a window's start interpolated from the results either side)."
	return fd, true
}

func (r *Ruleset) hyperTooFast(c chart) (Finding, bool) {
	cp, l, pr := r.policy.ChartReview, r.policy.Limits, r.policy.Projection
	w := c.trend.Window24h
	if w == nil || w.Peak.Value <= pr.HypernatremiaAbove {
		return Finding{}, false
	}
	hours := c.latest.At.Sub(w.Peak.At).Hours()
	perHour := 0.0
	if hours > 0 {
		perHour = w.FallFromPeak / hours
	}
	fast24 := w.FallFromPeak > l.HypernatremiaFall24h.Value
	fastHourly := hours >= cp.HourlyFallMinHours && perHour > l.HypernatremiaFallPerHour.Value
	if !fast24 && !fastHourly {
		return Finding{}, false
	}
	var b strings.Builder
	b.WriteString("**Figures**\n\n")
	r.commonLines(&b, c)
	fmt.Fprintf(&b, "- Fall from the peak of %s (%s): %s mmol/L over %s h, %s mmol/L per hour\n", show(Sodium, w.Peak.Value), stamp(w.Peak.At),
		naChange.of(w.FallFromPeak), hoursSpan.of(hours), naPerHour.of(perHour))
	fmt.Fprintf(&b, "- Limits: %g mmol/L per 24 h and %g per hour (%s); the hourly rate is judged over at least %g h\n",
		l.HypernatremiaFall24h.Value, l.HypernatremiaFallPerHour.Value, l.HypernatremiaFall24h.Source, cp.HourlyFallMinHours)
	summary := fmt.Sprintf("Sodium fell %s mmol/L in %s h from %s, faster than the limits", naChange.of(w.FallFromPeak), hoursSince.of(hours),
		show(Sodium, w.Peak.Value))
	return Finding{Rule: RuleHyperTooFast, Summary: summary, Detail: b.String(),
		Figures: map[string]float64{"fallPerHour": Round(perHour, 2), "fallFromPeak24h": Round(w.FallFromPeak, 1), "sodiumLatest": c.latest.Value}}, true
}

func (r *Ruleset) profoundOrFalling(c chart) (Finding, bool) {
	cp := r.policy.ChartReview
	na := c.latest.Value
	fall := 0.0
	if w := c.trend.Window48h; w != nil {
		fall = w.FallFromPeak
	}
	// A fall counts only into hyponatremia: a hypernatremia being brought
	// down is judged by its own limits (hyperTooFast).
	falling := fall >= cp.FallIn48hAtLeast && na < cp.HyponatremiaBelow
	if na >= cp.ProfoundBelow && !falling {
		return Finding{}, false
	}
	var b strings.Builder
	b.WriteString("**Figures**\n\n")
	r.commonLines(&b, c)
	summary := fmt.Sprintf("Sodium %s mmol/L, below %g", show(Sodium, na), cp.ProfoundBelow)
	if falling {
		summary = fmt.Sprintf("Sodium fell %s mmol/L in 48 h to %s", naChange.of(fall), show(Sodium, na))
	}
	drugs := r.activeDrugs(c.f, EffectHyponatremia)
	if len(drugs) > 0 {
		summary += "; on " + strings.Join(drugs, ", ")
		fmt.Fprintf(&b, "- Active hyponatremia-risk drugs (halite knowledge base): %s\n", strings.Join(drugs, ", "))
	} else {
		b.WriteString("- No active hyponatremia-risk drug found in the medication list\n")
	}
	fmt.Fprintf(&b, "- Flagged below %g mmol/L or after a fall of %g mmol/L in 48 h (%s)\n", cp.ProfoundBelow, cp.FallIn48hAtLeast, cp.Source)
	fig := map[string]float64{"sodiumLatest": na, "fallFromPeak48h": Round(fall, 1), "sodiumFalling48h": 0}
	if falling {
		fig["sodiumFalling48h"] = 1
	}
	return Finding{Rule: RuleProfoundOrFalling, Summary: shorten(summary, 139), Detail: b.String(), Figures: fig}, true
}

// activeDrugs names the active medications with effect e, from the
// knowledge base.
func (r *Ruleset) activeDrugs(f Facts, effect string) []string {
	var out []string
	seen := map[string]bool{}
	for _, o := range f.Medications {
		if o.Status != "active" {
			continue
		}
		for _, m := range r.MatchDrug(o.Medication) {
			if _, ok := m.Ingredient.Effect(effect); ok && !m.Ingredient.IntendedToRaiseSodium && !seen[m.Ingredient.Name] {
				seen[m.Ingredient.Name] = true
				out = append(out, m.Ingredient.Name)
			}
		}
	}
	return out
}

func (r *Ruleset) notHypotonic(c chart) (Finding, bool) {
	cp := r.policy.ChartReview
	t := c.context
	if c.latest.Value >= cp.HyponatremiaBelow || t.EffectiveOsmolality == nil || t.CalculatedOsmolality == nil || t.Class == Hypotonic {
		return Finding{}, false
	}
	var b strings.Builder
	b.WriteString("**Figures**\n\n")
	r.commonLines(&b, c)
	r.contextLines(&b, t)
	b.WriteString("\nA hyponatremia that is not hypotonic (hyperglycaemia, or another effective osmole) is not corrected " +
		"like a hypotonic one; a measured serum osmolality confirms it (reference notes §3; Verbalis 2013, from memory).")
	summary := fmt.Sprintf("Sodium %s but effective osmolality %s mOsm/kg: not hypotonic", show(Sodium, c.latest.Value),
		osmolal.of(*t.EffectiveOsmolality))
	if t.CorrectedKatz != nil {
		summary += fmt.Sprintf("; glucose-corrected %s–%s", naChange.of(*t.CorrectedKatz), naChange.of(*t.CorrectedHillier))
	}
	return Finding{Rule: RuleNotHypotonic, Summary: shorten(summary, 139), Detail: b.String()}, true
}

func (r *Ruleset) siadhPattern(c chart) (Finding, bool) {
	cp := r.policy.ChartReview
	t := c.context
	if c.latest.Value >= cp.HyponatremiaBelow || t.EffectiveOsmolality == nil || *t.EffectiveOsmolality >= cp.SIADH.EffectiveOsmolalityBelow {
		return Finding{}, false
	}
	var b strings.Builder
	b.WriteString("**Figures**\n\n")
	r.commonLines(&b, c)
	r.contextLines(&b, t)
	if c.urineOs != nil && c.urineOs.Value < cp.DiluteUrine.UrineOsmolalityBelow {
		return r.diluteUrine(c, &b), true
	}
	if c.urineOs == nil || c.urineNa == nil {
		fmt.Fprintf(&b, "- Urine osmolality and urine sodium within %g h of the sodium: %s\n", cp.LabPairHours,
			missingUrine(c.urineOs, c.urineNa))
		b.WriteString("\nUrine osmolality and sodium separate the causes of a hypotonic hyponatremia (reference notes §4.3).")
		return Finding{Rule: RuleUrineStudiesMissing, Detail: b.String(), Figures: map[string]float64{},
			Summary: fmt.Sprintf("Hypotonic hyponatremia (sodium %s, effective osmolality %s) without urine osmolality and sodium",
				show(Sodium, c.latest.Value), osmolal.of(*t.EffectiveOsmolality)),
			Advice: []Advice{{Kind: AdviseUrineStudies, Label: "Order urine osmolality and urine sodium"}}}, true
	}
	if c.urineOs.Value <= cp.SIADH.UrineOsmolalityAbove || c.urineNa.Value <= cp.SIADH.UrineSodiumAbove {
		return Finding{}, false
	}
	fig := map[string]float64{"urineOsmolality": c.urineOs.Value, "urineSodium": c.urineNa.Value}
	// The volume-status lines come after the ratio, but a brain-injury
	// context whose data lean towards salt wasting withholds the
	// restriction volume the ratio would give.
	var vol strings.Builder
	haematocritRising := r.volumeStatusLines(&vol, c, fig)
	context := r.brainInjuryContext(c.f)
	r.feUrate(&vol, c, fig, len(context) > 0)
	r.endocrineLines(&vol, c, fig)
	var lean volumeLean
	if len(context) > 0 {
		lean = r.brainInjuryLines(&vol, c, fig, context, haematocritRising)
	}
	fmt.Fprintf(&b, "- Urine osmolality %s mOsm/kg (%s), urine sodium %s mmol/L (%s)\n", show(UrineOsmolality, c.urineOs.Value),
		stamp(c.urineOs.At), show(UrineSodium, c.urineNa.Value), stamp(c.urineNa.At))
	fmt.Fprintf(&b, "- Criteria: effective osmolality < %g, urine osmolality > %g, urine sodium > %g (%s)\n",
		cp.SIADH.EffectiveOsmolalityBelow, cp.SIADH.UrineOsmolalityAbove, cp.SIADH.UrineSodiumAbove, cp.SIADH.Source)
	summary := fmt.Sprintf("Labs consistent with the SIADH criteria: effective osmolality %s, urine osmolality %s, urine sodium %s",
		osmolal.of(*t.EffectiveOsmolality), show(UrineOsmolality, c.urineOs.Value), show(UrineSodium, c.urineNa.Value))
	if c.urineK != nil {
		ratio := (c.urineNa.Value + c.urineK.Value) / c.latest.Value
		fig["urinePlasmaElectrolyteRatio"] = Round(ratio, 2)
		band := r.restrictionBand(ratio)
		ratioText := fmt.Sprintf("- Urine-to-plasma electrolyte ratio (%s + %s)/%s = %s", show(UrineSodium, c.urineNa.Value),
			show(UrinePotassium, c.urineK.Value), show(Sodium, c.latest.Value), ratioOrBSA.of(ratio))
		child, _ := r.isChild(c.f)
		why, _ := r.restrictionWithheld(c)
		switch after := r.noRestrictionAfter(c.f); {
		case why != "":
		case after != "":
			why = "after " + after + " fluid restriction is advised against whatever the labs show (" + r.policy.BrainInjury.NoRestrictionSource + ")"
		case lean.saltWasting():
			why = "in a brain-injury context the data lean towards salt wasting, where restricting fluid can deepen the volume depletion (" +
				r.policy.BrainInjury.RestrictionCautionSrc + ")"
		case haematocritRising:
			why = "the haematocrit is rising, a sign of volume depletion, where restricting fluid can deepen it (" +
				r.policy.BrainInjury.RestrictionCautionSrc + ")"
		}
		switch {
		case why != "":
			fmt.Fprintf(&b, "%s (%s); no restriction volume is given: %s\n", ratioText, cp.Restriction.Scheme, why)
		case child:
			fmt.Fprintf(&b, "%s (%s)\n", ratioText, cp.Restriction.Scheme)
			r.paediatricBand(&b, c, fig)
		default:
			fmt.Fprintf(&b, "%s: %s (%s)\n", ratioText, band.Text, cp.Restriction.Scheme)
			r.paediatricBand(&b, c, fig)
		}
	} else {
		b.WriteString("- Urine potassium not available: the urine-to-plasma electrolyte ratio was not computed\n")
	}
	b.WriteString(vol.String())
	if lean.saltWasting() {
		summary = fmt.Sprintf("SIADH-like labs after brain injury (sodium %s, urine sodium %s), but the data lean towards salt wasting",
			show(Sodium, c.latest.Value), show(UrineSodium, c.urineNa.Value))
	}
	b.WriteString("\n**Labs cannot show**: volume status (clinical euvolaemia is a criterion), whether the thyroid and adrenal " +
		"results are normal for this patient, recent diuretic use, and the differential with renal or cerebral salt wasting; these must be assessed clinically " +
		"before the pattern is called SIADH.")
	if drugs := r.activeDrugs(c.f, EffectHyponatremia); len(drugs) > 0 {
		fmt.Fprintf(&b, " Active drugs that can cause it: %s.", strings.Join(drugs, ", "))
	}
	return Finding{Rule: RuleSIADHPattern, Summary: shorten(summary, 139), Detail: b.String(), Figures: fig}, true
}

// volumeStatusLines writes the uric acid and haematocrit results near the
// sodium that bear on SIADH against salt wasting, and what they lean to.
// It reports whether the haematocrit rose by the policy amount.
func (r *Ruleset) volumeStatusLines(b *strings.Builder, c chart, fig map[string]float64) bool {
	cp := r.policy.ChartReview
	vs := cp.VolumeStatus
	if u := nearest(c.f.Labs[Urate], *c.latest, cp.LabPairHours, c.f); u != nil {
		fig["urate"] = Round(u.Value, 1)
		lean := "not below"
		if u.Value < vs.UrateBelow {
			lean = "below"
		}
		also := ""
		if u.Value < vs.UrateBelow && len(r.brainInjuryContext(c.f)) > 0 {
			also = "; a low uric acid is seen in salt wasting too"
		}
		fmt.Fprintf(b, "- Uric acid %s umol/L (%s%s, %s): %s %g umol/L, a supplemental SIADH criterion (%s)%s\n", show(Urate, u.Value),
			measuredBy(*u), stamp(u.At), u.Source, lean, vs.UrateBelow, vs.UrateSource, also)
	} else {
		fmt.Fprintf(b, "- Uric acid: no result within %g h of the sodium\n", cp.LabPairHours)
	}
	hcts := c.f.Labs[Haematocrit]
	latest, ok := latestWithin(hcts, c.f.At, cp.LabPairHours*2)
	if !ok {
		fmt.Fprintf(b, "- Haematocrit: no result within %g h\n", cp.LabPairHours*2)
		return false
	}
	fig["haematocrit"] = latest.Value
	line := fmt.Sprintf("- Haematocrit %s%% (%s%s, %s)", show(Haematocrit, latest.Value), measuredBy(latest), stamp(latest.At), latest.Source)
	var lowest *Measurement
	for i, h := range hcts {
		if h.At.Before(latest.At) && latest.At.Sub(h.At).Hours() <= 48 && (lowest == nil || h.Value < lowest.Value) {
			lowest = &hcts[i]
		}
	}
	if lowest != nil {
		rise := latest.Value - lowest.Value
		fig["haematocritRise48h"] = Round(rise, 1)
		line += fmt.Sprintf(", from %s%% (%s)", show(Haematocrit, lowest.Value), stamp(lowest.At))
		if rise >= vs.HaematocritRiseAtLeast {
			line += fmt.Sprintf(": a rise of %s points, which leans towards volume depletion (salt wasting) rather than SIADH (%s)",
				show(Haematocrit, rise), vs.HaematocritSource)
			b.WriteString(line + "\n")
			return true
		}
	}
	b.WriteString(line + "\n")
	return false
}

// diluteUrine is the finding for a hypotonic hyponatremia whose urine is
// diluted as far as it goes; b holds the common figure lines.
func (r *Ruleset) diluteUrine(c chart, b *strings.Builder) Finding {
	cp := r.policy.ChartReview
	t := c.context
	fmt.Fprintf(b, "- Urine osmolality %s mOsm/kg (%s%s, %s), below %g mOsm/kg\n", show(UrineOsmolality, c.urineOs.Value),
		measuredBy(*c.urineOs), stamp(c.urineOs.At), c.urineOs.Source, cp.DiluteUrine.UrineOsmolalityBelow)
	fmt.Fprintf(b, "- Reading: urine this dilute means vasopressin is suppressed, as it should be in hypotonicity; the sodium is low "+
		"because water is taken in faster than the kidneys can excrete it (%s)\n", cp.DiluteUrine.Source)
	fmt.Fprintf(b, "- Once the intake falls, urine this dilute can raise sodium quickly: the correction limits apply "+
		"(%g mmol/L in 24 h; %s)\n", r.policy.Limits.HyponatremiaRise24h.Value, r.policy.Limits.HyponatremiaRise24h.Source)
	b.WriteString("\n**Labs cannot show**: the intake behind it — primary polydipsia, or a low solute intake (little protein and " +
		"salt, much beer or tea) that limits how much water can be excreted — nor whether the urine was collected after a large " +
		"drink or a diuretic. The intake history and the clinical assessment decide; the treating team judges what applies.")
	summary := fmt.Sprintf("Hypotonic hyponatremia (sodium %s) with maximally dilute urine (osmolality %s): water intake beyond excretion",
		show(Sodium, c.latest.Value), show(UrineOsmolality, c.urineOs.Value))
	return Finding{Rule: RuleDiluteUrine, Summary: shorten(summary, 139), Detail: b.String(),
		Figures: map[string]float64{"urineOsmolality": c.urineOs.Value, "effectiveOsmolality": Round(*t.EffectiveOsmolality, 1)}}
}

func missingUrine(osm, na *Measurement) string {
	switch {
	case osm == nil && na == nil:
		return "neither found"
	case osm == nil:
		return "no urine osmolality"
	}
	return "no urine sodium"
}

// restrictionWithheld says why no fluid-restriction volume may be given
// (chartReview.restriction.withheldSource), in full and in a few words for
// a summary, or "" when one may: sodium already risen at or beyond the
// limit, a vasopressin-receptor antagonist active or drafted, or a
// urea-to-creatinine ratio that leans hypovolaemic.
func (r *Ruleset) restrictionWithheld(c chart) (why, short string) {
	rs := r.policy.ChartReview.Restriction
	l := c.limits
	switch {
	case l.Hypernatremia: // its achieved change is a fall: no rise limit applies
	case l.Achieved24h >= l.Limit24h:
		return fmt.Sprintf("sodium has already risen %s mmol/L in 24 h, at or beyond the limit of %g", naChange.of(l.Achieved24h), l.Limit24h),
			"sodium already at its 24-h rise limit"
	case l.Limit48h > 0 && l.Achieved48h >= l.Limit48h:
		return fmt.Sprintf("sodium has already risen %s mmol/L in 48 h, at or beyond the limit of %g", naChange.of(l.Achieved48h), l.Limit48h),
			"sodium already at its 48-h rise limit"
	}
	for _, o := range append(append([]MedicationOrder(nil), c.f.Medications...), c.f.DraftOrders...) {
		if d, _, ok := r.policy.WaterDrugs.match(o.Medication); ok && d.RaisesSodium {
			return fmt.Sprintf("%s is active or ordered (%s), and fluid restriction early in its treatment can make sodium rise too fast (%s)",
				d.Name, o.Reference, rs.WithheldSource), d.Name + " active or ordered"
		}
	}
	urea := nearest(c.f.Labs[Urea], *c.latest, r.policy.ChartReview.LabPairHours, c.f)
	creat := nearest(c.f.Labs[Creatinine], *c.latest, r.policy.ChartReview.LabPairHours, c.f)
	if urea != nil && creat != nil && creat.Value > 0 {
		if ratio := BUNCreatinineRatio(urea.Value, creat.Value); ratio > rs.HypovolaemiaBUNCreatinineAbove {
			return fmt.Sprintf("the blood urea nitrogen to creatinine ratio is %s (above %g), which leans hypovolaemic",
				ratioOrBSA.of(ratio), rs.HypovolaemiaBUNCreatinineAbove), "urea-to-creatinine ratio leans hypovolaemic"
		}
	}
	return "", ""
}

func (r *Ruleset) restrictionBand(ratio float64) RestrictionBand {
	bands := r.policy.ChartReview.Restriction.Bands
	for _, b := range bands {
		if ratio < b.RatioBelow {
			return b
		}
	}
	return bands[len(bands)-1]
}

// isChild reports whether the patient is known to be under the adult age;
// ok is false without a birth date.
func (r *Ruleset) isChild(f Facts) (child, ok bool) {
	age, ok := f.Patient.AgeYears(f.At)
	return ok && age < r.policy.TBW.AdultFromAge, ok
}

// paediatricBand says how a child's restriction is set instead of the adult
// band — from insensible losses per body-surface area plus urine output, so
// never below insensible losses — or which measurement is missing; without
// a birth date it says the band shown is an adult's, rather than assume an
// adult.
func (r *Ruleset) paediatricBand(b *strings.Builder, c chart, fig map[string]float64) {
	p := r.policy
	rs := p.ChartReview.Restriction
	child, ok := r.isChild(c.f)
	switch {
	case !ok:
		b.WriteString("- Age not recorded (no birth date): the band above is for an adult; a child's restriction is set " +
			"from insensible losses plus urine output instead\n")
		return
	case !child:
		return
	}
	w, okW := latestWithin(c.f.Labs[BodyWeight], c.f.At, p.Projection.WeightMaxAgeHours)
	h, okH := latestWithin(c.f.Labs[BodyHeight], c.f.At, p.ChartReview.HeightMaxAgeHours)
	if !okW || !okH {
		fmt.Fprintf(b, "- Child: a restriction is set from insensible losses (about %g mL/m²/day) plus urine output; the "+
			"body-surface area needs a weight from the last %s days and a height from the last %s days; missing: %s\n",
			rs.PaediatricInsensibleMlPerM2, orderHours.of(p.Projection.WeightMaxAgeHours/24),
			orderHours.of(p.ChartReview.HeightMaxAgeHours/24), missingSize(okW, okH))
		return
	}
	bsa, err := MostellerBSA(h.Value, w.Value)
	if err != nil {
		fmt.Fprintf(b, "- Child: body-surface area not computed: %v\n", err)
		return
	}
	fig["bsaM2"] = Round(bsa, 2)
	fmt.Fprintf(b, "- Child: body-surface area %s m² (Mosteller; %s cm, %s kg). A child's restriction is set from insensible losses, "+
		"about %g mL/m²/day (%s mL/day for this child), plus the measured urine output, never below the insensible losses; the adult "+
		"bands are not scaled down (%s)\n", ratioOrBSA.of(bsa), show(BodyHeight, h.Value), show(BodyWeight, w.Value),
		rs.PaediatricInsensibleMlPerM2, mlPerDay.of(rs.PaediatricInsensibleMlPerM2*bsa), rs.PaediatricSource)
}

func missingSize(haveWeight, haveHeight bool) string {
	switch {
	case !haveWeight && !haveHeight:
		return "weight and height"
	case !haveWeight:
		return "weight"
	}
	return "height"
}
