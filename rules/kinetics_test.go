package rules

import (
	"errors"
	"math"
	"testing"
	"testing/quick"
	"time"
)

// Infusate sodium + potassium (mmol/L), from halite's clinical reference
// notes §2.3: 3% NaCl 513 and 0.9% NaCl 154 and 0.45% NaCl 77 (FDA labels,
// Sodium Chloride Injection USP [V]); lactated Ringer's Na 130 + K 4 (FDA NDC
// directory composition [V]); 5% NaCl 855 and 0.2% NaCl in D5W 34 [derived
// from 50 and 2 g/L ÷ 58.44]; 5% dextrose 0.
const (
	na3pct   = 513
	na09pct  = 154
	na045pct = 77
	naLR     = 130 + 4
	na5pct   = 855
	na02D5W  = 34
	naD5W    = 0
)

func policy(t *testing.T) Policy {
	t.Helper()
	rs, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	return rs.Policy()
}

func near(a, b, tol float64) bool { return math.Abs(a-b) <= tol }

// TestAdrogueMadiasCheckValues reproduces the check values of the reference
// notes §2.4(c) [derived from the Adrogué–Madias formulas, N Engl J Med
// 2000;342:1581–1589 and 1493–1499; TBW fractions from the same papers'
// table footnote, from memory]. Ages are invented to select the fraction.
func TestAdrogueMadiasCheckValues(t *testing.T) {
	p := policy(t)
	for _, tc := range []struct {
		name         string
		sex          Sex
		age          int
		weight, na   float64
		naK          float64
		wantTBW      float64
		wantPerLitre float64
	}{
		{"60 kg woman, Na 112, 3%", SexFemale, 40, 60, 112, na3pct, 30, 12.935},
		{"70 kg man, Na 110, 3%", SexMale, 40, 70, 110, na3pct, 42, 9.372},
		{"68 kg elderly man, Na 168, D5W", SexMale, 70, 68, 168, naD5W, 34, -4.800},
		{"same, 0.2% NaCl in D5W", SexMale, 70, 68, 168, na02D5W, 34, -3.829},
		{"same, 0.45% NaCl", SexMale, 70, 68, 168, na045pct, 34, -2.600},
		{"same, lactated Ringer's", SexMale, 70, 68, 168, naLR, 34, -0.971},
		{"60 kg elderly woman, Na 110, 0.9% + KCl 40", SexFemale, 70, 60, 110, na09pct + 40, 27, 3.000},
		{"same, 0.9% alone", SexFemale, 70, 60, 110, na09pct, 27, 1.571},
		{"20 kg child, Na 118, 3%", SexMale, 6, 20, 118, na3pct, 12, 30.385},
		{"80 kg man, Na 120, 5%", SexMale, 40, 80, 120, na5pct, 48, 15.000},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f, err := TBWFraction(p.TBW, tc.sex, tc.age)
			if err != nil {
				t.Fatal(err)
			}
			tbw := f * tc.weight
			if !near(tbw, tc.wantTBW, 1e-9) {
				t.Errorf("TBW %.4f, want %.0f", tbw, tc.wantTBW)
			}
			if got := DeltaPerLitre(tc.naK, tc.na, tbw); !near(got, tc.wantPerLitre, 0.0005) {
				t.Errorf("ΔNa per litre %.4f, want %.3f", got, tc.wantPerLitre)
			}
		})
	}
}

func TestTBWFractionNeedsSex(t *testing.T) {
	p := policy(t)
	for _, s := range []Sex{SexMissing, SexOther, SexUnknown} {
		if _, err := TBWFraction(p.TBW, s, 40); !errors.Is(err, ErrNeedsSex) {
			t.Errorf("sex %q: got %v, want ErrNeedsSex (never a default)", s, err)
		}
	}
	// Children take 0.6 whatever the sex (Adrogué–Madias footnote, from memory).
	if f, err := TBWFraction(p.TBW, SexUnknown, 6); err != nil || f != 0.6 {
		t.Errorf("child: %v %v", f, err)
	}
	// The elderly cut-off is the policy's 65 years: 64 is adult, 65 elderly.
	if f, _ := TBWFraction(p.TBW, SexFemale, 64); f != 0.5 {
		t.Errorf("woman 64: %v, want 0.5", f)
	}
	if f, _ := TBWFraction(p.TBW, SexFemale, 65); f != 0.45 {
		t.Errorf("woman 65: %v, want 0.45", f)
	}
}

