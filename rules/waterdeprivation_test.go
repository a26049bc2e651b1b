package rules

import (
	"strings"
	"testing"
	"time"
)

// wdtFacts is an invented water deprivation test: urine osmolalities at
// −18, −16 and −14 h (the last urineEnd), desmopressin at −14 h, serum
// osmolality serumEnd and sodium sodiumEnd at −14 h, and the urine
// osmolality after at −12 h (none when 0).
func wdtFacts(t *testing.T, urineEnd, serumEnd, sodiumEnd, after float64) Facts {
	f := chartFacts(t, "1980-02-02", map[float64]float64{22: 139, 14: sodiumEnd, 2: 141},
		lab(UrineOsmolality, urineEnd*0.8, 18), lab(UrineOsmolality, urineEnd*0.9, 16), lab(UrineOsmolality, urineEnd, 14),
		lab(SerumOsmolality, 286, 22), lab(SerumOsmolality, serumEnd, 14), lab(BodyWeight, 70, 22), lab(BodyWeight, 67.8, 14))
	if after > 0 {
		f.Labs[UrineOsmolality] = append(f.Labs[UrineOsmolality], lab(UrineOsmolality, after, 12))
	}
	given := chartAt.Add(-14 * time.Hour)
	f.Given = []MedicationOrder{{Reference: "MedicationAdministration/ddavp", Status: "completed", GivenAt: &given,
		Medication: Medication{Text: "desmopressin 4 micrograms/mL injection"}}}
	return f
}

// TestWaterDeprivationCriteria reads invented tests at each range of the
// criteria of Miller M et al., Ann Intern Med 1970;73:721-729 (reference
// notes §4.4): normal above 2 × serum with a rise under 9 %; complete
// central below serum with a rise above 50 %; partial central 10–50 %;
// nephrogenic below 2 × serum with a rise under 9 %; dehydration adequate
// above a serum osmolality of 295 or a sodium of 145 (§4.4, from memory).
func TestWaterDeprivationCriteria(t *testing.T) {
	rs := loadRuleset(t)
	for _, tc := range []struct {
		name                       string
		urineEnd, serum, na, after float64
		want                       WaterDeprivationOutcome
		rise, ratio                float64
	}{
		// 140 < 302; (320 − 140)/140 = 128.6 %
		{"complete central", 140, 302, 148, 320, WDTCompleteCentral, 128.6, 0.46},
		// 400/299 = 1.34 < 2; (520 − 400)/400 = 30 %
		{"partial central", 400, 299, 147, 520, WDTPartialCentral, 30, 1.34},
		// 175/305 = 0.57; (185 − 175)/175 = 5.7 %
		{"nephrogenic", 175, 305, 149, 185, WDTNephrogenic, 5.7, 0.57},
		// 820/293 = 2.80 ≥ 2; (850 − 820)/820 = 3.7 %
		{"normal or primary polydipsia", 820, 293, 143, 850, WDTNormalOrPolydipsia, 3.7, 2.8},
		// 340/289 = 1.18, serum 289 < 295, sodium 142 < 145: not adequate
		{"stopped early", 340, 289, 142, 360, WDTNotAdequate, 5.9, 1.18},
		// sodium 146 alone makes it adequate; (600 − 500)/500 = 20 % with 500/294 = 1.70
		{"adequate by sodium alone", 500, 294, 146, 600, WDTPartialCentral, 20, 1.70},
		// sodium 145 and serum 294 are not above the thresholds
		{"sodium at 145 is not adequate", 500, 294, 145, 600, WDTNotAdequate, 20, 1.70},
		// 590/295 = 2.00 is not above 2: (610 − 590)/590 = 3.4 % — urine below 2 × serum with no response
		{"ratio of exactly 2", 590, 295, 146, 610, WDTNephrogenic, 3.4, 2},
		// (200 − 182)/182 = 9.9 %: between the ranges
		{"rise between 9 and 10", 182, 300, 147, 200, WDTIndeterminate, 9.9, 0.61},
		// (760 − 660)/660 = 15.2 % while already above 2 × serum: not a range
		{"concentrated, still rising", 660, 296, 146, 760, WDTIndeterminate, 15.2, 2.23},
		// (480 − 300)/300 = 60 % with 300/297 = 1.01: urine not below serum, so central but not complete
		{"central, urine above serum", 300, 297, 146, 480, WDTCentral, 60, 1.01},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := wdtFacts(t, tc.urineEnd, tc.serum, tc.na, tc.after)
			w, ok := rs.ReadWaterDeprivationTest(f)
			if !ok {
				t.Fatal("no test read")
			}
			if w.Outcome != tc.want || Round(*w.RisePercent, 1) != tc.rise || Round(*w.UrinePlasmaRatio, 2) != tc.ratio {
				t.Errorf("outcome %q rise %.1f ratio %.2f, want %q %.1f %.2f", w.Outcome, *w.RisePercent, *w.UrinePlasmaRatio, tc.want, tc.rise, tc.ratio)
			}
			if w.WeightLossPercent == nil || Round(*w.WeightLossPercent, 1) != 3.1 { // (70 − 67.8)/70
				t.Errorf("weight loss %v", w.WeightLossPercent)
			}
			fs := rs.Evaluate(ChartReview, f)
			var card *Finding
			for i := range fs {
				if fs[i].Rule == RuleWaterDeprivationTest {
					card = &fs[i]
				}
				if fs[i].Rule == RuleConcentratingDefect {
					t.Errorf("concentrating-defect card beside the test reading: %s", fs[i].Summary)
				}
			}
			if card == nil || !strings.Contains(card.Detail, string(tc.want)) || len([]rune(card.Summary)) >= 140 || strings.HasSuffix(card.Summary, "…") ||
				strings.Contains(card.Summary, "fits no") || strings.Contains(card.Summary, "()") {
				t.Fatalf("card %+v", card)
			}
			if tc.want == WDTNotAdequate && !strings.Contains(card.Detail, "NOT adequate") {
				t.Errorf("an early stop is not flagged:\n%s", card.Detail)
			}
		})
	}
}

