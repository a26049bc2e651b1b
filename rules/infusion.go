package rules

import (
	"fmt"
	"math"
	"strconv"
	"strings"
	"time"
)

// Rule ids of the infusion check.
const (
	RuleLimitExceeded = "sodium-limit-exceeded"
	// RuleHypertonicNotHypotonic: hypertonic saline for a sodium that is
	// not a hypotonic hyponatremia (cards.notHypotonic).
	RuleHypertonicNotHypotonic = "hypertonic-saline-not-hypotonic"
	// RuleHypertonicWithVaptan: hypertonic saline beside a vasopressin-
	// receptor antagonist (waterDrugs.combinationSource).
	RuleHypertonicWithVaptan = "hypertonic-saline-with-vaptan"
	// RuleRelowering: after a rise beyond the limit, an order that lowers
	// sodium back (cards.relowering).
	RuleRelowering = "sodium-relowering-order"
	// RuleAquaresis: a brisk dilute urine during the correction of
	// hyponatremia (urineLosses).
	RuleAquaresis = "sodium-aquaresis-watch"
	// RuleDesalination: a non-hypertonic saline whose Na + K is below the
	// urine's, in hyponatremia (urineLosses.desalinationSource).
	RuleDesalination    = "saline-desalination"
	RuleProjectedOver   = "sodium-projected-over-limit"
	RuleNoProjection    = "hypertonic-projection-unavailable"
	RuleHypertonicOrder = "hypertonic-saline-projection"
	RuleWaterDrug       = "water-balance-drug-caution"
)

// infusionFindings judges each selected draft order whose sodium content is
// known. Which rule answers is decided here, in this order; the indicator
// and re-check interval of each rule are policy data (cards.rules):
//   - sodium-limit-exceeded: the measured change already exceeds the 24-h
//     or 48-h limit and the order, or the fluids counted together, move
//     sodium further the same way;
//   - sodium-relowering-order: after a rise beyond the limit, an order that
//     lowers sodium while everything counted lowers it too: the target and
//     the projected fall (a warning only when the projection passes the
//     target by more than the policy allows);
//   - hypertonic-saline-not-hypotonic: a hypertonic order while the
//     effective osmolality or the glucose-corrected sodium says the sodium
//     is not a hypotonic hyponatremia (tonicity first);
//   - hypertonic-saline-with-vaptan: a hypertonic order beside an active,
//     drafted or running vasopressin-receptor antagonist;
//   - sodium-projected-over-limit: the projected change of everything
//     counted exceeds what the tightest limit still allows (its high-risk
//     indicator applies at high demyelination risk in hyponatremia); for an
//     order that pulls the other way it says the other fluids are over;
//   - sodium-aquaresis-watch: a brisk dilute urine during the correction of
//     hyponatremia;
//   - saline-desalination: a non-hypertonic saline below the urine's Na + K
//     in hyponatremia;
//   - hypertonic-projection-unavailable: a hypertonic order that cannot be
//     projected because an input is missing;
//   - hypertonic-saline-projection: any other hypertonic order;
//   - nothing otherwise.
//
// Every sodium-moving order of the next 24 h is judged together, in one
// card: the selected draft that moves sodium furthest the way the limits
// restrict is assessed with the call's other drafts and the running
// infusions counted beside it (AssessInfusion), and the card names them all.
func (r *Ruleset) infusionFindings(f Facts) []Finding {
	var lead *InfusionAssessment
	pool := r.candidates(f)
	for _, c := range pool {
		o := c.Order
		if c.Running || !o.Selected || c.Composition == nil {
			continue
		}
		a := r.assess(f, o, pool)
		if a.Composition == nil {
			continue
		}
		if lead == nil || a.leads(*lead) {
			lead = &a
		}
	}
	if lead == nil {
		return nil
	}
	if fd, ok := r.judge(*lead); ok {
		return []Finding{fd}
	}
	return nil
}

// reloweringTarget is, after a rise beyond the 24-h or 48-h limit in
// hyponatremia, the sodium that brings the rise back within it: the nadir
// plus the limit, the lower where both are passed. ok is false otherwise.
func (a InfusionAssessment) reloweringTarget() (float64, bool) {
	if a.Hypernatremia || a.Latest == nil {
		return 0, false
	}
	target := math.Inf(1)
	if w := a.Trend.Window24h; w != nil && a.Achieved24h > a.Limit24h {
		target = w.Nadir.Value + a.Limit24h
	}
	if w := a.Trend.Window48h; w != nil && a.Limit48h > 0 && a.Achieved48h > a.Limit48h {
		target = math.Min(target, w.Nadir.Value+a.Limit48h)
	}
	return target, !math.IsInf(target, 1)
}

// movesRestrictedWay reports whether this order's infusate moves sodium
// the way the limits restrict (up in hyponatremia, down in hypernatremia).
func (a InfusionAssessment) movesRestrictedWay() bool {
	if a.DeltaPerLitre == nil {
		return false
	}
	if a.Hypernatremia {
		return *a.DeltaPerLitre < 0
	}
	return *a.DeltaPerLitre > 0
}

