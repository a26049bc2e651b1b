package rules

import (
	"fmt"
	"math"
	"time"
)

// Volume24h is the volume (litres) an order would give in the 24 h from at,
// and how it was worked out: from an infusion rate, for 24 h unless the
// order states a stop (a course, timing.repeat.boundsDuration, or an end
// time, boundsPeriod.end), or from a dose in mL repeated per its timing.
// The quantity of one dispense (a 500 mL bag) is not a stop: bags are
// replaced. ok is false when the order says neither, or gives a rate or
// dose that is not positive; nothing is assumed.
func Volume24h(o MedicationOrder, at time.Time) (litres float64, basis string, ok bool) {
	window, stop := orderWindow(o, at)
	if window <= 0 && (o.RateMlPerHour != nil || o.Dose != nil) {
		return 0, stop, true // the order has ended: nothing more in 24 h
	}
	switch {
	case o.RateMlPerHour != nil && *o.RateMlPerHour <= 0:
		return 0, "", false
	case o.RateMlPerHour != nil:
		basis = fmt.Sprintf("%s mL/h for %s h", orderRate.of(*o.RateMlPerHour), orderHours.of(window))
		if stop != "" {
			basis += " (" + stop + ")"
		}
		return *o.RateMlPerHour * window / 1000, basis, true
	case o.Dose != nil:
		dose, known := VolumeMl(*o.Dose)
		if !known || dose <= 0 {
			return 0, "", false
		}
		n := 1.0
		basis = fmt.Sprintf("one dose of %s mL", orderMl.of(dose))
		if o.Frequency != nil && o.Period != nil {
			if h, known := DurationHours(*o.Period); known && h > 0 {
				n = math.Max(1, math.Floor(float64(*o.Frequency)*window/h))
				basis = fmt.Sprintf("%s dose%s of %s mL in %s h", doseCount.of(n), plural(int(n)), orderMl.of(dose), orderHours.of(window))
			}
		}
		return n * dose / 1000, basis, true
	}
	return 0, "", false
}

// orderWindow is how many of the 24 h from at the order runs: 24, or less
// when it states a stop, which stop says in words.
func orderWindow(o MedicationOrder, at time.Time) (hours float64, stop string) {
	hours = 24
	if o.Bounds != nil {
		if h, known := DurationHours(*o.Bounds); known && h >= 0 && h < hours {
			hours, stop = h, "the ordered course"
		}
	}
	if o.EndsAt != nil {
		if h := math.Max(0, o.EndsAt.Sub(at).Hours()); h < hours {
			hours, stop = h, "the order ends at "+stamp(*o.EndsAt)
		}
	}
	return hours, stop
}

// InfusionHours is how long, within the 24 h from at, a rate-based order
// runs at its rate: 24 h, or less when it states a stop (orderWindow). ok
// is false for an order without a rate (a bolus), for which a rate that
// fits is not given.
func InfusionHours(o MedicationOrder, at time.Time) (float64, bool) {
	if o.RateMlPerHour == nil || *o.RateMlPerHour <= 0 {
		return 0, false
	}
	h, _ := orderWindow(o, at)
	return h, h > 0
}

// RunHours is how long the order gives fluid within the 24 h from at, for
// the hourly limit: a rate-based order for InfusionHours; a dose-based
// order for its doses within the order's window (orderWindow, as
// Volume24h counts them) times the duration of each
// (timing.repeat.duration). ok is false when the order does not say (a
// dose with no duration).
func RunHours(o MedicationOrder, at time.Time) (float64, bool) {
	if h, ok := InfusionHours(o, at); ok {
		return h, true
	}
	if o.Dose == nil || o.Duration == nil {
		return 0, false
	}
	each, ok := DurationHours(*o.Duration)
	if !ok || each <= 0 {
		return 0, false
	}
	window, _ := orderWindow(o, at)
	if window <= 0 {
		return 0, false
	}
	n := 1.0
	if o.Frequency != nil && o.Period != nil {
		if h, known := DurationHours(*o.Period); known && h > 0 {
			n = math.Max(1, math.Floor(float64(*o.Frequency)*window/h))
		}
	}
	return math.Min(window, n*each), true
}

// VolumeMl converts a volume quantity (mL or L) to mL.
func VolumeMl(q Quantity) (float64, bool) {
	switch q.Unit {
	case "mL", "ml":
		return q.Value, true
	case "L", "l":
		return q.Value * 1000, true
	}
	return 0, false
}

// DurationHours converts a UCUM or FHIR UnitsOfTime duration to hours.
func DurationHours(q Quantity) (float64, bool) {
	switch q.Unit {
	case "h", "hr", "hour", "hours":
		return q.Value, true
	case "min":
		return q.Value / 60, true
	case "s":
		return q.Value / 3600, true
	case "d", "day", "days":
		return q.Value * 24, true
	case "wk":
		return q.Value * 24 * 7, true
	}
	return 0, false
}