// TestWaterDeprivationFound: no test without a desmopressin dose given, with
// fewer than two urine osmolalities before it, or with a dose older than
// the policy's 7 days; no reading while the response window is open without
// a result; a late result says the response cannot be read.
func TestWaterDeprivationFound(t *testing.T) {
	rs := loadRuleset(t)
	f := wdtFacts(t, 140, 302, 148, 320)
	f.Given = nil
	if _, ok := rs.ReadWaterDeprivationTest(f); ok {
		t.Error("read without a dose")
	}
	f = wdtFacts(t, 140, 302, 148, 320)
	f.Labs[UrineOsmolality] = f.Labs[UrineOsmolality][2:]
	if _, ok := rs.ReadWaterDeprivationTest(f); ok {
		t.Error("read with one urine osmolality before the dose")
	}
	f = wdtFacts(t, 140, 302, 148, 320)
	f.At = chartAt.Add(8 * 24 * time.Hour)
	if _, ok := rs.ReadWaterDeprivationTest(f); ok {
		t.Error("read a test 8 days old")
	}
	f = wdtFacts(t, 140, 302, 148, 0)
	f.At = chartAt.Add(-12 * time.Hour) // 2 h after the dose, no result yet
	if _, ok := rs.ReadWaterDeprivationTest(f); ok {
		t.Error("read while the response window is open")
	}
	f = wdtFacts(t, 140, 302, 148, 0)
	w, ok := rs.ReadWaterDeprivationTest(f)
	if !ok || w.UrineAfter != nil || w.Outcome != WDTNoResponse {
		t.Errorf("no response: %+v", w)
	}
	// A desmopressin dose in the 24 h before is treatment: the later dose
	// ends no test, and nor does the earlier (one urine result before it).
	f = wdtFacts(t, 140, 302, 148, 320)
	earlier := chartAt.Add(-20 * time.Hour)
	f.Given = append(f.Given, MedicationOrder{Reference: "MedicationAdministration/ddavp-0", GivenAt: &earlier, Medication: f.Given[0].Medication})
	if w, ok := rs.ReadWaterDeprivationTest(f); ok {
		t.Errorf("read a treatment dose as a test: %+v", w)
	}
	// A sodium below 135 in the window: a correction clamped with
	// desmopressin, not a deprivation.
	f = wdtFacts(t, 140, 302, 148, 320)
	f.Labs[Sodium] = append([]Measurement{lab(Sodium, 124, 20)}, f.Labs[Sodium]...)
	if _, ok := rs.ReadWaterDeprivationTest(f); ok {
		t.Error("read a desmopressin clamp of a hyponatremia as a test")
	}
	// One weight only: no test (a test is weighed through).
	f = wdtFacts(t, 140, 302, 148, 320)
	f.Labs[BodyWeight] = f.Labs[BodyWeight][1:]
	if _, ok := rs.ReadWaterDeprivationTest(f); ok {
		t.Error("read a test without weights")
	}
	// Pituitary surgery three days before the dose: desmopressin after
	// serial urine osmolalities is treatment of the postoperative course.
	f = wdtFacts(t, 140, 302, 148, 320)
	f.Procedures = []Procedure{{Reference: "Procedure/tss", Codings: []Coding{{System: "http://snomed.info/sct", Code: "45368001"}},
		At: chartAt.Add(-4 * 24 * time.Hour)}}
	if _, ok := rs.ReadWaterDeprivationTest(f); ok {
		t.Error("read a postoperative dose as a test")
	}
	// A treatment dose two hours ago, after the test: the test is still read.
	f = wdtFacts(t, 140, 302, 148, 320)
	later := chartAt.Add(-2 * time.Hour)
	f.Given = append(f.Given, MedicationOrder{Reference: "MedicationAdministration/ddavp-2", GivenAt: &later, Medication: f.Given[0].Medication})
	if w, ok := rs.ReadWaterDeprivationTest(f); !ok || w.Dose.Reference != "MedicationAdministration/ddavp" || w.Outcome != WDTCompleteCentral {
		t.Errorf("a later treatment dose hid the test: %v %+v", ok, w)
	}
	f = wdtFacts(t, 140, 302, 148, 320)
	f.Given[0].Medication = Medication{Text: "paracetamol 1 g"}
	if _, ok := rs.ReadWaterDeprivationTest(f); ok {
		t.Error("read a test after a dose that is not desmopressin")
	}
}