// leads reports whether a's order moves sodium further than b's the way the
// limits restrict (a rise in hyponatremia, a fall in hypernatremia); an
// order with a projection leads one without.
func (a InfusionAssessment) leads(b InfusionAssessment) bool {
	if a.OrderChange24h == nil || b.OrderChange24h == nil {
		return a.OrderChange24h != nil && b.OrderChange24h == nil
	}
	sign := 1.0
	if a.Hypernatremia {
		sign = -1
	}
	return sign**a.OrderChange24h > sign**b.OrderChange24h
}

func (r *Ruleset) judge(a InfusionAssessment) (Finding, bool) {
	hypertonic := a.Composition.NaK() >= r.policy.Cards.HypertonicNaKAtLeast
	word, sign := "rise", 1.0
	if a.Hypernatremia {
		word, sign = "fall", -1
	}
	fd := Finding{Figures: a.figures(), Order: a.Order.Reference, Draft: DraftKey(a.Order), Product: ProductKey(a.Order.Medication),
		Attributes: a.contributorAttributes()}
	exceeded := a.Achieved24h > a.Limit24h || (a.Limit48h > 0 && a.Achieved48h > a.Limit48h)
	sameWay := a.movesRestrictedWay()
	// The fluids counted together may keep moving sodium the restricted way
	// even when this order pulls the other way.
	combinedSameWay := a.ProjectedChange24h != nil && sign**a.ProjectedChange24h > 0
	counteracting := a.DeltaPerLitre != nil && !sameWay
	target, relowering := a.reloweringTarget()
	hyponatremic := a.Latest != nil && !a.Hypernatremia && a.Latest.Value < r.policy.ChartReview.HyponatremiaBelow
	urineNaK, _ := a.Urine.NaK()
	switch {
	case a.Latest != nil && exceeded && !sameWay && combinedSameWay:
		fd.Rule = RuleLimitExceeded
		fd.Summary = fmt.Sprintf("Sodium already %s beyond the limit; the fluids counted keep it going (%s mmol/L in 24 h with %s)",
			pastTense(word), naChange.signed(*a.ProjectedChange24h), a.fromWhat())
	case a.Latest != nil && exceeded && sameWay:
		fd.Rule = RuleLimitExceeded
		if a.Achieved24h > a.Limit24h {
			fd.Summary = fmt.Sprintf("Sodium already %s %s mmol/L in 24 h (limit %g); this order moves it further",
				pastTense(word), naChange.of(a.Achieved24h), a.Limit24h)
		} else {
			fd.Summary = fmt.Sprintf("Sodium already rose %s mmol/L in 48 h (limit %g); this order raises it further",
				naChange.of(a.Achieved48h), a.Limit48h)
		}
	case relowering && a.DeltaPerLitre != nil && *a.DeltaPerLitre < 0 && (a.ProjectedChange24h == nil || *a.ProjectedChange24h < 0):
		fd.Rule = RuleRelowering
		fd.Figures["relowerTargetSodium"] = Round(target, 1)
		if a.ProjectedChange24h == nil {
			fd.Summary = fmt.Sprintf("Re-lowering after a rise beyond the limit: target sodium %s mmol/L; fall not projected (missing %s)",
				naChange.of(target), shorten(a.Missing[0], 50))
			break
		}
		projected := a.Latest.Value + *a.ProjectedChange24h
		fd.Figures["relowerProjectedSodium"] = Round(projected, 1)
		fd.Summary = fmt.Sprintf("Re-lowering after a rise beyond the limit: target sodium %s; projected %s mmol/L in 24 h (%s)",
			naChange.of(target), naChange.of(projected), naChange.signed(*a.ProjectedChange24h))
	case hypertonic && !a.Hypernatremia && r.tonicityNotHypotonic(a.Context):
		fd.Rule = RuleHypertonicNotHypotonic
		fd.Summary = notHypotonicSummary(a.Context)
	case hypertonic && !a.Hypernatremia && a.Vaptan != "":
		fd.Rule = RuleHypertonicWithVaptan
		name, _, _ := strings.Cut(a.Vaptan, " (")
		fd.Summary = fmt.Sprintf("Hypertonic saline with %s: sodium can rise faster than projected", name)
		if a.ProjectedTotal24h != nil {
			fd.Summary += fmt.Sprintf(" (%s mmol/L in 24 h without the vaptan)", naChange.of(*a.ProjectedTotal24h))
		}
		fd.Summary = shorten(fd.Summary, 139)
	case a.OverLimit && a.OthersReachLimit && counteracting:
		fd.Rule = RuleProjectedOver
		fd.Summary = fmt.Sprintf("Other fluids alone bring a %s of %s mmol/L in 24 h (%s still allowed); this order offsets %s",
			word, naChange.of(math.Abs(*a.OthersChange24h)), naChange.of(a.Allowed), naChange.of(math.Abs(*a.OrderChange24h)))
	case a.OverLimit && a.OthersReachLimit:
		fd.Rule = RuleProjectedOver
		fd.Summary = fmt.Sprintf("Other fluids alone bring a %s of %s mmol/L in 24 h (%s still allowed); this order adds %s",
			word, naChange.of(math.Abs(*a.OthersChange24h)), naChange.of(a.Allowed), naChange.signed(*a.OrderChange24h))
	case a.OverLimit:
		fd.Rule = RuleProjectedOver
		fd.Summary = r.overSummary(a, word)
	case hyponatremic && a.Urine.Aquaresis(r.policy.UrineLosses):
		fd.Rule = RuleAquaresis
		fd.Summary = fmt.Sprintf("Urine output %s mL/h with urine osmolality %s: an aquaresis can raise sodium fast whatever is infused",
			orderRate.of(*a.Urine.RateMlPerHour), show(UrineOsmolality, a.Urine.Osmolality.Value))
	case hyponatremic && !hypertonic && a.Composition.Na > 0 && urineNaK > a.Composition.NaK():
		fd.Rule = RuleDesalination
		fd.Summary = fmt.Sprintf("This fluid may lower sodium: urine Na + K %s mmol/L exceeds its %s (desalination)",
			infusateNa.of(urineNaK), infusateNa.of(a.Composition.NaK()))
		if a.ProjectedChange24hWithUrine != nil {
			fd.Summary += fmt.Sprintf("; %s mmol/L in 24 h with the urine", naChange.signed(*a.ProjectedChange24hWithUrine))
		}
	case hypertonic && a.ProjectedChange24h == nil:
		fd.Rule = RuleNoProjection
		fd.Summary = "Hypertonic sodium order: sodium change not projected; missing " + shorten(a.Missing[0], 70)
	case hypertonic && !a.Hypernatremia:
		fd.Rule = RuleHypertonicOrder
		fd.Summary = fmt.Sprintf("Hypertonic sodium: projected 24-h rise %s mmol/L (%s measured + %s from %s), limit %g",
			naChange.of(*a.ProjectedTotal24h), naChange.of(a.Achieved24h), naChange.of(*a.ProjectedChange24h), a.fromWhat(), a.Limit24h)
	case hypertonic:
		fd.Rule = RuleHypertonicOrder
		fd.Summary = fmt.Sprintf("Hypertonic sodium with sodium %s mmol/L: projected change %s mmol/L in 24 h",
			show(Sodium, a.Latest.Value), naChange.signed(*a.ProjectedChange24h))
	default:
		return Finding{}, false
	}
	rule := r.cardRule(fd.Rule)
	fd.Indicator = rule.Indicator
	if fd.Rule == RuleRelowering && a.ProjectedChange24h != nil &&
		a.Latest.Value+*a.ProjectedChange24h < target-r.policy.Cards.Relowering.BelowTargetTolerance {
		fd.Indicator = Warning
		fd.Summary = fmt.Sprintf("Re-lowering projected to %s mmol/L, below the target of %s by more than %g: fall %s in 24 h",
			naChange.of(a.Latest.Value+*a.ProjectedChange24h), naChange.of(target), r.policy.Cards.Relowering.BelowTargetTolerance,
			naChange.signed(*a.ProjectedChange24h))
	}
	if fd.Rule == RuleProjectedOver && len(a.Risk) > 0 && !a.Hypernatremia && rule.HighRisk != 0 {
		fd.Indicator = rule.HighRisk
	}
	fd.Advice = infusionAdvice(fd.Rule, a, rule.RecheckHours)
	if fd.Rule == RuleProjectedOver && counteracting {
		// This order is not the problem: no new rate, no removal.
		fd.Advice = []Advice{recheckAdvice(rule.RecheckHours)}
	}
	fd.Detail = r.detail(a, word, rule.RecheckHours)
	switch fd.Rule {
	case RuleAquaresis:
		fd.Detail = fmt.Sprintf("**Aquaresis**: urine output of %s mL/h with urine osmolality %s mOsm/kg during the correction of "+
			"hyponatremia can raise sodium faster than any projection of the infusate; an early re-check is suggested (%s).\n\n",
			orderRate.of(*a.Urine.RateMlPerHour), show(UrineOsmolality, a.Urine.Osmolality.Value), strings.TrimSuffix(r.policy.UrineLosses.Source, ".")) + fd.Detail
	case RuleDesalination:
		size := "The projection with the urine below shows the expected change."
		if a.ProjectedChange24hWithUrine == nil {
			size = "Urine output (or the weight) is not charted, so the size of the change cannot be computed."
		}
		fd.Detail = fmt.Sprintf("**Desalination**: the urine's sodium + potassium (%s mmol/L) exceeds this fluid's (%s), so its water "+
			"can be retained while its sodium is excreted (%s). %s\n\n",
			infusateNa.of(urineNaK), infusateNa.of(a.Composition.NaK()), r.policy.UrineLosses.DesalinationSource, size) + fd.Detail
	case RuleRelowering:
		fd.Detail = fmt.Sprintf("**Re-lowering**: sodium rose beyond the limit; bringing it back to %s mmol/L (the nadir plus the limit) "+
			"is the management the guidelines describe (%s). The card warns only when the projection falls more than %g mmol/L "+
			"below that target.\n\n", naChange.of(target), r.policy.Cards.Relowering.Source, r.policy.Cards.Relowering.BelowTargetTolerance) + fd.Detail
	case RuleHypertonicNotHypotonic:
		fd.Detail = r.notHypotonicLead(a.Context) + fd.Detail
	case RuleHypertonicWithVaptan:
		fd.Detail = fmt.Sprintf("**With a vaptan**: %s is active or ordered. %s The projection below counts the saline only; "+
			"the vaptan's aquaresis adds a rise no formula predicts. The prescriber's assessment decides.\n\n",
			a.Vaptan, r.policy.WaterDrugs.CombinationSource) + fd.Detail
	}
	return fd, true
}

