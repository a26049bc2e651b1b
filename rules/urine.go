package rules

import (
	"fmt"
	"math"
	"time"
)

// UrineLossPolicy says how recent urine output and composition are read for
// the projection that counts ongoing urine losses, and when urine output
// means an aquaresis.
type UrineLossPolicy struct {
	// WindowHours: urine volumes whose collection ended within this many
	// hours make the recent rate, which needs MinimumHours of them.
	WindowHours  float64 `json:"windowHours"`
	MinimumHours float64 `json:"minimumHours"`
	// CompositionMaxAgeHours: the urine sodium, potassium and osmolality used.
	CompositionMaxAgeHours float64 `json:"compositionMaxAgeHours"`
	// An aquaresis: urine output at least AquaresisMlPerHourAtLeast with
	// urine osmolality below AquaresisUrineOsmolalityBelow.
	AquaresisMlPerHourAtLeast     float64 `json:"aquaresisMlPerHourAtLeast"`
	AquaresisUrineOsmolalityBelow float64 `json:"aquaresisUrineOsmolalityBelow"`
	Source                        string  `json:"source"`
	DesalinationSource            string  `json:"desalinationSource"`
}

func (p UrineLossPolicy) validate() error {
	if p.WindowHours <= 0 || p.MinimumHours <= 0 || p.MinimumHours > p.WindowHours || p.CompositionMaxAgeHours <= 0 ||
		p.AquaresisMlPerHourAtLeast <= 0 || p.AquaresisUrineOsmolalityBelow <= 0 || p.Source == "" || p.DesalinationSource == "" {
		return fmt.Errorf("urineLosses needs positive windows and thresholds (minimumHours within windowHours) and its sources")
	}
	return nil
}

// UrineLosses is what the chart says of recent urine output and
// composition. Pointers are nil when the chart does not say.
type UrineLosses struct {
	// RateMlPerHour is the output over the recent collection periods
	// (Volumes, which do not overlap), Hours long.
	RateMlPerHour *float64
	Hours         float64
	Volumes       []Measurement
	Na, K         *Measurement
	Osmolality    *Measurement
}

// NaK is urine sodium + potassium, when both are known.
func (u UrineLosses) NaK() (float64, bool) {
	if u.Na == nil || u.K == nil {
		return 0, false
	}
	return u.Na.Value + u.K.Value, true
}

// Litres24h is the urine the next 24 h bring at the recent rate.
func (u UrineLosses) Litres24h() (float64, bool) {
	if u.RateMlPerHour == nil {
		return 0, false
	}
	return *u.RateMlPerHour * 24 / 1000, true
}

// Aquaresis reports whether the output is high and the urine dilute.
func (u UrineLosses) Aquaresis(p UrineLossPolicy) bool {
	return u.RateMlPerHour != nil && *u.RateMlPerHour >= p.AquaresisMlPerHourAtLeast &&
		u.Osmolality != nil && u.Osmolality.Value < p.AquaresisUrineOsmolalityBelow
}

// ReadUrineLosses reads the recent urine output and the latest urine
// composition from f.
func ReadUrineLosses(p UrineLossPolicy, f Facts) UrineLosses {
	var u UrineLosses
	from := f.At.Add(-time.Duration(p.WindowHours * float64(time.Hour)))
	vols := f.Labs[UrineVolume]
	var ml float64
	// Newest first; a period that overlaps one already counted is left out,
	// so no urine is counted twice.
	for i := len(vols) - 1; i >= 0; i-- {
		v := vols[i]
		if v.PeriodHours <= 0 || v.At.After(f.At) || v.At.Before(from) {
			continue
		}
		start := v.At.Add(-time.Duration(v.PeriodHours * float64(time.Hour)))
		overlaps := false
		for _, w := range u.Volumes {
			wStart := w.At.Add(-time.Duration(w.PeriodHours * float64(time.Hour)))
			if start.Before(w.At) && wStart.Before(v.At) {
				overlaps = true
			}
		}
		if overlaps {
			continue
		}
		u.Volumes = append(u.Volumes, v)
		ml += v.Value
		u.Hours += v.PeriodHours
	}
	if u.Hours >= p.MinimumHours {
		rate := ml / u.Hours
		u.RateMlPerHour = &rate
	}
	latest := func(a Analyte) *Measurement {
		if m, ok := latestWithin(f.Labs[a], f.At, p.CompositionMaxAgeHours); ok {
			return &m
		}
		return nil
	}
	u.Na, u.K, u.Osmolality = latest(UrineSodium), latest(UrinePotassium), latest(UrineOsmolality)
	return u
}

// ElectrolyteFreeWaterClearance is V × (1 − (U_Na + U_K)/P_Na), litres of
// water free of electrolytes the urine removes (the physiology Furst H et
// al., Am J Med Sci 2000 builds on; Rose's derivation from Edelman's
// relation, common practice).
func ElectrolyteFreeWaterClearance(litres, urineNaK, serumNa float64) float64 {
	return litres * (1 - urineNaK/serumNa)
}

// withUrine adds to in the urine of the next 24 h, as a negative volume of
// its Na + K: Na₂₄ = (Na·TBW + Σ(Na+K)ᵢVᵢ − (Na+K)ᵤVᵤ)/(TBW + ΣVᵢ − Vᵤ),
// the Edelman-based mass balance with ongoing losses.
func withUrine(in Infused, litres, urineNaK, serumNa float64) Infused {
	return in.Add(-litres, urineNaK, serumNa)
}

// sane reports whether a balance's volume leaves a positive body water.
func sane(in Infused, tbw float64) bool { return tbw+in.Litres > 0 && !math.IsInf(in.Excess, 0) }
