package rules

import "time"

// Tonicity classes of effective osmolality (mOsm/kg).
const (
	Hypotonic  = "hypotonic"  // below 275 (Verbalis JG et al., Am J Med 2013; from memory)
	Isotonic   = "isotonic"   // 275–295, the usual reference interval (from memory; lab-specific)
	Hypertonic = "hypertonic" // above 295
)

// Bounds of the tonicity classes, mOsm/kg (see the class constants).
const (
	hypotonicBelow  = 275
	hypertonicAbove = 295
)

// TonicityContext puts a sodium value in context: glucose-corrected
// sodium, calculated and effective osmolality, the osmolal gap and the
// tonicity class. Each figure is nil, or Class empty, when its inputs are
// missing; Inputs lists the values used.
type TonicityContext struct {
	CorrectedKatz, CorrectedHillier *float64 // mmol/L; only when glucose is above 100 mg/dL
	CalculatedOsmolality            *float64 // 2·Na + glucose + urea
	EffectiveOsmolality             *float64 // measured − urea when both exist, else 2·Na + glucose
	EffectiveBasis                  string   // how EffectiveOsmolality was found
	MeasuredOsmolality              *float64
	OsmolalGap                      *float64 // measured − calculated
	Class                           string   // by effective osmolality
	Inputs                          []Measurement
}

// Tonicity works out the context of sodium na from the glucose, urea and
// measured osmolality results taken within maxApartHours of it.
func Tonicity(f Facts, na Measurement, maxApartHours float64) TonicityContext {
	var c TonicityContext
	near := func(a Analyte) *Measurement {
		best := nearest(f.Labs[a], na, maxApartHours, f)
		if best != nil {
			c.Inputs = append(c.Inputs, *best)
		}
		return best
	}
	glucose, urea, measured := near(Glucose), near(Urea), near(SerumOsmolality)
	if glucose != nil {
		if glucose.Value*glucoseMgPerDLPerMmol > 100 {
			katz, hillier := CorrectedSodium(na.Value, glucose.Value, KatzFactor), CorrectedSodium(na.Value, glucose.Value, HillierFactor)
			c.CorrectedKatz, c.CorrectedHillier = &katz, &hillier
		}
		eff := EffectiveOsmolality(na.Value, glucose.Value)
		c.EffectiveOsmolality, c.EffectiveBasis = &eff, "2·Na + glucose"
		if urea != nil {
			calc := CalculatedOsmolality(na.Value, glucose.Value, urea.Value)
			c.CalculatedOsmolality = &calc
		}
	}
	if measured != nil {
		c.MeasuredOsmolality = &measured.Value
		if c.CalculatedOsmolality != nil {
			gap := measured.Value - *c.CalculatedOsmolality
			c.OsmolalGap = &gap
		}
		// A measured osmolality counts every osmole, seen or not (glucose,
		// mannitol, alcohols); less urea, it is the better effective value.
		if urea != nil {
			eff := measured.Value - urea.Value
			c.EffectiveOsmolality, c.EffectiveBasis = &eff, "measured osmolality − urea"
		}
	}
	if c.EffectiveOsmolality != nil {
		switch eff := *c.EffectiveOsmolality; {
		case eff < hypotonicBelow:
			c.Class = Hypotonic
		case eff > hypertonicAbove:
			c.Class = Hypertonic
		default:
			c.Class = Isotonic
		}
	}
	return c
}

func absDuration(d time.Duration) time.Duration {
	if d < 0 {
		return -d
	}
	return d
}