// tonicityNotHypotonic reports whether the tonicity context says the sodium is not
// a hypotonic hyponatremia (cards.notHypotonic).
func (r *Ruleset) tonicityNotHypotonic(c TonicityContext) bool {
	n := r.policy.Cards.NotHypotonic
	return c.EffectiveOsmolality != nil && *c.EffectiveOsmolality >= n.EffectiveOsmolalityAtLeast ||
		c.CorrectedKatz != nil && *c.CorrectedKatz >= n.CorrectedSodiumAtLeast
}

// notHypotonicSummary gives the corrected sodium and the effective
// osmolality first.
func notHypotonicSummary(c TonicityContext) string {
	var parts []string
	if c.CorrectedKatz != nil {
		parts = append(parts, "glucose-corrected sodium "+naChange.of(*c.CorrectedKatz))
	}
	if c.EffectiveOsmolality != nil {
		parts = append(parts, "effective osmolality "+osmolal.of(*c.EffectiveOsmolality)+" mOsm/kg")
	}
	return shorten("Hypertonic saline, but the sodium is not hypotonic: "+strings.Join(parts, ", "), 139)
}

// notHypotonicLead is the first paragraph of a not-hypotonic card.
func (r *Ruleset) notHypotonicLead(c TonicityContext) string {
	n := r.policy.Cards.NotHypotonic
	var b strings.Builder
	b.WriteString("**Not hypotonic**: ")
	if c.CorrectedKatz != nil {
		fmt.Fprintf(&b, "glucose-corrected sodium %s mmol/L (Katz; %s by Hillier), ", naChange.of(*c.CorrectedKatz), naChange.of(*c.CorrectedHillier))
	}
	if c.EffectiveOsmolality != nil {
		fmt.Fprintf(&b, "effective osmolality %s mOsm/kg (%s). ", osmolal.of(*c.EffectiveOsmolality), c.EffectiveBasis)
	}
	fmt.Fprintf(&b, "Hypertonic saline treats hypotonic hyponatremia; at an effective osmolality of %g mOsm/kg or more, or a "+
		"corrected sodium of %g mmol/L or more, the low sodium reflects another osmole (such as glucose), and the cause may "+
		"deserve treatment first. The prescriber's assessment decides.\n\n", n.EffectiveOsmolalityAtLeast, n.CorrectedSodiumAtLeast)
	return b.String()
}

