package rules

import (
	"fmt"
	"math"
	"slices"
	"strings"
	"time"
)

// Origin says where a result comes from, so that a card can tell a blood
// gas from a laboratory or point-of-care result, and so that a conflict
// between them can be decided.
type Origin string

// Origins of a result.
const (
	// Laboratory: the code names no method or device (laboratory or
	// unspecified).
	Laboratory Origin = "laboratory"
	// BloodGas: whole arterial, venous or mixed venous blood, measured on
	// blood-gas analysers in common practice.
	BloodGas Origin = "blood gas"
	// PointOfCare: the code names a glucometer or test-strip method.
	PointOfCare Origin = "point of care"
)

// SameTimePolicy decides between results of one analyte taken at the same
// time (within ToleranceMinutes of the first of them) with different
// values: such results are a data conflict, never a change.
//
// Precedence, in this order: an amended or corrected result over a final
// one; the origin earlier in OriginPrecedence; the later issued time. What
// precedence cannot decide is a tie: the analyte's entry in Unresolved says
// which value stands for the group, and the other values stay beside it
// (Conflict.Tied) so that each figure counts the one on its safer side.
// An analyte with no entry has no value at that time: every tied result is
// left out, with its reason.
type SameTimePolicy struct {
	ToleranceMinutes float64               `json:"toleranceMinutes"`
	OriginPrecedence []Origin              `json:"originPrecedence"`
	Unresolved       map[Analyte]TieChoice `json:"unresolved"`
	Source           string                `json:"source"`
	// byIssued is set, for one group, when every result in it states its
	// issued time.
	byIssued bool
}

// TieChoice is the value that stands for tied results of one analyte.
type TieChoice struct {
	// Take is "lowest", "highest" or "farthestFrom" (From).
	Take string  `json:"take"`
	From float64 `json:"from,omitempty"`
	// Why says, in a clinician's words, why that side is the safer one.
	Why string `json:"why"`
}

// The values of TieChoice.Take.
const (
	TakeLowest       = "lowest"
	TakeHighest      = "highest"
	TakeFarthestFrom = "farthestFrom"
)

func (p SameTimePolicy) validate() error {
	if p.ToleranceMinutes < 0 || p.ToleranceMinutes > 60 || p.Source == "" {
		return fmt.Errorf("sameTime needs toleranceMinutes between 0 and 60 and a source")
	}
	seen := map[Origin]bool{}
	for _, o := range p.OriginPrecedence {
		switch o {
		case Laboratory, BloodGas, PointOfCare:
		default:
			return fmt.Errorf("sameTime.originPrecedence: %q is not laboratory, blood gas or point of care", o)
		}
		if seen[o] {
			return fmt.Errorf("sameTime.originPrecedence: %q is listed twice", o)
		}
		seen[o] = true
	}
	for a, c := range p.Unresolved {
		if !knownAnalyte(a) {
			return fmt.Errorf("sameTime.unresolved.%s is not an analyte halite maps", a)
		}
		switch c.Take {
		case TakeLowest, TakeHighest, TakeFarthestFrom:
		default:
			return fmt.Errorf("sameTime.unresolved.%s.take %q is not lowest, highest or farthestFrom", a, c.Take)
		}
		if c.Why == "" {
			return fmt.Errorf("sameTime.unresolved.%s needs why", a)
		}
	}
	return nil
}

// Conflict records the other results of an analyte at the time of a
// measurement whose values differ from it.
type Conflict struct {
	// Others are the differing results, as mapped.
	Others []Measurement
	// Tied are those of Others that precedence did not decide against: they
	// are counted wherever they lie on the safer side (the nadir, the peak,
	// a rise or fall). Results that ranked lower are not.
	Tied []Measurement
	// Decided says, in a clinician's words, why this value stands for the
	// group: "laboratory over blood gas", "the lower value: …".
	Decided string
}

// ResolveSameTime applies p to one analyte's series (ordered oldest first,
// and by collection period among equal times):
// it returns the series with one result per time, the results left out,
// each with its reason, and a note for every conflict. Results the same as
// displayed are duplicates: the one precedence prefers is kept, the others
// left out, without a note.
func ResolveSameTime(series []Measurement, p SameTimePolicy) ([]Measurement, []Rejection, []string) {
	tol := time.Duration(p.ToleranceMinutes * float64(time.Minute))
	var out []Measurement
	var rejected []Rejection
	var notes []string
	for i := 0; i < len(series); {
		j := i + 1
		// Volumes over different periods (urine output) are different
		// results, whatever their end.
		for j < len(series) && series[j].At.Sub(series[i].At) <= tol &&
			math.Abs(series[j].PeriodHours-series[i].PeriodHours)*60 <= p.ToleranceMinutes {
			j++
		}
		kept, rej, note := p.resolveGroup(series[i:j])
		out = append(out, kept...)
		rejected = append(rejected, rej...)
		if note != "" {
			notes = append(notes, note)
		}
		i = j
	}
	return out, rejected, notes
}