// TestWaterDeprivationCopeptin reads copeptin by the published cut-offs:
// above 4.9 pmol/L with sodium ≥ 150 points to primary polydipsia, 4.9 or
// less to central DI (Fenske W et al., N Engl J Med 2018;379:428-439); an
// unstimulated copeptin above 21.4 pmol/L to nephrogenic DI (Timper K et
// al., J Clin Endocrinol Metab 2015).
func TestWaterDeprivationCopeptin(t *testing.T) {
	rs := loadRuleset(t)
	for _, tc := range []struct {
		name string
		cop  []Measurement
		na   []Measurement
		want string
	}{
		{"stimulated, above 4.9", []Measurement{lab(Copeptin, 6.2, 14)}, []Measurement{lab(Sodium, 151, 14)}, "points to primary polydipsia"},
		{"stimulated, at 4.9", []Measurement{lab(Copeptin, 4.9, 14)}, []Measurement{lab(Sodium, 150, 14)}, "points to central DI"},
		{"sodium below 150", []Measurement{lab(Copeptin, 3, 14)}, []Measurement{lab(Sodium, 148, 14)}, "no published cut-off applies"},
		{"baseline above 21.4", []Measurement{lab(Copeptin, 25, 23)}, nil, "points to nephrogenic DI"},
		{"baseline 21.4", []Measurement{lab(Copeptin, 21.4, 23)}, nil, "not above 21.4"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := wdtFacts(t, 175, 305, 149, 185)
			f.Labs[Copeptin] = tc.cop
			if tc.na != nil {
				f.Labs[Sodium] = []Measurement{lab(Sodium, 139, 22), tc.na[0], lab(Sodium, 141, 2)}
			}
			for _, fd := range rs.Evaluate(ChartReview, f) {
				if fd.Rule == RuleWaterDeprivationTest {
					if !strings.Contains(fd.Detail, tc.want) {
						t.Errorf("detail lacks %q:\n%s", tc.want, fd.Detail)
					}
					return
				}
			}
			t.Fatal("no test card")
		})
	}
}

// TestWaterDeprivationLeavesLaterFindings: the test's reading hides the
// concentrating-defect card built from the test's own urine, not one built
// from a later urine (invented: a new sodium of 149 with urine of 150
// mOsm/kg nine hours after the response window closed).
func TestWaterDeprivationLeavesLaterFindings(t *testing.T) {
	rs := loadRuleset(t)
	rules := func(f Facts) map[string]bool {
		out := map[string]bool{}
		for _, fd := range rs.Evaluate(ChartReview, f) {
			out[fd.Rule] = true
		}
		return out
	}
	// The urine after desmopressin, 260 mOsm/kg, is dilute beside a sodium
	// of 149: without the test it would make a concentrating-defect card.
	f := wdtFacts(t, 140, 302, 148, 260)
	f.Labs[Sodium] = []Measurement{lab(Sodium, 139, 22), lab(Sodium, 148, 14), lab(Sodium, 149, 11)}
	if got := rules(f); !got[RuleWaterDeprivationTest] || got[RuleConcentratingDefect] {
		t.Errorf("within the test: %v", got)
	}
	f.Labs[Sodium] = append(f.Labs[Sodium], lab(Sodium, 149, 1))
	f.Labs[UrineOsmolality] = append(f.Labs[UrineOsmolality], lab(UrineOsmolality, 150, 0.5))
	if got := rules(f); !got[RuleWaterDeprivationTest] || !got[RuleConcentratingDefect] {
		t.Errorf("after the test: %v", got)
	}
}