// TestWatson uses the check values of the reference notes §2.6 [derived from
// Watson PE, Watson ID, Batt RD, Am J Clin Nutr 1980;33:27–39, age
// coefficient 0.09516 as in the original].
func TestWatson(t *testing.T) {
	if got, _ := WatsonTBW(SexMale, 40, 175, 80); !near(got, 44.3316, 1e-4) {
		t.Errorf("man 40 y 175 cm 80 kg: %.4f, want 44.3316", got)
	}
	if got, _ := WatsonTBW(SexFemale, 30, 165, 65); !near(got, 31.5705, 1e-4) {
		t.Errorf("woman 165 cm 65 kg: %.4f, want 31.5705", got)
	}
	if _, err := WatsonTBW(SexUnknown, 30, 165, 65); !errors.Is(err, ErrNeedsSex) {
		t.Errorf("unknown sex: %v", err)
	}
}

// TestFreeWaterDeficit: check values of the reference notes §2.5 [derived,
// TBW × (Na/140 − 1)].
func TestFreeWaterDeficit(t *testing.T) {
	for _, tc := range []struct{ tbw, na, want float64 }{
		{42, 160, 6.000}, // 70 kg man
		{27, 155, 2.893}, // 60 kg elderly woman
		{34, 168, 6.800}, // 68 kg elderly man
	} {
		if got := FreeWaterDeficit(tc.tbw, tc.na, 140); !near(got, tc.want, 0.0005) {
			t.Errorf("TBW %g Na %g: %.4f L, want %.3f", tc.tbw, tc.na, got, tc.want)
		}
	}
}

// TestCorrectedSodium: Na 130 with glucose 600 mg/dL gives 138.0 by Katz
// (N Engl J Med 1973;289:843–844) and 142.0 by Hillier (Am J Med
// 1999;106:399–403) [derived, reference notes §3].
func TestCorrectedSodium(t *testing.T) {
	glucose := 600 / glucoseMgPerDLPerMmol // 600 mg/dL in mmol/L
	if got := CorrectedSodium(130, glucose, KatzFactor); !near(got, 138.0, 1e-9) {
		t.Errorf("Katz %.4f, want 138.0", got)
	}
	if got := CorrectedSodium(130, glucose, HillierFactor); !near(got, 142.0, 1e-9) {
		t.Errorf("Hillier %.4f, want 142.0", got)
	}
	if got := CorrectedSodium(130, 5, KatzFactor); got != 130 { // 90 mg/dL: no correction below 100
		t.Errorf("normal glucose corrected to %v", got)
	}
}

// TestOsmolality: SI form, Na 140, glucose 5, urea 5 → 290 [derived,
// reference notes §3]; effective osmolality leaves urea out.
func TestOsmolality(t *testing.T) {
	if got := CalculatedOsmolality(140, 5, 5); got != 290 {
		t.Errorf("calculated %v, want 290", got)
	}
	if got := EffectiveOsmolality(140, 5); got != 285 {
		t.Errorf("effective %v, want 285", got)
	}
}

// TestMosteller: 170 cm/70 kg → 1.8181 m² and 110 cm/18 kg → 0.7416 m²
// [derived from Mosteller RD, N Engl J Med 1987;317:1098; reference notes §9].
func TestMosteller(t *testing.T) {
	for _, tc := range []struct{ h, w, want float64 }{{170, 70, 1.8181}, {110, 18, 0.7416}} {
		if got, err := MostellerBSA(tc.h, tc.w); err != nil || !near(got, tc.want, 1e-4) {
			t.Errorf("%g cm %g kg: %.4f %v, want %.4f", tc.h, tc.w, got, err, tc.want)
		}
	}
	if _, err := MostellerBSA(0, 70); err == nil {
		t.Error("zero height accepted")
	}
}