// resolveGroup decides one group of results taken at the same time.
func (p SameTimePolicy) resolveGroup(group []Measurement) ([]Measurement, []Rejection, string) {
	if len(group) == 1 {
		return group, nil, ""
	}
	ranked := slices.Clone(group)
	// Issued times rank only when every result states one, so that the
	// ranking is an order (a result without one neither wins nor loses).
	p.byIssued = !slices.ContainsFunc(group, func(m Measurement) bool { return m.Issued == nil })
	// Best first; among equals, the later taken.
	slices.SortStableFunc(ranked, func(a, b Measurement) int {
		if c, _ := p.compare(a, b); c != 0 {
			return -c
		}
		return b.At.Compare(a.At)
	})
	var rejected []Rejection
	reject := func(m Measurement, reason string) {
		rejected = append(rejected, Rejection{Source: m.Source, Analyte: m.Analyte, Reason: plainUnits(reason)})
	}
	// One result per displayed value: the best ranked of each.
	var distinct []Measurement
	for _, m := range ranked {
		if k := slices.IndexFunc(distinct, func(d Measurement) bool { return sameShown(d, m) }); k >= 0 {
			reject(m, "duplicate of "+distinct[k].Source)
			continue
		}
		distinct = append(distinct, m)
	}
	if len(distinct) == 1 {
		return distinct, rejected, ""
	}
	best := distinct[0]
	tied := []Measurement{best}
	for _, m := range distinct[1:] {
		if c, reason := p.compare(best, m); c > 0 {
			reject(m, fmt.Sprintf("differs from %s at the same time (%s), which ranks higher: %s",
				best.Source, showPair(m, best), reason))
			best.addOther(m, false, reason)
			continue
		}
		tied = append(tied, m)
	}
	if len(tied) == 1 {
		return []Measurement{best}, rejected, plainUnits(conflictNote(best))
	}
	choice, ok := p.Unresolved[best.Analyte]
	if !ok {
		for _, m := range tied {
			reject(m, fmt.Sprintf("differs from another %s result at the same time (%s) and neither ranks higher; none is used",
				m.Analyte, showAll(tied)))
		}
		return nil, rejected, plainUnits(fmt.Sprintf("%s results taken at the same time (%s) differ: %s, and neither ranks higher; none is used",
			best.Analyte, stamp(best.At), showAll(tied)))
	}
	k := choice.pick(tied)
	stand := tied[k]
	stand.SameTime = nil
	for _, o := range best.sameTimeOthers() {
		stand.addOther(o, false, best.SameTime.Decided)
	}
	for i, m := range tied {
		if i == k {
			continue
		}
		reject(m, fmt.Sprintf("differs from %s at the same time (%s) and neither ranks higher; %s stands for both, and each figure counts the value on its safer side",
			stand.Source, showPair(m, stand), stand.Source))
		stand.addOther(m, true, choice.describe()+": "+choice.Why)
	}
	return []Measurement{stand}, rejected, plainUnits(conflictNote(stand))
}

// compare ranks a against b: 1 when a has precedence, −1 when b has, 0
// when neither; reason says why in a clinician's words.
func (p SameTimePolicy) compare(a, b Measurement) (int, string) {
	if ra, rb := statusRank(a.Status), statusRank(b.Status); ra != rb {
		hi, lo := a.Status, b.Status
		if ra < rb {
			hi, lo = lo, hi
		}
		return sign(ra - rb), fmt.Sprintf("a %s result over a %s one", hi, lo)
	}
	if oa, ob := p.originRank(a.Origin), p.originRank(b.Origin); oa != ob {
		hi, lo := a.Origin, b.Origin
		if ob < oa {
			hi, lo = lo, hi
		}
		return sign(ob - oa), fmt.Sprintf("%s over %s", hi, lo)
	}
	if p.byIssued && !a.Issued.Equal(*b.Issued) {
		if a.Issued.After(*b.Issued) {
			return 1, "issued later"
		}
		return -1, "issued later"
	}
	return 0, ""
}

// statusRank puts an amended or corrected result above a final one: it
// replaces it.
func statusRank(s string) int {
	if s == "amended" || s == "corrected" {
		return 1
	}
	return 0
}

// originRank is o's place in the precedence list; an origin not listed
// comes after every listed one.
func (p SameTimePolicy) originRank(o Origin) int {
	if i := slices.Index(p.OriginPrecedence, o); i >= 0 {
		return i
	}
	return len(p.OriginPrecedence)
}

