package rules

import (
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"
	"time"
)

// Moment is when a check is called: a draft order selected or signed, or a
// chart opened.
type Moment string

// Moments of a call.
const (
	MomentSelect Moment = "select"
	MomentSign   Moment = "sign"
	MomentChart  Moment = "chart"
)

// Reasons a finding is not shown again.
const (
	// SuppressedSelectToSign: shown when the draft was selected, and
	// unchanged at signing.
	SuppressedSelectToSign = "select-to-sign"
	// SuppressedOverridden: overridden with a reason within the override
	// period, and no worse since.
	SuppressedOverridden = "overridden"
	// SuppressedChartUnchanged: shown at an earlier chart opening within the
	// interval, and no worse since.
	SuppressedChartUnchanged = "chart-unchanged"
)

// SuppressionPolicy says when a finding shown before is not shown again.
// Critical findings are always shown unless SuppressCritical is set.
type SuppressionPolicy struct {
	// SelectToSignMinutes: a finding shown at order-select for a draft is
	// not repeated at order-sign of the same draft within this time while
	// its indicator has not risen and its figures are unchanged.
	SelectToSignMinutes float64 `json:"selectToSignMinutes"`
	// OverrideHours: after an override with a reason, the same rule for the
	// same patient and product is not shown again for this time unless it
	// has worsened.
	OverrideHours float64 `json:"overrideHours"`
	// ChartIntervalHours: at a chart opening, a finding shown at an earlier
	// opening within this time is shown again only when it has worsened.
	ChartIntervalHours float64 `json:"chartIntervalHours"`
	// SuppressCritical lets a site suppress critical findings too; it must
	// be set explicitly (the default is never).
	SuppressCritical bool `json:"suppressCritical"`
	// Unchanged is how far a figure may move and still be the same:
	// |a − b| ≤ absolute + relative × |b|.
	Unchanged struct {
		Absolute float64 `json:"absolute"`
		Relative float64 `json:"relative"`
	} `json:"unchanged"`
	// ClockFigures move with the clock alone (the age of a result) and are
	// not compared.
	ClockFigures []string `json:"clockFigures"`
	// Watch names, per rule, the figure whose move the worse way by at
	// least its margin means the finding has worsened. A rule without an
	// entry has worsened when any figure changed.
	Watch  map[string]WatchedFigure `json:"watch"`
	Source string                   `json:"source"`
}

// WatchedFigure is the figure that tells whether a rule's finding worsened.
type WatchedFigure struct {
	Figure string `json:"figure"`
	// Worse is "higher" or "lower".
	Worse  string  `json:"worse"`
	Margin float64 `json:"margin"`
	// AlwaysWhen names a figure that, when not zero (a falling trend), makes
	// the finding show at every chart opening.
	AlwaysWhen string `json:"alwaysWhen,omitempty"`
}

// clockFigureNames are the figures that move with the clock alone.
var clockFigureNames = []string{"sodiumAgeHours"}

// ruleIDs are every rule a card can come from.
func ruleIDs() []string {
	return append(cardRules[:], RuleDrugHyponatremia, RuleDrugNewStart, RuleDrugNDI, RuleLithiumNoSodium, RuleRaiserHypernatremia)
}

func (p SuppressionPolicy) validate() error {
	if p.SelectToSignMinutes < 0 || p.SelectToSignMinutes > 24*60 || p.OverrideHours < 0 || p.OverrideHours > 24*30 ||
		p.ChartIntervalHours < 0 || p.ChartIntervalHours > 24*30 {
		return fmt.Errorf("suppression needs selectToSignMinutes within 0..1440 and overrideHours and chartIntervalHours within 0..720")
	}
	if p.Unchanged.Absolute < 0 || p.Unchanged.Relative < 0 || p.Unchanged.Relative >= 1 || p.Source == "" {
		return fmt.Errorf("suppression needs a non-negative unchanged tolerance (relative below 1) and a source")
	}
	for _, c := range p.ClockFigures {
		if !slices.Contains(clockFigureNames, c) {
			return fmt.Errorf("suppression.clockFigures: %q is not a figure that moves with the clock alone (%s)", c, strings.Join(clockFigureNames, ", "))
		}
	}
	ids := ruleIDs()
	for id, w := range p.Watch {
		if slices.Contains(p.ClockFigures, w.Figure) || slices.Contains(p.ClockFigures, w.AlwaysWhen) {
			return fmt.Errorf("suppression.watch.%s watches a clock figure", id)
		}
		if !slices.Contains(ids, id) {
			return fmt.Errorf("suppression.watch.%s is not a rule halite has", id)
		}
		if w.Figure == "" || (w.Worse != "higher" && w.Worse != "lower") || w.Margin <= 0 {
			return fmt.Errorf("suppression.watch.%s needs a figure, worse \"higher\" or \"lower\", and a positive margin", id)
		}
	}
	return nil
}

// ShownCard is a card shown earlier for the same patient, service and
// caller, as the card log keeps it. Subject and Draft are opaque keys
// (keyed hashes) of the finding's product and draft order.
type ShownCard struct {
	Rule      string
	Moment    Moment
	Subject   string
	Draft     string
	Indicator Indicator
	Figures   map[string]float64
	At        time.Time
	// OverriddenAt is when the clinician overrode the card with a reason;
	// zero when not.
	OverriddenAt time.Time
}

// Suppression is a finding not shown again, with the reason and the card
// it repeats.
type Suppression struct {
	Reason string
	Prior  ShownCard
}