func (r *Ruleset) overSummary(a InfusionAssessment, word string) string {
	l := r.policy.Limits
	switch a.Binding {
	case Bound48h:
		return fmt.Sprintf("Projected sodium rise passes the 48-h limit of %g mmol/L: %s already, %s from %s",
			a.Limit48h, naChange.of(a.Achieved48h), naChange.signed(*a.ProjectedChange24h), a.fromWhat())
	case BoundHourly:
		return fmt.Sprintf("Projected sodium fall %s mmol/L per hour with %s, above the %g mmol/L per hour limit",
			naPerHour.of(math.Abs(*a.ProjectedChange24h)/a.RunHours), a.fromWhat(), l.HypernatremiaFallPerHour.Value)
	}
	return fmt.Sprintf("Projected 24-h sodium %s %s mmol/L (%s measured + %s from %s), above the %g limit",
		word, naChange.of(math.Abs(*a.ProjectedTotal24h)), naChange.of(a.Achieved24h), naChange.of(math.Abs(*a.ProjectedChange24h)), a.fromWhat(), a.Limit24h)
}

// counted are the other orders whose sodium the projection counts.
func (a InfusionAssessment) counted() (drafts, running int) {
	for _, c := range a.Others {
		switch {
		case c.Composition == nil || c.Volume24hLitres == nil:
		case c.Running:
			running++
		default:
			drafts++
		}
	}
	return drafts, running
}

// fromWhat names what the projected change comes from: "this order", or
// "this order and 1 running infusion", "this order, 1 other draft and 2
// running infusions".
func (a InfusionAssessment) fromWhat() string {
	drafts, running := a.counted()
	var parts []string
	if drafts > 0 {
		parts = append(parts, fmt.Sprintf("%d other draft%s", drafts, plural(drafts)))
	}
	if running > 0 {
		parts = append(parts, fmt.Sprintf("%d running infusion%s", running, plural(running)))
	}
	switch len(parts) {
	case 0:
		return "this order"
	case 1:
		return "this order and " + parts[0]
	}
	return "this order, " + parts[0] + " and " + parts[1]
}

