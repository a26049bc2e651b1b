package rules

import (
	"strings"
	"testing"
	"time"
)

// TestRestrictionCheck checks draft fluid restrictions (FHIR R4
// NutritionOrder: diet type SNOMED CT 226208002, fluid nutrient 33463005)
// on invented facts: against the urine-to-plasma ratio band (Furst 2000 in
// the three-band form, reference notes §4.1: (80 + 30)/127 = 0.87, the
// 500-700 mL/day band), and the cautions — a brain-injury context leaning
// towards salt wasting (Maesaka 2009), a subarachnoid haemorrhage (AHA/ASA
// 2023, from memory), a vaptan (US tolvaptan information), a sodium above
// 145, a child's volume below insensible losses of 400 mL/m²/day (§9).
func TestRestrictionCheck(t *testing.T) {
	rs := loadRuleset(t)
	const adult, child = "1970-01-10", "2018-06-15"
	restriction := func(ml float64) NutritionOrder {
		return NutritionOrder{Reference: "NutritionOrder/fr", Selected: true, TypeText: "Fluid restricted diet",
			Types:     []Coding{{System: "http://snomed.info/sct", Code: "226208002"}},
			Nutrients: []Nutrient{{Codings: []Coding{{System: "http://snomed.info/sct", Code: "33463005"}}, Amount: &Quantity{Value: ml, Unit: "mL"}}}}
	}
	siadh := func(birth string, na map[float64]float64, extra ...Measurement) Facts {
		f := chartFacts(t, birth, na, append([]Measurement{lab(Glucose, 5, 2), lab(Urea, 3, 2), lab(Creatinine, 60, 2),
			lab(UrineOsmolality, 480, 1), lab(UrineSodium, 80, 1), lab(UrinePotassium, 30, 1)}, extra...)...)
		return f
	}
	onset := chartAt.Add(-4 * 24 * time.Hour)
	icd := func(ref, code string) Condition {
		return Condition{Reference: ref, ClinicalStatus: "active", Onset: &onset, Codings: []Coding{{System: "http://hl7.org/fhir/sid/icd-10-cm", Code: code}}}
	}
	for _, tc := range []struct {
		name  string
		f     Facts
		n     NutritionOrder
		rule  string // "" for none
		lines []string
	}{
		{"above the band", siadh(adult, map[float64]float64{30: 128, 2: 127}), restriction(1500), RuleRestrictionReview,
			[]string{"(80 + 30)/127 = 0.87", "the ordered 1500 mL/day is above the about 700 mL/day", "above the about 700 mL/day the urine-to-plasma ratio implies"}},
		{"within the band", siadh(adult, map[float64]float64{30: 128, 2: 127}), restriction(600), RuleRestrictionReview,
			[]string{"(80 + 30)/127 = 0.87", "600 mL/day", "!above the about"}},
		// Pituitary surgery yesterday; sodium 140 → 144 with urine of 120
		// mOsm/kg and 350, 340, 320 mL in the last three hours.
		{"a diabetes insipidus pattern", func() Facts {
			f := chartFacts(t, adult, map[float64]float64{20: 140, 1: 144}, lab(UrineOsmolality, 120, 1), urineVolume(320, 1, 2.5),
				urineVolume(340, 1, 1.5), urineVolume(350, 1, 0.5))
			f.Procedures = []Procedure{{Reference: "Procedure/tss", Codings: []Coding{{System: "http://snomed.info/sct", Code: "45368001"}},
				At: chartAt.Add(-24 * time.Hour)}}
			return f
		}(), restriction(1000), RuleRestrictionCaution, []string{"a diabetes insipidus pattern", "!salt wasting", "!retention"}},
		// A hypernatremia falling 161 → 150: its fall is no rise limit.
		{"hypernatremia falling", chartFacts(t, adult, map[float64]float64{20: 161, 2: 150}), restriction(1000), RuleRestrictionCaution,
			[]string{"sodium 150 is above 145", "!rise limit", "!already risen"}},
		// Glucose 33 mmol/L: effective osmolality 2·128 + 33 = 289 ≥ 275.
		{"not hypotonic", chartFacts(t, adult, map[float64]float64{30: 129, 2: 128}, lab(Glucose, 33, 2), lab(Urea, 3, 2)), restriction(1000),
			RuleRestrictionCaution, []string{"not hypotonic (effective osmolality 289"}},
		{"urine sodium 20", chartFacts(t, adult, map[float64]float64{30: 128, 2: 127}, lab(Glucose, 5, 2), lab(Urea, 3, 2),
			lab(UrineOsmolality, 480, 1), lab(UrineSodium, 20, 1), lab(UrinePotassium, 30, 1)), restriction(1000), RuleRestrictionCaution,
			[]string{"urine sodium 20 mmol/L", "a low urine sodium", "no restriction volume is compared", "!the ordered 1000"}},
		{"maximally dilute urine", chartFacts(t, adult, map[float64]float64{30: 128, 2: 127}, lab(Glucose, 5, 2), lab(Urea, 3, 2),
			lab(UrineOsmolality, 80, 1)), restriction(1000), RuleRestrictionCaution, []string{"maximally dilute"}},
		{"brain injury leaning towards salt wasting", func() Facts {
			f := siadh(adult, map[float64]float64{60: 134, 30: 131, 2: 127}, lab(BodyWeight, 72, 60), lab(BodyWeight, 70.5, 3))
			f.Conditions = []Condition{icd("Condition/tbi", "S06.5X0A")}
			return f
		}(), restriction(1000), RuleRestrictionCaution, []string{"lean towards salt wasting", "treating team's decision"}},
		{"subarachnoid haemorrhage", func() Facts {
			f := siadh(adult, map[float64]float64{30: 128, 2: 127})
			f.Conditions = []Condition{icd("Condition/sah", "I60.9")}
			return f
		}(), restriction(1000), RuleRestrictionCaution, []string{"after subarachnoid haemorrhage", "advised against"}},
		{"tolvaptan active", func() Facts {
			f := siadh(adult, map[float64]float64{30: 128, 2: 127})
			f.Medications = []MedicationOrder{{Reference: "MedicationRequest/tv", Status: "active", Medication: Medication{Text: "tolvaptan 15 mg tablet"}}}
			return f
		}(), restriction(1000), RuleRestrictionCaution, []string{"tolvaptan is active or ordered"}},
		{"sodium 149", chartFacts(t, adult, map[float64]float64{2: 149}), restriction(1000), RuleRestrictionCaution,
			[]string{"sodium 149 mmol/L is above 145"}},
		// 25 kg, 125 cm: 0.93 m² × 400 = 373 mL/day of insensible losses.
		{"child below insensible losses", siadh(child, map[float64]float64{30: 128, 2: 127}, lab(BodyWeight, 25, 5), lab(BodyHeight, 125, 5)),
			restriction(300), RuleRestrictionCaution, []string{"insensible losses about 400 mL/m²/day, 373 mL/day", "below this child's insensible losses"}},
		{"child above insensible losses", siadh(child, map[float64]float64{30: 128, 2: 127}, lab(BodyWeight, 25, 5), lab(BodyHeight, 125, 5)),
			restriction(600), RuleRestrictionReview, []string{"373 mL/day"}},
		{"no recent sodium", chartFacts(t, adult, map[float64]float64{100: 128}), restriction(1000), RuleRestrictionReview,
			[]string{"No sodium in the last 72 h"}},
		{"normal sodium", chartFacts(t, adult, map[float64]float64{2: 139}), restriction(1000), "", nil},
		{"a diabetic diet is not a restriction", siadh(adult, map[float64]float64{30: 128, 2: 127}),
			NutritionOrder{Reference: "NutritionOrder/dd", Selected: true, Types: []Coding{{System: "http://snomed.info/sct", Code: "160670007"}}}, "", nil},
		{"not selected", siadh(adult, map[float64]float64{30: 128, 2: 127}), func() NutritionOrder { n := restriction(1000); n.Selected = false; return n }(), "", nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			tc.f.DraftNutrition = []NutritionOrder{tc.n}
			var got *Finding
			for _, fd := range rs.Evaluate(InfusionCheck, tc.f) {
				if fd.Rule == RuleRestrictionCaution || fd.Rule == RuleRestrictionReview {
					got = &fd
				}
			}
			if tc.rule == "" {
				if got != nil {
					t.Errorf("want none, got %s: %s", got.Rule, got.Summary)
				}
				return
			}
			if got == nil || got.Rule != tc.rule || got.Order != tc.n.Reference || len([]rune(got.Summary)) >= 140 {
				t.Fatalf("got %+v, want %s", got, tc.rule)
			}
			for _, l := range tc.lines {
				text := got.Summary + "\n" + got.Detail
				if absent, ok := strings.CutPrefix(l, "!"); ok {
					if strings.Contains(text, absent) {
						t.Errorf("has %q:\n%s\n%s", absent, got.Summary, got.Detail)
					}
				} else if !strings.Contains(text, l) {
					t.Errorf("lacks %q:\n%s\n%s", l, got.Summary, got.Detail)
				}
			}
		})
	}
}
