package rules

import "time"

// SodiumWindow is the change of serum sodium inside one trailing window
// ending at the evaluation time.
type SodiumWindow struct {
	Hours int
	// Nadir and Peak are the lowest and highest values in the window, and
	// Latest the last; RiseFromNadir = Latest − Nadir and FallFromPeak =
	// Peak − Latest, each ≥ 0. Where results at one time are tied (see
	// SameTimePolicy), each figure counts the value on its safer side: for
	// the rise, earlier times at their lowest and the latest at its highest
	// (RiseTo); for the fall, earlier times at their highest and the latest
	// at its lowest (FallTo). Without ties RiseTo and FallTo are Latest. A
	// nadir or peak at the latest time is Latest itself.
	Nadir, Peak, Latest Measurement
	RiseTo, FallTo      Measurement
	RiseFromNadir       float64
	FallFromPeak        float64
	Used                []Measurement // the values used, oldest first
	// Start is the value interpolated at the window's start when a value
	// precedes the window; it is counted with the values inside (see
	// window) and is first in Used.
	Start *Measurement
}

// SodiumTrend is the analysis of a sodium series at a time.
type SodiumTrend struct {
	Window24h, Window48h *SodiumWindow // nil when the window holds no value
}

// AnalyseSodium measures the change already achieved: rise from the nadir
// and fall from the peak in the trailing 24-h and 48-h windows ending at at
// (rolling windows, as the US panel applies its limits "in any 24-h period":
// Verbalis JG et al., Am J Med 2013;126:S1–S42).
// A value before a window (by no more than the window's length) gives, by
// linear interpolation, the value at the window's start, so a change that
// straddles the start is not missed.
// series must be ordered oldest first, as fhirmap builds it.
func AnalyseSodium(series []Measurement, at time.Time) SodiumTrend {
	var t SodiumTrend
	t.Window24h = window(series, at, 24)
	t.Window48h = window(series, at, 48)
	return t
}

func window(series []Measurement, at time.Time, hours int) *SodiumWindow {
	from := at.Add(-time.Duration(hours) * time.Hour)
	w := &SodiumWindow{Hours: hours}
	consider := func(m Measurement) { w.Used = append(w.Used, m) }
	// A change that began before the window and went on inside it is
	// counted from the window's start: the value there is interpolated
	// linearly between the last value before the window and the first
	// inside it (so a straddling change is not missed, nor overstated by
	// counting its part before the window).
	var before *Measurement
	n := 1 // room for the interpolated start
	// A value more than a window's length before the start says little about
	// the start; it is not interpolated from.
	earliest := from.Add(-time.Duration(hours) * time.Hour)
	for i, m := range series {
		switch {
		case m.At.Before(earliest):
		case m.At.Before(from):
			before = &series[i]
		case !m.At.After(at):
			n++
		}
	}
	w.Used = make([]Measurement, 0, n)
	inside := 0
	for _, m := range series {
		if m.At.Before(from) || m.At.After(at) {
			continue
		}
		if inside == 0 && before != nil && m.At.After(from) {
			frac := from.Sub(before.At).Seconds() / m.At.Sub(before.At).Seconds()
			start := Measurement{Analyte: before.Analyte, At: from, Value: before.Value + frac*(m.Value-before.Value),
				Source: "interpolated between " + before.Source + " and " + m.Source}
			w.Start = &start
			consider(start)
		}
		consider(m)
		inside++
	}
	if inside == 0 {
		return nil
	}
	last := len(w.Used) - 1
	w.Latest, w.RiseTo, w.FallTo = w.Used[last], w.Used[last].Highest(), w.Used[last].Lowest()
	// The rise: every earlier value at its lowest, the latest at its
	// highest; the fall the other way round. Without ties both are the
	// plain nadir and peak.
	nadirLast, peakLast := false, false
	for i, m := range w.Used {
		lo, hi := m.Lowest(), m.Highest()
		if i == last {
			lo, hi = w.RiseTo, w.FallTo
		}
		if i == 0 || lo.Value < w.Nadir.Value {
			w.Nadir, nadirLast = lo, i == last
		}
		if i == 0 || hi.Value > w.Peak.Value {
			w.Peak, peakLast = hi, i == last
		}
	}
	w.RiseFromNadir = w.RiseTo.Value - w.Nadir.Value
	w.FallFromPeak = w.Peak.Value - w.FallTo.Value
	// A nadir or peak that is the latest time itself is shown as the latest
	// (the rise or fall is then 0), not as its tied value's other side.
	if nadirLast {
		w.Nadir = w.Latest
	}
	if peakLast {
		w.Peak = w.Latest
	}
	return w
}