func plural(n int) string {
	if n == 1 {
		return ""
	}
	return "s"
}

// infusionAdvice is what a card of rule id suggests: for a projected
// overshoot the order at the rate that fits (rounded down to 0.1 mL/h, so
// it stays inside the limit), a re-check, or removing the draft; for a
// limit already exceeded a re-check or removing the draft; otherwise a
// re-check.
func infusionAdvice(id string, a InfusionAssessment, recheckHours float64) []Advice {
	recheck := recheckAdvice(recheckHours)
	withdraw := Advice{Kind: AdviseWithdraw, Label: "Remove this draft order"}
	switch id {
	case RuleLimitExceeded, RuleHypertonicNotHypotonic, RuleHypertonicWithVaptan, RuleDesalination:
		return []Advice{recheck, withdraw}
	case RuleRelowering:
		return []Advice{recheck}
	case RuleProjectedOver:
		var out []Advice
		if a.MaxRateMlPerHour != nil {
			if rate := math.Floor(*a.MaxRateMlPerHour*10) / 10; rate >= 0.1 {
				out = append(out, Advice{Kind: AdviseRate, RateMlPerHour: rate, RecheckHours: recheckHours, Recommended: true,
					Label: fmt.Sprintf("Change the rate to %s mL/h and re-check sodium in %g h", orderRate.of(rate), recheckHours)})
			}
		}
		return append(out, recheck, withdraw)
	}
	return []Advice{recheck}
}

// recheckAdvice suggests a serum sodium in hours.
func recheckAdvice(hours float64) Advice {
	return Advice{Kind: AdviseRecheck, RecheckHours: hours, Label: fmt.Sprintf("Re-check serum sodium in %g h", hours)}
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

// totalVolume is the 24-h volume of every order counted; nil without this
// order's.
func (a InfusionAssessment) totalVolume() *float64 {
	if a.Volume24hLitres == nil {
		return nil
	}
	v := *a.Volume24hLitres
	for _, c := range a.Others {
		if c.Composition != nil && c.Volume24hLitres != nil {
			v += *c.Volume24hLitres
		}
	}
	return &v
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
		fig["riseFromNadir24h"], fig["fallFromPeak24h"] = Round(w.RiseFromNadir, 1), Round(w.FallFromPeak, 1)
	}
	if w := a.Trend.Window48h; w != nil {
		fig["riseFromNadir48h"] = Round(w.RiseFromNadir, 1)
	}
	set := func(name string, v *float64, decimals int) {
		if v != nil {
			fig[name] = Round(*v, decimals)
		}
	}
	set("tbwLitres", a.TBWLitres, 1)
	set("deltaPerLitre", a.DeltaPerLitre, 2)
	set("volume24hLitres", a.totalVolume(), 3)
	set("projectedChange24h", a.ProjectedChange24h, 1)
	if len(a.Others) > 0 {
		set("orderChange24h", a.OrderChange24h, 1)
		set("othersChange24h", a.OthersChange24h, 1)
	}
	set("projectedTotal24h", a.ProjectedTotal24h, 1)
	// Limits are shown rounded down, so no shown figure passes them.
	floor := func(name string, v *float64, decimals int) {
		if v != nil {
			p := math.Pow(10, float64(decimals))
			fig[name] = math.Floor(*v*p) / p
		}
	}
	floor("maxVolume24hLitres", a.MaxVolume24hLitres, 3)
	floor("maxRateMlPerHour", a.MaxRateMlPerHour, 1)
	set("freeWaterDeficitLitres", a.FreeWaterDeficitLitres, 1)
	set("projectedChange24hWithUrine", a.ProjectedChange24hWithUrine, 1)
	set("efwcLitresPerDay", a.EFWCLitres, 2)
	set("urineOutputMlPerHour", a.Urine.RateMlPerHour, 0)
	if nak, ok := a.Urine.NaK(); ok {
		fig["urineNaKmmolPerL"] = Round(nak, 1)
	}
	c := a.Context
	set("correctedSodiumKatz", c.CorrectedKatz, 1)
	set("correctedSodiumHillier", c.CorrectedHillier, 1)
	set("calculatedOsmolality", c.CalculatedOsmolality, 0)
	set("effectiveOsmolality", c.EffectiveOsmolality, 0)
	set("measuredOsmolality", c.MeasuredOsmolality, 0)
	set("osmolalGap", c.OsmolalGap, 0)
	return fig
}

// stamp writes a time for card text, in UTC; Evaluate rewrites every such
// time into the display zone (Ruleset.WithDisplay).
func stamp(t time.Time) string { return t.UTC().Format(stampLayout) }

const stampLayout = "2006-01-02 15:04 UTC"

