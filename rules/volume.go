package rules

import (
	"fmt"
	"math"
)

// Volume24h is the volume (litres) an order would give in the next 24 h,
// and how it was worked out: from an infusion rate (bounded by the ordered
// course, boundsDuration, and the ordered total, dispenseRequest.quantity),
// or from a bolus dose in mL repeated per its timing. ok is false when the
// order says neither, or gives a rate or dose that is not positive; nothing
// is assumed.
func Volume24h(o MedicationOrder) (litres float64, basis string, ok bool) {
	window := 24.0
	if o.Bounds != nil {
		if h, known := DurationHours(*o.Bounds); known && h < window {
			window = h
		}
	}
	total := math.Inf(1)
	if o.DispenseQuantity != nil {
		if ml, known := VolumeMl(*o.DispenseQuantity); known && ml > 0 {
			total = ml
		}
	}
	switch {
	case o.RateMlPerHour != nil && *o.RateMlPerHour <= 0:
		return 0, "", false
	case o.RateMlPerHour != nil:
		ml := *o.RateMlPerHour * window
		basis = fmt.Sprintf("%s mL/h for %s h", orderRate.of(*o.RateMlPerHour), orderHours.of(window))
		if ml > total {
			ml, basis = total, basis+fmt.Sprintf(", capped at the ordered %s mL", orderMl.of(total))
		}
		return ml / 1000, basis, true
	case o.Dose != nil:
		dose, known := VolumeMl(*o.Dose)
		if !known || dose <= 0 {
			return 0, "", false
		}
		n := 1.0
		basis = fmt.Sprintf("one dose of %s mL", orderMl.of(dose))
		if o.Frequency != nil && o.Period != nil {
			if h, known := DurationHours(*o.Period); known && h > 0 {
				n = math.Floor(float64(*o.Frequency) * window / h)
				if n < 1 {
					n = 1
				}
				basis = fmt.Sprintf("%s doses of %s mL in %s h", doseCount.of(n), orderMl.of(dose), orderHours.of(window))
			}
		}
		ml := math.Min(n*dose, total)
		return ml / 1000, basis, true
	}
	return 0, "", false
}

// InfusionHours is how long, within the next 24 h, a rate-based order runs
// at its rate: 24 h, or the ordered course when shorter. ok is false for an
// order without a rate (a bolus), for which a rate that fits is not given.
func InfusionHours(o MedicationOrder) (float64, bool) {
	if o.RateMlPerHour == nil || *o.RateMlPerHour <= 0 {
		return 0, false
	}
	if o.Bounds != nil {
		if h, known := DurationHours(*o.Bounds); known && h > 0 && h < 24 {
			return h, true
		}
	}
	return 24, true
}

// RunHours is how long the order gives fluid within the next 24 h, for
// the hourly limit: a rate-based order runs for 24 h, its ordered course
// or until its ordered total is given, whichever is first; a dose-based
// order for its doses times the duration of each (timing.repeat.duration).
// ok is false when the order does not say (a dose with no duration).
func RunHours(o MedicationOrder) (float64, bool) {
	if h, ok := InfusionHours(o); ok {
		if o.DispenseQuantity != nil {
			if ml, known := VolumeMl(*o.DispenseQuantity); known && ml > 0 && ml / *o.RateMlPerHour < h {
				h = ml / *o.RateMlPerHour
			}
		}
		return h, true
	}
	if o.Dose == nil || o.Duration == nil {
		return 0, false
	}
	each, ok := DurationHours(*o.Duration)
	if !ok || each <= 0 {
		return 0, false
	}
	n := 1.0
	if o.Frequency != nil && o.Period != nil {
		if h, known := DurationHours(*o.Period); known && h > 0 {
			n = math.Max(1, math.Floor(float64(*o.Frequency)*24/h))
		}
	}
	return math.Min(24, n*each), true
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