// Properties of the mass balance (the property tests).
func TestProjectionProperties(t *testing.T) {
	cfg := &quick.Config{MaxCount: 2000}
	// V = 1 L reproduces Adrogué–Madias exactly.
	oneLitre := func(naK, na, tbw float64) bool {
		naK, na, tbw = math.Abs(math.Mod(naK, 900)), 100+math.Abs(math.Mod(na, 80)), 5+math.Abs(math.Mod(tbw, 60))
		return ProjectedChange(1, naK, na, tbw) == (naK-na)/(tbw+1)
	}
	if err := quick.Check(oneLitre, cfg); err != nil {
		t.Error(err)
	}
	// Monotone in volume (so in rate) and in infusate sodium.
	monotone := func(v, naK, na, tbw float64) bool {
		v, naK = math.Abs(math.Mod(v, 5)), math.Abs(math.Mod(naK, 900))
		na, tbw = 100+math.Abs(math.Mod(na, 80)), 5+math.Abs(math.Mod(tbw, 60))
		up := ProjectedChange(v, naK, na, tbw) <= ProjectedChange(v, naK+1, na, tbw)
		if naK > na {
			return up && ProjectedChange(v, naK, na, tbw) <= ProjectedChange(v+0.1, naK, na, tbw)
		}
		return up && ProjectedChange(v, naK, na, tbw) >= ProjectedChange(v+0.1, naK, na, tbw)
	}
	if err := quick.Check(monotone, cfg); err != nil {
		t.Error(err)
	}
	// The largest volume within an allowance projects exactly that allowance.
	fits := func(allowed, naK, na, tbw float64) bool {
		allowed, naK = 0.5+math.Abs(math.Mod(allowed, 12)), 300+math.Abs(math.Mod(naK, 600))
		na, tbw = 100+math.Abs(math.Mod(na, 30)), 5+math.Abs(math.Mod(tbw, 60))
		v := MaxVolume(allowed, naK, na, tbw)
		return math.IsInf(v, 1) || near(ProjectedChange(v, naK, na, tbw), allowed, 0.01)
	}
	if err := quick.Check(fits, cfg); err != nil {
		t.Error(err)
	}
}

func TestMaxVolumeEdges(t *testing.T) {
	// 60 kg woman (TBW 30), Na 112, 3% saline, 8 mmol/L allowed: V = 8·30/(401 − 8)
	// [derived from the mass balance].
	if got := MaxVolume(8, na3pct, 112, 30); !near(got, 240.0/393, 1e-12) {
		t.Errorf("got %v", got)
	}
	if got := MaxVolume(0, na3pct, 112, 30); got != 0 {
		t.Errorf("nothing allowed: %v, want 0", got)
	}
	// 0.9% saline at Na 150 lowers sodium: a rise allowance never binds.
	if got := MaxVolume(8, na09pct, 150, 30); !math.IsInf(got, 1) {
		t.Errorf("opposite direction: %v, want +Inf", got)
	}
	// Hypernatremia, D5W, 68 kg elderly man (TBW 34), Na 168, fall of 10 allowed.
	v := MaxVolume(-10, naD5W, 168, 34)
	if !near(ProjectedChange(v, naD5W, 168, 34), -10, 1e-9) {
		t.Errorf("falls: V %v gives %v", v, ProjectedChange(v, naD5W, 168, 34))
	}
}