func (r *Ruleset) detail(a InfusionAssessment, word string, recheckHours float64) string {
	l := r.policy.Limits
	var b strings.Builder
	line := func(format string, args ...any) { fmt.Fprintf(&b, "- "+format+"\n", args...) }
	b.WriteString("**Figures**\n\n")
	if a.Latest != nil {
		line("Latest sodium: %s mmol/L (%s%s, %s)", show(Sodium, a.Latest.Value), measuredBy(*a.Latest), stamp(a.Latest.At), a.Latest.Source)
		b.WriteString(sameTimeLine(*a.Latest))
	}
	if w := a.Trend.Window24h; w != nil {
		if a.Hypernatremia {
			line("Fall already measured: %s mmol/L from the peak of %s (%s) in the last 24 h", naChange.of(w.FallFromPeak),
				show(Sodium, w.Peak.Value), stamp(w.Peak.At))
		} else {
			line("Rise already measured: %s mmol/L from the nadir of %s (%s) in the last 24 h", naChange.of(w.RiseFromNadir),
				show(Sodium, w.Nadir.Value), stamp(w.Nadir.At))
		}
		if w.Start != nil {
			line("The value at the start of the 24-h window, %s mmol/L, is interpolated from the results either side", show(Sodium, w.Start.Value))
		}
	}
	if w := a.Trend.Window48h; w != nil && !a.Hypernatremia {
		line("Rise in the last 48 h: %s mmol/L from the nadir of %s", naChange.of(w.RiseFromNadir), show(Sodium, w.Nadir.Value))
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
	for _, u := range a.RiskUnchecked {
		if a.Hypernatremia {
			break // the demyelination limits restrict a rise, not a fall
		}
		line("Not checked for demyelination risk: %s; if the risk is high, the limit is %g mmol/L per 24 h", u,
			l.HyponatremiaRise24hHighRisk.Value)
	}
	if a.Infant {
		line("Infant: total body water is a larger fraction of weight than the %g used (about 0.7–0.8, from memory), "+
			"so the projection may overstate the change and understate the rate that fits", r.policy.TBW.Child)
	}
	if a.Hypernatremia && a.RunHours == 0 && a.DeltaPerLitre != nil {
		line("The hourly fall limit was not checked: the order gives no rate or dose duration")
	}
	if a.Weight != nil && a.TBWLitres != nil {
		line("Total body water: %s L, %s of %s kg weighed %s%s", bodyWater.of(*a.TBWLitres), a.TBWMethod, show(BodyWeight, a.Weight.Value),
			stamp(a.Weight.At), asSent(*a.Weight))
		b.WriteString(sameTimeLine(*a.Weight))
	}
	c := a.Composition
	line("Infusate: sodium %s + potassium %s mmol/L, from %s (%s)", infusateNa.of(c.Na), infusateNa.of(c.K), c.Basis, c.Source)
	if a.Volume24hLitres != nil {
		line("Volume in the next 24 h: %s L (%s)", volume24h.of(*a.Volume24hLitres), a.VolumeBasis)
	}
	if a.DeltaPerLitre != nil {
		line("Change per litre (Adrogué–Madias): %s mmol/L", naPerLitre.signed(*a.DeltaPerLitre))
	}
	r.othersLines(&b, a)
	switch {
	case a.ProjectedChange24h != nil && len(a.Others) > 0:
		line("Projected change in 24 h from everything counted: %s mmol/L (this order %s, the others %s); projected 24-h total: %s mmol/L",
			naChange.signed(*a.ProjectedChange24h), naChange.signed(*a.OrderChange24h),
			naChange.signed(*a.ProjectedChange24h-*a.OrderChange24h), naChange.signed(*a.ProjectedTotal24h))
	case a.ProjectedChange24h != nil:
		line("Projected change from this order: %s mmol/L; projected 24-h total: %s mmol/L", naChange.signed(*a.ProjectedChange24h),
			naChange.signed(*a.ProjectedTotal24h))
	}
	r.urineLines(&b, a)
	switch {
	case a.OthersReachLimit && a.movesRestrictedWay():
		line("The other fluids alone bring %s mmol/L in 24 h, %s mmol/L beyond the %s mmol/L still allowed: no volume of this order fits while they run as ordered",
			naChange.signed(*a.OthersChange24h), naChange.of(math.Abs(*a.OthersChange24h)-a.Allowed), naChange.of(a.Allowed))
	case a.OthersReachLimit && a.OrderChange24h != nil:
		line("The other fluids alone bring %s mmol/L in 24 h, %s mmol/L beyond the %s mmol/L still allowed; this order offsets %s mmol/L of it",
			naChange.signed(*a.OthersChange24h), naChange.of(math.Abs(*a.OthersChange24h)-a.Allowed), naChange.of(a.Allowed),
			naChange.of(math.Abs(*a.OrderChange24h)))
	}
	if a.DeltaPerLitre != nil && !a.LimitReached {
		line("Still allowed: %s mmol/L, set by %s", naChange.of(a.Allowed), r.describeLimit(a))
	}
	switch {
	case a.LimitReached:
		line("The %s allowed by %s is already used", word, r.describeLimit(a))
	case a.OthersReachLimit:
		// said above: no volume of this order fits
	case a.MaxRateMlPerHour != nil:
		line("Largest rate that keeps the projection within the limit%s: %s mL/h over %s h (%s L), rounded down", a.givenOthers(),
			orderRate.of(math.Floor(*a.MaxRateMlPerHour*10)/10), orderHours.of(a.InfusionHours), maxLitres.of(math.Floor(*a.MaxVolume24hLitres*1000)/1000))
	case a.MaxVolume24hLitres != nil:
		line("Largest volume in the next 24 h that keeps the projection within the limit%s: %s mL, rounded down", a.givenOthers(),
			orderMl.of(math.Floor(*a.MaxVolume24hLitres*1000)))
	}
	if a.FreeWaterDeficitLitres != nil {
		line("Free-water deficit: %s L, classic formula TBW × (Na/140 − 1) (Adrogué HJ, Madias NE, N Engl J Med 2000;342:1493-1499)",
			bodyWater.of(*a.FreeWaterDeficitLitres))
	}
	r.contextLines(&b, a.Context)
	line("Policy re-check interval for this card: %g h", recheckHours)
	if len(a.Missing) > 0 {
		b.WriteString("\n**Could not be computed without**: " + strings.Join(a.Missing, "; ") + ". Nothing was assumed in their place.\n")
	}
	b.WriteString("\n**Method**: mass balance ΔNa = ΣVᵢ·(Na + K of infusate i − serum Na)/(TBW + ΣVᵢ) over the next 24 h, the " +
		"Adrogué–Madias formula (N Engl J Med 2000) scaled to each 24-h volume (Chen & Shey, Kidney360 2021) and summed over " +
		"this order, the call's other draft orders and the infusions already running; an infusion runs at its rate for 24 h " +
		"unless its order states a stop. Rolling 24-h and 48-h windows end now; the projected 24-h total adds the next 24 h " +
		"to the change already measured in the last 24 h. That projection ignores urine output, insensible and other ongoing " +
		"losses, fluids it could not identify and drugs; when urine output and urine sodium and potassium are charted, a second " +
		"projection counts the urine too. Measured sodium is the guide.")
	return b.String()
}

// othersLines names every other order counted beside this one, and the
// ones that could not be counted, with why.
func (r *Ruleset) othersLines(b *strings.Builder, a InfusionAssessment) {
	for _, c := range a.Others {
		status := "draft"
		if c.Running {
			status = "running"
		}
		what := fmt.Sprintf("%s (%s: %s)", c.Order.Reference, status, orderText(c.Order))
		switch {
		case c.Composition == nil:
			fmt.Fprintf(b, "- Not counted: %s: the fluid is not identified, so its sodium is unknown; the projection leaves it out\n", what)
		case c.Volume24hLitres == nil:
			fmt.Fprintf(b, "- Not counted: %s: the order gives no rate or volume in mL\n", what)
		default:
			fmt.Fprintf(b, "- Also counted: %s: %s L in 24 h (%s), sodium %s + potassium %s mmol/L", what,
				volume24h.of(*c.Volume24hLitres), c.VolumeBasis, infusateNa.of(c.Composition.Na), infusateNa.of(c.Composition.K))
			if c.Change24h != nil {
				fmt.Fprintf(b, ", %s mmol/L", naChange.signed(*c.Change24h))
			}
			b.WriteString("\n")
		}
	}
}

// urineLines write the urine output and composition read, and the
// projection with the urine of the next 24 h when both are known.
func (r *Ruleset) urineLines(b *strings.Builder, a InfusionAssessment) {
	u := a.Urine
	if u.RateMlPerHour != nil {
		fmt.Fprintf(b, "- Urine output: %s mL/h over the last %s h charted (%d period%s)\n", orderRate.of(*u.RateMlPerHour),
			hoursSpan.of(u.Hours), len(u.Volumes), plural(len(u.Volumes)))
	}
	if u.Na != nil {
		k := "no urine potassium"
		if u.K != nil {
			k = "potassium " + show(UrinePotassium, u.K.Value)
		}
		fmt.Fprintf(b, "- Urine sodium %s, %s mmol/L (%s)\n", show(UrineSodium, u.Na.Value), k, stamp(u.Na.At))
	}
	if u.Osmolality != nil {
		fmt.Fprintf(b, "- Urine osmolality %s mOsm/kg (%s)\n", show(UrineOsmolality, u.Osmolality.Value), stamp(u.Osmolality.At))
	}
	if !a.Hypernatremia && u.Aquaresis(r.policy.UrineLosses) {
		fmt.Fprintf(b, "- Aquaresis: a brisk dilute urine can raise sodium faster than any projection of the infusate\n")
	}
	if a.ProjectedChange24hWithUrine != nil {
		nak, _ := u.NaK()
		vu, _ := u.Litres24h()
		fmt.Fprintf(b, "- With the urine counted: %s mmol/L in 24 h, if %s L of urine with Na + K %s mmol/L keeps coming at the charted "+
			"rate (electrolyte-free water clearance %s L/day); the infusate-only projection assumes no urine at all. Neither counts "+
			"insensible losses (%s)\n", naChange.signed(*a.ProjectedChange24hWithUrine), volume24h.of(vu), infusateNa.of(nak),
			bodyWater.of(*a.EFWCLitres), strings.TrimSuffix(r.policy.UrineLosses.Source, "."))
	}
}

// givenOthers qualifies a rate that fits when other orders are counted.
func (a InfusionAssessment) givenOthers() string {
	if d, r := a.counted(); d+r > 0 {
		return ", the other orders counted as ordered"
	}
	return ""
}

// contributorAttributes lists every order the projection counted or named,
// for extension.halite.contributors: reference, status (draft or active),
// 24-h volume and infusate Na+K when known.
func (a InfusionAssessment) contributorAttributes() map[string]any {
	entry := func(o MedicationOrder, running bool, comp *Composition, vol *float64) map[string]any {
		e := map[string]any{"reference": o.Reference, "status": "draft"}
		if running {
			e["status"] = o.Status // active (an order) or in-progress (an administration)
		}
		if vol != nil {
			e["volume24hLitres"] = Round(*vol, 3)
		}
		if comp != nil {
			e["naKmmolPerL"] = Round(comp.NaK(), 1)
		} else {
			e["fluidUnknown"] = true
		}
		return e
	}
	list := []map[string]any{entry(a.Order, false, a.Composition, a.Volume24hLitres)}
	for _, c := range a.Others {
		list = append(list, entry(c.Order, c.Running, c.Composition, c.Volume24hLitres))
	}
	return map[string]any{"contributors": list}
}

// asSent gives the value as the chart sent it when halite converted it.
func asSent(m Measurement) string {
	if m.Original == "" || m.Original == fmt.Sprintf("%g %s", m.Value, CanonicalUnit(m.Analyte)) {
		return ""
	}
	return " (sent as " + kept(sentValue(m.Original)) + ")"
}

// sentValue is an "as sent" value and unit as sent, unless its number has
// more than six significant digits: a laboratory's own precision ("3.0")
// survives, the floating-point noise of a converting system
// ("15.000007772701675") is rounded away.
func sentValue(original string) string {
	num, unit, _ := strings.Cut(original, " ")
	v, err := strconv.ParseFloat(num, 64)
	if err != nil {
		return original
	}
	mantissa, _, _ := strings.Cut(strings.ToLower(strings.TrimLeft(num, "+-")), "e")
	if digits := strings.TrimLeft(strings.ReplaceAll(mantissa, ".", ""), "0"); len(digits) <= 6 {
		return original
	}
	return strings.TrimSpace(strconv.FormatFloat(v, 'g', 6, 64) + " " + unit)
}

func (r *Ruleset) describeLimit(a InfusionAssessment) string {
	switch a.Binding {
	case Bound48h:
		return fmt.Sprintf("the 48-h limit of %g mmol/L", a.Limit48h)
	case BoundHourly:
		return fmt.Sprintf("the limit of %g mmol/L per hour over the %s h the order runs",
			r.policy.Limits.HypernatremiaFallPerHour.Value, orderHours.of(a.RunHours))
	}
	return fmt.Sprintf("the 24-h limit of %g mmol/L", a.Limit24h)
}

// contextLines writes the tonicity figures that could be computed.
func (r *Ruleset) contextLines(b *strings.Builder, c TonicityContext) {
	if c.CorrectedKatz != nil {
		fmt.Fprintf(b, "- Glucose-corrected sodium: %s mmol/L (Katz, 1.6 per 100 mg/dL; N Engl J Med 1973) or %s mmol/L "+
			"(Hillier, 2.4 per 100 mg/dL; Am J Med 1999)\n", naChange.of(*c.CorrectedKatz), naChange.of(*c.CorrectedHillier))
	}
	if c.EffectiveOsmolality != nil {
		fmt.Fprintf(b, "- Effective osmolality (%s): %s mOsm/kg (%s)", c.EffectiveBasis, osmolal.of(*c.EffectiveOsmolality), c.Class)
		if c.CalculatedOsmolality != nil {
			fmt.Fprintf(b, "; calculated osmolality 2·Na + glucose + urea: %s mOsm/kg", osmolal.of(*c.CalculatedOsmolality))
		}
		b.WriteString("\n")
	}
	if c.OsmolalGap != nil {
		fmt.Fprintf(b, "- Osmolal gap: %s mOsm/kg (measured %s − calculated)\n", osmolal.of(*c.OsmolalGap), show(SerumOsmolality, *c.MeasuredOsmolality))
	} else if c.MeasuredOsmolality != nil {
		fmt.Fprintf(b, "- Measured osmolality: %s mOsm/kg\n", show(SerumOsmolality, *c.MeasuredOsmolality))
	}
	for _, m := range c.Inputs {
		fmt.Fprintf(b, "- Used: %s %s (%s%s, %s)%s\n", m.Analyte, quantity(m.Analyte, m.Value), measuredBy(m), stamp(m.At), m.Source, asSent(m))
		b.WriteString(sameTimeLine(m))
	}
}