func sign(n int) int {
	switch {
	case n > 0:
		return 1
	case n < 0:
		return -1
	}
	return 0
}

// pick is the index in tied of the value that stands for the group.
func (c TieChoice) pick(tied []Measurement) int {
	k := 0
	for i, m := range tied {
		var better bool
		switch c.Take {
		case TakeLowest:
			better = m.Value < tied[k].Value
		case TakeHighest:
			better = m.Value > tied[k].Value
		case TakeFarthestFrom:
			better = math.Abs(m.Value-c.From) > math.Abs(tied[k].Value-c.From)
		}
		if better {
			k = i
		}
	}
	return k
}

func (c TieChoice) describe() string {
	switch c.Take {
	case TakeLowest:
		return "the lower value"
	case TakeHighest:
		return "the higher value"
	}
	return "the value farther from " + fmt.Sprintf("%g", c.From)
}

// addOther records o as a differing result at m's time.
func (m *Measurement) addOther(o Measurement, tied bool, decided string) {
	if m.SameTime == nil {
		m.SameTime = &Conflict{}
	}
	o.SameTime = nil
	m.SameTime.Others = append(m.SameTime.Others, o)
	if tied {
		m.SameTime.Tied = append(m.SameTime.Tied, o)
	}
	if m.SameTime.Decided == "" || tied {
		m.SameTime.Decided = decided
	}
}

func (m Measurement) sameTimeOthers() []Measurement {
	if m.SameTime == nil {
		return nil
	}
	return m.SameTime.Others
}

// Lowest is m, or a tied result at its time with a lower value: the one on
// the safer side for a nadir.
func (m Measurement) Lowest() Measurement { return m.extreme(func(a, b float64) bool { return a < b }) }

// Highest is m, or a tied result at its time with a higher value.
func (m Measurement) Highest() Measurement {
	return m.extreme(func(a, b float64) bool { return a > b })
}

func (m Measurement) extreme(better func(a, b float64) bool) Measurement {
	out := m
	if m.SameTime == nil {
		return out
	}
	for _, o := range m.SameTime.Tied {
		if better(o.Value, out.Value) {
			out = o
		}
	}
	return out
}

// sameShown reports whether a and b read the same on a card.
func sameShown(a, b Measurement) bool { return show(a.Analyte, a.Value) == show(b.Analyte, b.Value) }

// describeResult is one result as a note names it: value, unit, origin and
// resource.
func describeResult(m Measurement) string {
	s := quantity(m.Analyte, m.Value)
	if m.Origin != "" {
		s += ", " + string(m.Origin)
	}
	return s + " (" + m.Source + ")"
}

func showPair(a, b Measurement) string {
	switch a.Analyte {
	case Glucose, Urea, Creatinine: // each with its display unit
		return quantity(a.Analyte, a.Value) + " vs " + quantity(b.Analyte, b.Value)
	}
	return show(a.Analyte, a.Value) + " vs " + show(b.Analyte, b.Value) + " " + CanonicalUnit(a.Analyte)
}

func showAll(ms []Measurement) string {
	parts := make([]string, len(ms))
	for i, m := range ms {
		parts[i] = describeResult(m)
	}
	return strings.Join(parts, " and ")
}

// conflictNote is the data note for a result that had differing results
// at its time.
func conflictNote(m Measurement) string {
	if m.SameTime == nil {
		return ""
	}
	return fmt.Sprintf("%s results taken at the same time (%s) differ: %s", m.Analyte, stamp(m.At), conflictText(m))
}

// measuredBy names, for a card, where m was measured when that is not a
// laboratory: "blood gas, " or "point of care, " (else "").
func measuredBy(m Measurement) string {
	if m.Origin == BloodGas || m.Origin == PointOfCare {
		return string(m.Origin) + ", "
	}
	return ""
}

// sameTimeLine is a card's data line naming the results that differ from m
// at its time; empty when none do.
func sameTimeLine(m Measurement) string {
	if m.SameTime == nil {
		return ""
	}
	return "- Results taken at the same time differ: " + conflictText(m) + "\n"
}

// conflictText names m and the results that differ from it at its time,
// and says which value counts; m.SameTime must not be nil.
func conflictText(m Measurement) string {
	all := append([]Measurement{m}, m.SameTime.Others...)
	s := showAll(all) + "; "
	if len(m.SameTime.Tied) > 0 {
		return s + show(m.Analyte, m.Value) + " is counted (" + m.SameTime.Decided + "), and the nadir, peak, rise and fall each count the value on their safer side"
	}
	return s + show(m.Analyte, m.Value) + " is counted (" + m.SameTime.Decided + ")"
}