// TestAnalyseSodium on an invented series: nadir, peak, latest and hourly
// rate in rolling 24-h and 48-h windows.
func TestAnalyseSodium(t *testing.T) {
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	m := func(hoursAgo, v float64) Measurement {
		return Measurement{Analyte: Sodium, Value: v, At: at.Add(-time.Duration(hoursAgo * float64(time.Hour)))}
	}
	series := []Measurement{m(60, 110), m(40, 114), m(20, 118), m(6, 121), m(2, 123), m(-1, 130)}
	tr := AnalyseSodium(series, at)
	w24, w48 := tr.Window24h, tr.Window48h
	if w24 == nil || w48 == nil {
		t.Fatal("windows missing")
	}
	// The window's start is interpolated from the values either side:
	// 24 h: 114 at −40 h, 118 at −20 h → 117.2 at −24 h; rise 123 − 117.2.
	// 48 h: 110 at −60 h, 114 at −40 h → 112.4 at −48 h; rise 123 − 112.4.
	if w24.Start == nil || !near(w24.Nadir.Value, 117.2, 1e-9) || w24.Latest.Value != 123 || !near(w24.RiseFromNadir, 5.8, 1e-9) || len(w24.Used) != 4 {
		t.Errorf("24 h: %+v", w24)
	}
	if !near(w48.Nadir.Value, 112.4, 1e-9) || !near(w48.RiseFromNadir, 10.6, 1e-9) || w48.FallFromPeak != 0 {
		t.Errorf("48 h: %+v", w48)
	}
	// A rise that straddles the window's start (the review's case: 110 at
	// −25 h, 119.5 at −1 h) counts 9.5 × 23/24 of it, not nothing.
	straddle := AnalyseSodium([]Measurement{m(25, 110), m(1, 119.5)}, at)
	if !near(straddle.Window24h.RiseFromNadir, 9.5*23/24, 1e-9) {
		t.Errorf("straddling rise %v, want %v", straddle.Window24h.RiseFromNadir, 9.5*23/24)
	}
	falling := AnalyseSodium([]Measurement{m(20, 161), m(10, 156), m(1, 150)}, at)
	if falling.Window24h.FallFromPeak != 11 || falling.Window24h.RiseFromNadir != 0 {
		t.Errorf("falling: %+v", falling.Window24h)
	}
	if empty := AnalyseSodium([]Measurement{m(72, 120)}, at); empty.Window24h != nil || empty.Window48h != nil {
		t.Errorf("a value outside both windows must leave them empty: %+v", empty)
	}
}

// TestTonicity: the context figures for Na 130 with glucose 600 mg/dL and
// urea 5 mmol/L: Katz 138.0, Hillier 142.0 [derived, reference notes §3];
// calculated osmolality 298.3 and an osmolal gap against a measured 310;
// with the measured value, effective osmolality is measured − urea = 305
// (hypertonic), else 2·130 + 33.3 = 293.3 (isotonic). A glucose two days
// away is not used.
func TestTonicity(t *testing.T) {
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	g := 600 / glucoseMgPerDLPerMmol
	na := Measurement{Analyte: Sodium, Value: 130, At: at.Add(-time.Hour)}
	f := Facts{At: at, Labs: map[Analyte][]Measurement{
		Glucose:         {{Analyte: Glucose, Value: g, At: at.Add(-time.Hour)}},
		Urea:            {{Analyte: Urea, Value: 5, At: at.Add(-2 * time.Hour)}},
		SerumOsmolality: {{Analyte: SerumOsmolality, Value: 310, At: at.Add(-time.Hour)}},
	}}
	c := Tonicity(f, na, 24)
	if c.CorrectedKatz == nil || !near(*c.CorrectedKatz, 138, 1e-9) || !near(*c.CorrectedHillier, 142, 1e-9) {
		t.Fatalf("corrected %v %v", c.CorrectedKatz, c.CorrectedHillier)
	}
	if *c.EffectiveOsmolality != 305 || !near(*c.CalculatedOsmolality, 265+g, 1e-9) ||
		!near(*c.OsmolalGap, 310-265-g, 1e-9) || c.Class != Hypertonic || len(c.Inputs) != 3 {
		t.Errorf("%+v", c)
	}
	delete(f.Labs, SerumOsmolality)
	if c := Tonicity(f, na, 24); !near(*c.EffectiveOsmolality, 260+g, 1e-9) || c.Class != Isotonic || c.OsmolalGap != nil {
		t.Errorf("without a measured value: %+v", c)
	}
	// Na 118, glucose 5 mmol/L: effective 241, hypotonic; no correction below 100 mg/dL.
	f.Labs[Glucose][0].Value = 5
	if c := Tonicity(f, Measurement{Analyte: Sodium, Value: 118, At: at}, 24); c.Class != Hypotonic || c.CorrectedKatz != nil {
		t.Errorf("%+v", c)
	}
	f.Labs[Glucose][0].At = at.Add(-48 * time.Hour)
	if c := Tonicity(f, na, 24); c.EffectiveOsmolality != nil || c.Class != "" {
		t.Errorf("a glucose 47 h from the sodium was used: %+v", c)
	}
}
