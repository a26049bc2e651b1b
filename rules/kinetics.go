package rules

import (
	"errors"
	"fmt"
	"math"
)

// Methods and formulas for sodium kinetics. Sources are named beside each;
// tests check them against published or derived check values.

// ErrNeedsSex means a formula needs a recorded sex of male or female; halite
// never assumes one.
var ErrNeedsSex = errors.New("needs the patient's sex (male or female)")

// TBWFraction is the Adrogué–Madias fraction of body weight that is water
// (Adrogué HJ, Madias NE, N Engl J Med 2000;342:1581–1589, table footnote):
// children 0.6; men 0.6 and women 0.5; elderly men 0.5 and elderly women
// 0.45. The child and elderly age cut-offs are policy values (the paper gives
// none).
func TBWFraction(t TBWPolicy, sex Sex, ageYears int) (float64, error) {
	if ageYears < t.AdultFromAge {
		return t.Child, nil
	}
	elderly := ageYears >= t.ElderlyFromAge
	switch sex {
	case SexMale:
		if elderly {
			return t.ElderlyMan, nil
		}
		return t.Man, nil
	case SexFemale:
		if elderly {
			return t.ElderlyWoman, nil
		}
		return t.Woman, nil
	}
	return 0, ErrNeedsSex
}

// WatsonTBW is total body water in litres by Watson PE, Watson ID, Batt RD,
// Am J Clin Nutr 1980;33:27–39. Men: 2.447 − 0.09516·age + 0.1074·height +
// 0.3362·weight; women: −2.097 + 0.1069·height + 0.2466·weight (age in years,
// height in cm, weight in kg).
func WatsonTBW(sex Sex, ageYears int, heightCm, weightKg float64) (float64, error) {
	switch sex {
	case SexMale:
		return 2.447 - 0.09516*float64(ageYears) + 0.1074*heightCm + 0.3362*weightKg, nil
	case SexFemale:
		return -2.097 + 0.1069*heightCm + 0.2466*weightKg, nil
	}
	return 0, ErrNeedsSex
}

// ProjectedChange is the change in serum sodium (mmol/L) after infusing
// volume litres of a fluid with sodium + potassium naK (mmol/L), by mass
// balance: ΔNa = V·(Na_inf + K_inf − Na)/(TBW + V) (Adrogué–Madias formula 2
// scaled to any volume; Chen S, Shey J, Kidney360 2021;2:365–370). It
// ignores urine output and other ongoing losses.
func ProjectedChange(volume, naK, serumNa, tbw float64) float64 {
	return volume * (naK - serumNa) / (tbw + volume)
}

// DeltaPerLitre is the Adrogué–Madias change per litre of infusate:
// (Na_inf + K_inf − Na)/(TBW + 1) (N Engl J Med 2000;342:1581–1589).
func DeltaPerLitre(naK, serumNa, tbw float64) float64 {
	return ProjectedChange(1, naK, serumNa, tbw)
}

// MaxVolume is the largest volume (litres) of infusate whose projected change
// stays within allowed (mmol/L, same sign as the change the fluid causes),
// solved from the same mass balance: V = allowed·TBW/(d − allowed) with
// d = Na_inf + K_inf − Na. It is +Inf when no volume can exceed allowed (the
// change approaches d as V grows), and 0 when nothing is allowed. It is
// MaxVolumeGiven with nothing else infused.
func MaxVolume(allowed, naK, serumNa, tbw float64) float64 {
	return MaxVolumeGiven(allowed, naK, serumNa, tbw, Infused{})
}

// Infused is what other fluids bring to a mass balance over 24 h: their
// volume ΣVᵢ (litres) and their excess Σ Vᵢ·(Na+Kᵢ − Na) (mmol), both
// relative to one serum sodium.
type Infused struct {
	Litres, Excess float64
}

// Add counts volume litres of a fluid with sodium + potassium naK.
func (in Infused) Add(litres, naK, serumNa float64) Infused {
	return Infused{in.Litres + litres, in.Excess + litres*(naK-serumNa)}
}

// CombinedChange is the change in serum sodium after all of in is given:
// Na₂₄ − Na = Σ Vᵢ·(Na+Kᵢ − Na)/(TBW + ΣVᵢ), the mass balance
// Na₂₄ = (Na·TBW + Σ(Na+K)ᵢ·Vᵢ)/(TBW + ΣVᵢ) over several infusates
// (Adrogué–Madias's balance, N Engl J Med 2000, applied to their sum;
// for one fluid it is ProjectedChange).
func CombinedChange(in Infused, tbw float64) float64 {
	return in.Excess / (tbw + in.Litres)
}

