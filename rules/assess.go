package rules

import (
	"errors"
	"fmt"
	"math"
	"time"
)

// InfusionAssessment is the arithmetic for one sodium-moving order: the
// correction already achieved, the limits in force, and the projected
// change with the rate that fits. Pointers are nil when an input is
// missing; Missing says which, in words a card can use. It holds no
// wording or indicator: that is card policy.
type InfusionAssessment struct {
	Order       MedicationOrder
	Composition *Composition
	Latest      *Measurement // the latest sodium, if within the policy age
	Trend       SodiumTrend
	Risk        []RiskFactor
	// Hypernatremia is set when the latest sodium is above the policy
	// threshold: the fall limits apply instead of the rise limits.
	Hypernatremia bool
	// Limit24h and Limit48h are the limits in force (48 h: hyponatremia only).
	Limit24h, Limit48h float64
	// Achieved24h and Achieved48h are the rise from the nadir (hyponatremia)
	// or the fall from the peak (hypernatremia) already measured.
	Achieved24h, Achieved48h float64
	Weight                   *Measurement
	TBWLitres                *float64
	TBWMethod                string
	DeltaPerLitre            *float64
	Volume24hLitres          *float64
	VolumeBasis              string
	ProjectedChange24h       *float64
	ProjectedTotal24h        *float64 // achieved + projected, signed as the change
	MaxRateMlPerHour         *float64 // nil when no rate can exceed the limit, or inputs are missing
	LimitReached             bool     // nothing more is allowed in the window
	Missing                  []string
}

// AssessInfusion works out the assessment of order o on facts f.
func (r *Ruleset) AssessInfusion(f Facts, o MedicationOrder) InfusionAssessment {
	p := r.policy
	a := InfusionAssessment{Order: o, Trend: AnalyseSodium(f.Labs[Sodium], f.At)}
	if c, ok := r.InfusateComposition(o.Medication); ok {
		a.Composition = &c
	} else {
		a.Missing = append(a.Missing, "the infusate's sodium and potassium content")
	}
	if l, ok := latestWithin(f.Labs[Sodium], f.At, p.Projection.SodiumMaxAgeHours); ok {
		a.Latest = &l
	} else {
		a.Missing = append(a.Missing, fmt.Sprintf("a serum sodium from the last %g h", p.Projection.SodiumMaxAgeHours))
	}
	a.Risk = DemyelinationRisk(p.DemyelinationRisk, f, f.At)
	a.Hypernatremia = a.Latest != nil && a.Latest.Value > p.Projection.HypernatremiaAbove
	a.setLimits(p.Limits)

	if w, ok := latestWithin(f.Labs[BodyWeight], f.At, p.Projection.WeightMaxAgeHours); ok {
		a.Weight = &w
		if tbw, method, err := totalBodyWater(p.TBW, f, w.Value); err == nil && tbw > 0 {
			a.TBWLitres, a.TBWMethod = &tbw, method
		} else if err == nil {
			a.Missing = append(a.Missing, "a plausible total body water (the formula gave none for this weight)")
		} else {
			a.Missing = append(a.Missing, err.Error())
		}
	} else {
		a.Missing = append(a.Missing, fmt.Sprintf("a body weight from the last %g days", p.Projection.WeightMaxAgeHours/24))
	}
	if v, basis, ok := Volume24h(o); ok {
		a.Volume24hLitres, a.VolumeBasis = &v, basis
	} else {
		a.Missing = append(a.Missing, "the volume the order gives in 24 h (rate, or dose in mL)")
	}
	a.project()
	return a
}

func (a *InfusionAssessment) setLimits(l Limits) {
	if a.Hypernatremia {
		a.Limit24h = l.HypernatremiaFall24h.Value
		if w := a.Trend.Window24h; w != nil {
			a.Achieved24h = w.FallFromPeak
		}
		return
	}
	a.Limit24h, a.Limit48h = l.HyponatremiaRise24h.Value, l.HyponatremiaRise48h.Value
	if len(a.Risk) > 0 {
		a.Limit24h = l.HyponatremiaRise24hHighRisk.Value
	}
	if w := a.Trend.Window24h; w != nil {
		a.Achieved24h = w.RiseFromNadir
	}
	if w := a.Trend.Window48h; w != nil {
		a.Achieved48h = w.RiseFromNadir
	}
}

// project fills the projection when every input is there.
func (a *InfusionAssessment) project() {
	if a.Composition == nil || a.Latest == nil || a.TBWLitres == nil {
		return
	}
	naK, na, tbw := a.Composition.NaK(), a.Latest.Value, *a.TBWLitres
	d := DeltaPerLitre(naK, na, tbw)
	a.DeltaPerLitre = &d
	// The allowance left in the window, signed as the change it limits.
	allowed := a.Limit24h - a.Achieved24h
	if !a.Hypernatremia && a.Limit48h > 0 {
		allowed = math.Min(allowed, a.Limit48h-a.Achieved48h)
	}
	sign := 1.0
	if a.Hypernatremia {
		sign = -1
	}
	if allowed <= 0 {
		a.LimitReached = true
		allowed = 0
	}
	if a.Volume24hLitres != nil {
		c := ProjectedChange(*a.Volume24hLitres, naK, na, tbw)
		total := sign*a.Achieved24h + c
		a.ProjectedChange24h, a.ProjectedTotal24h = &c, &total
	}
	if v := MaxVolume(sign*allowed, naK, na, tbw); !math.IsInf(v, 1) {
		rate := v * 1000 / 24
		a.MaxRateMlPerHour = &rate
	}
}

// totalBodyWater applies the policy's method, never assuming a sex or age.
func totalBodyWater(t TBWPolicy, f Facts, weight float64) (float64, string, error) {
	age, ok := f.Patient.AgeYears(f.At)
	if !ok {
		return 0, "", errors.New("the patient's age (birth date)")
	}
	if t.Method == "watson" && age >= t.AdultFromAge {
		if h, ok := latestWithin(f.Labs[BodyHeight], f.At, math.Inf(1)); ok {
			tbw, err := WatsonTBW(f.Patient.Sex, age, h.Value, weight)
			if err != nil {
				return 0, "", errors.New("the patient's sex (male or female)")
			}
			return tbw, "Watson", nil
		}
	}
	fr, err := TBWFraction(t, f.Patient.Sex, age)
	if err != nil {
		return 0, "", errors.New("the patient's sex (male or female)")
	}
	return fr * weight, fmt.Sprintf("Adrogué–Madias (%g × weight)", fr), nil
}

// latestWithin returns the latest measurement taken no more than maxAgeHours
// before at.
func latestWithin(s []Measurement, at time.Time, maxAgeHours float64) (Measurement, bool) {
	for i := len(s) - 1; i >= 0; i-- {
		if s[i].At.After(at) {
			continue
		}
		if at.Sub(s[i].At).Hours() <= maxAgeHours {
			return s[i], true
		}
		break
	}
	return Measurement{}, false
}