// Suppress decides whether finding f, keyed by subject and draft and
// found at moment m at time at, repeats a card of shown without being worse
// (see SuppressionPolicy). It returns the suppression and true, or false
// when f is to be shown.
func (p SuppressionPolicy) Suppress(f Finding, m Moment, subject, draft string, shown []ShownCard, at time.Time) (Suppression, bool) {
	// A drug or fluid finding whose product has no key cannot be matched
	// to its own earlier cards: shown.
	if (f.Indicator >= Critical && !p.SuppressCritical) || p.alwaysShown(f) || (f.Order != "" && f.Product == "") {
		return Suppression{}, false
	}
	var same []ShownCard
	for _, s := range shown {
		if s.Rule == f.Rule && s.Subject == subject && !s.At.After(at) {
			same = append(same, s)
		}
	}
	// The latest first: a repeat is judged against the last card shown.
	slices.SortStableFunc(same, func(a, b ShownCard) int { return b.At.Compare(a.At) })
	for _, s := range same {
		if !s.OverriddenAt.IsZero() && within(at, s.OverriddenAt, p.OverrideHours) && !p.worse(f, s) {
			return Suppression{Reason: SuppressedOverridden, Prior: s}, true
		}
	}
	if len(same) == 0 {
		return Suppression{}, false
	}
	last := same[0]
	switch {
	case m == MomentSign && last.Moment == MomentSelect && draft != "" && last.Draft == draft &&
		within(at, last.At, p.SelectToSignMinutes/60) && f.Indicator <= last.Indicator && p.unchanged(f.Figures, last.Figures):
		return Suppression{Reason: SuppressedSelectToSign, Prior: last}, true
	case m == MomentChart && last.Moment == MomentChart && within(at, last.At, p.ChartIntervalHours) && !p.worse(f, last):
		return Suppression{Reason: SuppressedChartUnchanged, Prior: last}, true
	}
	return Suppression{}, false
}

// within reports whether at is no more than hours after t (never for a
// period of zero: that suppression is off).
func within(at, t time.Time, hours float64) bool {
	d := at.Sub(t)
	return hours > 0 && d >= 0 && d.Hours() <= hours
}

// worse reports whether f is worse than the card s: a higher indicator,
// its watched figure moved the worse way by at least the margin, or missing
// from either (nothing to compare: shown), or, for a rule without a watched
// figure, any figure changed.
func (p SuppressionPolicy) worse(f Finding, s ShownCard) bool {
	if f.Indicator > s.Indicator {
		return true
	}
	w, ok := p.Watch[f.Rule]
	if !ok {
		return !p.unchanged(f.Figures, s.Figures)
	}
	now, has := f.Figures[w.Figure]
	before, had := s.Figures[w.Figure]
	switch {
	case !has || !had:
		return true
	case w.Worse == "higher":
		return now-before >= w.Margin
	default:
		return before-now >= w.Margin
	}
}

// alwaysShown reports whether f's rule shows at every chart opening in its
// present state (a falling sodium).
func (p SuppressionPolicy) alwaysShown(f Finding) bool {
	w, ok := p.Watch[f.Rule]
	return ok && w.AlwaysWhen != "" && f.Figures[w.AlwaysWhen] != 0
}

// unchanged reports whether the figures a and b hold the same names and
// values within the tolerance, clock figures aside.
func (p SuppressionPolicy) unchanged(a, b map[string]float64) bool {
	for _, m := range [2][2]map[string]float64{{a, b}, {b, a}} {
		for k, v := range m[0] {
			if slices.Contains(p.ClockFigures, k) {
				continue
			}
			o, ok := m[1][k]
			if !ok || math.Abs(v-o) > p.Unchanged.Absolute+p.Unchanged.Relative*math.Abs(o) {
				return false
			}
		}
	}
	return true
}

// Suppression returns the ruleset's suppression policy.
func (r *Ruleset) Suppression() SuppressionPolicy { return r.policy.Suppression }

// ProductKey keys a medication for suppression: its RxNorm code, else its
// first coding, else its text; empty when it has none of them.
func ProductKey(m Medication) string {
	for _, c := range m.Codings {
		if c.System == SystemRxNorm && c.Code != "" {
			return "rxnorm:" + c.Code
		}
	}
	for _, c := range m.Codings {
		if c.Code != "" {
			return c.System + "|" + c.Code
		}
	}
	if t := strings.ToLower(strings.TrimSpace(m.Text)); t != "" {
		return "text:" + t
	}
	return ""
}

// DraftKey keys a draft order for suppression by its identity and content
// (product, dose, rate, route, timing), so an edited draft is a new one;
// empty for an order without an id.
func DraftKey(o MedicationOrder) string {
	if strings.HasSuffix(o.Reference, "/") || o.Reference == "" {
		return ""
	}
	q := func(x *Quantity) string {
		if x == nil {
			return "-"
		}
		return strconv.FormatFloat(x.Value, 'g', -1, 64) + " " + x.Unit
	}
	var route []string
	for _, c := range o.Route {
		route = append(route, c.System+"|"+c.Code)
	}
	freq := "-"
	if o.Frequency != nil {
		freq = strconv.Itoa(*o.Frequency)
	}
	return strings.Join([]string{o.Reference, ProductKey(o.Medication), q(o.Dose), o.Rate, strings.Join(route, ","), o.RouteText,
		q(o.Duration), q(o.Bounds), freq, q(o.Period)}, "\x1f")
}