// MaxVolumeGiven is the largest volume (litres) of one infusate (sodium +
// potassium naK) that keeps the combined change within allowed (signed as
// the change the limits restrict) while the others, given as ordered,
// bring others: from (S + V·d)/(W + V) = allowed with S = others.Excess,
// W = TBW + others.Litres and d = naK − Na, V = (allowed·W − S)/(d −
// allowed). It is 0 when the others alone already reach allowed, and +Inf
// when no volume of this fluid can pass it (the change approaches d).
func MaxVolumeGiven(allowed, naK, serumNa, tbw float64, others Infused) float64 {
	d := naK - serumNa
	w := tbw + others.Litres
	if allowed == 0 && others.Excess == 0 {
		return 0
	}
	if d == 0 || math.Signbit(allowed) != math.Signbit(d) {
		return math.Inf(1)
	}
	if s := math.Copysign(1, allowed); s*others.Excess/w >= s*allowed {
		return 0
	}
	if math.Abs(d) <= math.Abs(allowed) {
		return math.Inf(1)
	}
	return (allowed*w - others.Excess) / (d - allowed)
}

// FreeWaterDeficit is the classic water deficit in litres,
// TBW × (Na/target − 1), with target 140 mmol/L in the classic form
// (Adrogué HJ, Madias NE, N Engl J Med 2000;342:1493–1499).
func FreeWaterDeficit(tbw, serumNa, target float64) float64 {
	return tbw * (serumNa/target - 1)
}

// glucoseMgPerDLPerMmol converts glucose mmol/L to mg/dL (molar mass
// 180.156 g/mol from IUPAC atomic weights: 1 mmol/L = 18.0156 mg/dL).
const glucoseMgPerDLPerMmol = 18.0156

// CorrectedSodium is sodium corrected for hyperglycaemia: Na + factor ×
// (glucose − 100 mg/dL)/100, for glucose above 100 mg/dL; factor 1.6 is Katz
// (N Engl J Med 1973;289:843–844), 2.4 Hillier (Am J Med 1999;106:399–403).
// Glucose is in mmol/L, as halite holds it.
func CorrectedSodium(na, glucoseMmol, factor float64) float64 {
	mg := glucoseMmol * glucoseMgPerDLPerMmol
	if mg <= 100 {
		return na
	}
	return na + factor*(mg-100)/100
}

// Correction factors for CorrectedSodium.
const (
	KatzFactor    = 1.6
	HillierFactor = 2.4
)

// CalculatedOsmolality is 2·Na + glucose + urea (all mmol/L), the SI form of
// the common calculated serum osmolality (mOsm/kg; common practice).
func CalculatedOsmolality(na, glucose, urea float64) float64 {
	return 2*na + glucose + urea
}

// EffectiveOsmolality (tonicity) leaves out urea, an ineffective osmole:
// 2·Na + glucose (mmol/L; common practice).
func EffectiveOsmolality(na, glucose float64) float64 {
	return 2*na + glucose
}

// BUNCreatinineRatio is the blood urea nitrogen to creatinine ratio in the
// conventional units (mg/dL to mg/dL) from urea in mmol/L and creatinine in
// µmol/L: BUN mg/dL = urea mmol/L × 2 × 14.007 g/mol ÷ 10 (two nitrogen atoms
// per urea), creatinine mg/dL = µmol/L × 113.12 g/mol ÷ 10,000 (IUPAC 2021
// atomic weights, as fhirmap converts them).
func BUNCreatinineRatio(ureaMmol, creatinineUmol float64) float64 {
	return ureaMmol * ureaNitrogenMgPerDLPerMmol / (creatinineUmol * creatinineMgPerDLPerMicromol)
}

// MostellerBSA is body-surface area in m², √(height cm × weight kg / 3600)
// (Mosteller RD, N Engl J Med 1987;317:1098).
func MostellerBSA(heightCm, weightKg float64) (float64, error) {
	if heightCm <= 0 || weightKg <= 0 {
		return 0, fmt.Errorf("body-surface area needs a positive height and weight")
	}
	return math.Sqrt(heightCm * weightKg / 3600), nil
}
