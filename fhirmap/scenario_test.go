package fhirmap

import (
	"encoding/json"
	"os"
	"path/filepath"
	"testing"

	"github.com/halite-cds/halite/rules"
)

// scenarioInput reads a scenario bundle into an Input the way a hook call
// would carry it: the Patient apart, draft MedicationRequests as DraftOrders,
// everything else as search results.
func scenarioInput(t testing.TB, path string) Input {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	b, err := ParseBundle(data)
	if err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	in := Input{At: testAt}
	for _, e := range b.Entries {
		r, err := ReadResource(e.Resource)
		if err != nil {
			t.Fatalf("%s: %v", path, err)
		}
		var st struct {
			Status string `json:"status"`
		}
		_ = json.Unmarshal(e.Resource, &st)
		switch {
		case r.Type == "Patient":
			in.Patient, in.PatientID = e.Resource, r.ID
		case r.Type == "MedicationRequest" && st.Status == "draft":
			in.DraftEntries = append(in.DraftEntries, BundleEntry{Resource: e.Resource})
		default:
			in.Entries = append(in.Entries, BundleEntry{Resource: e.Resource})
		}
	}
	return in
}

func series(f rules.Facts, a rules.Analyte) []float64 {
	var out []float64
	for _, m := range f.Labs[a] {
		out = append(out, m.Value)
	}
	return out
}

func TestScenarios(t *testing.T) {
	// Expected values are the scenario descriptions in
	// testdata/scenarios/README.md, unless noted.
	type lab struct {
		a    rules.Analyte
		want []float64 // oldest first
		tol  float64
	}
	tests := []struct {
		file      string
		age       int
		sex       rules.Sex
		labs      []lab
		drafts    int
		rejected  []rules.Rejection
		condCount int
	}{
		{"01-chronic-hypona-3pct-infusion.json", 44, rules.SexFemale, []lab{
			// 14 serial values, nadir 114, rising to 123 (README); listed oldest first.
			{rules.Sodium, []float64{117, 115, 114, 115, 116, 116, 117, 118, 119, 120, 120, 121, 122, 123}, 0},
			{rules.BodyWeight, []float64{62}, 0},
			// Creatinine 0.7 mg/dL × 88.4 µmol/L per mg/dL (published check value).
			{rules.Creatinine, []float64{0.7 * 88.4}, 0.01},
		}, 1, nil, 1},
		{"02-ssri-new-start-mild-hypona.json", 52, rules.SexMale, []lab{
			{rules.Sodium, []float64{131, 130}, 0}, {rules.BodyWeight, []float64{84}, 0}, {rules.BodyHeight, []float64{178}, 0},
		}, 1, nil, 0},
		{"03-elderly-thiazide-plus-ssri.json", 83, rules.SexFemale, []lab{
			// The old August value is in the series; windows are the rules' business.
			{rules.Sodium, []float64{134, 127}, 0}, {rules.BodyWeight, []float64{54}, 0},
		}, 1, nil, 0},
		{"04-pediatric-saline-bolus.json", 6, rules.SexMale, []lab{
			{rules.Sodium, []float64{131}, 0},
			{rules.BodyWeight, []float64{21}, 1e-9},  // 21000 g (1 kg = 1000 g, UCUM)
			{rules.BodyHeight, []float64{116}, 1e-9}, // 1.16 m (1 m = 100 cm, UCUM)
		}, 1, nil, 0},
		{"05-hyperna-rapid-fall-d5w.json", 78, rules.SexMale, []lab{
			{rules.Sodium, []float64{161, 156, 150}, 0},
			{rules.BodyWeight, []float64{65.9977}, 0.00005}, // 145.5 [lb_av] × 0.45359237 kg (UCUM)
			{rules.BodyHeight, []float64{172.72}, 1e-9},     // 68 [in_i] × 2.54 cm (UCUM)
			{rules.Glucose, []float64{7.8, 9.4}, 0},
			{rules.Urea, []float64{340 / 28.014}, 1e-9}, // BUN 34 mg/dL ×10 / 28.014 g/mol (2 N, IUPAC)
		}, 1, nil, 1},
		{"06-no-weight-no-height.json", 36, rules.SexFemale, []lab{
			{rules.Sodium, []float64{120, 122, 124}, 0}, {rules.BodyWeight, nil, 0}, {rules.BodyHeight, nil, 0},
		}, 1, nil, 0},
		{"07-malformed-data.json", 56, rules.SexMissing, []lab{
			{rules.Sodium, []float64{128}, 0}, {rules.BodyWeight, []float64{70}, 0},
		}, 1, []rules.Rejection{
			{Source: "Observation/obs-ginkgo-na-nostatus", Analyte: rules.Sodium, Reason: "status is missing"},
			{Source: "Observation/obs-ginkgo-na-badunit", Analyte: rules.Sodium, Reason: `unit "mmol/dL" is not one halite converts for sodium`},
			{Source: "Observation/obs-ginkgo-na-implausible", Analyte: rules.Sodium, Reason: "implausible value 1400 mmol/L (accepted range 90–200)"},
			{Source: "Observation/obs-ginkgo-na-notime", Analyte: rules.Sodium, Reason: "no effective time"},
			{Source: "Observation/obs-ginkgo-na-prelim", Analyte: rules.Sodium, Reason: `status "preliminary" is not final, amended or corrected`},
			{Source: "Observation/obs-ginkgo-na-string", Analyte: rules.Sodium, Reason: "no valueQuantity"},
			{Source: "1 × Device", Reason: "resource type not read by halite"},
			// Results taken at one time are settled after all are read.
			{Source: "Observation/obs-ginkgo-na-dup", Analyte: rules.Sodium, Reason: "duplicate of Observation/obs-ginkgo-na-valid"},
		}, 0},
		{"08-lithium-hyperna-desmopressin.json", 60, rules.SexMale, []lab{
			{rules.Sodium, []float64{149}, 0}, {rules.SerumOsmolality, []float64{305}, 0},
			{rules.UrineOsmolality, []float64{180}, 0}, {rules.UrineSodium, []float64{25}, 0}, {rules.BodyWeight, []float64{88}, 0},
		}, 1, nil, 2},
		{"09-rapid-correction-high-risk.json", 58, rules.SexMale, []lab{
			{rules.Sodium, []float64{112, 115, 118, 121}, 0}, {rules.Potassium, []float64{3.1}, 0},
			{rules.Creatinine, []float64{62}, 0}, {rules.SerumOsmolality, []float64{246}, 0},
			{rules.UrineOsmolality, []float64{420}, 0}, {rules.UrineSodium, []float64{48}, 0}, {rules.UrinePotassium, []float64{30}, 0},
			{rules.Glucose, []float64{126 / 18.016}, 0.001}, // 126 mg/dL ÷ 18.016 (published check value)
		}, 1, nil, 3},
		{"10-hyperglycemia-pseudohypona-contained-3pct.json", 35, rules.SexFemale, []lab{
			{rules.Sodium, []float64{126, 128}, 0},
			{rules.Glucose, []float64{33.97}, 0.005}, // 612×10/180.156 (IUPAC)
			{rules.Urea, []float64{9.995}, 0.0005},   // BUN 28 mg/dL ×10 / 28.014 (IUPAC)
			{rules.SerumOsmolality, []float64{310}, 0},
			{rules.BodyWeight, []float64{58}, 0},
		}, 1, nil, 1},
		{"11-no-sodium-data-oxcarbazepine.json", 29, rules.SexFemale, []lab{
			{rules.Sodium, nil, 0}, {rules.BodyWeight, []float64{67}, 0},
		}, 1, nil, 0},
		{"12-normal-sodium-two-drafts.json", 46, rules.SexMale, []lab{
			{rules.Sodium, []float64{139, 138}, 0}, {rules.Urea, []float64{5.2}, 0}, {rules.Creatinine, []float64{88}, 0},
		}, 2, nil, 0},
		{"13-acute-hypona-hypertonic-bolus.json", 65, rules.SexFemale, []lab{
			{rules.Sodium, []float64{129, 118}, 0}, {rules.BodyWeight, []float64{60}, 0},
		}, 1, nil, 0},
	}
	for _, tt := range tests {
		t.Run(tt.file, func(t *testing.T) {
			in := scenarioInput(t, filepath.Join("..", "testdata", "scenarios", tt.file))
			f := Map(in, ruleset(t))
			if age, ok := f.Patient.AgeYears(f.At); !ok || age != tt.age {
				t.Errorf("age %d, %v; want %d", age, ok, tt.age)
			}
			if f.Patient.Sex != tt.sex {
				t.Errorf("sex %q, want %q", f.Patient.Sex, tt.sex)
			}
			for _, l := range tt.labs {
				got := series(f, l.a)
				if len(got) != len(l.want) {
					t.Errorf("%s = %v, want %v", l.a, got, l.want)
					continue
				}
				for i := range got {
					if !near(got[i], l.want[i], l.tol) {
						t.Errorf("%s = %v, want %v", l.a, got, l.want)
						break
					}
				}
			}
			if len(f.DraftOrders) != tt.drafts {
				t.Errorf("%d draft orders, want %d", len(f.DraftOrders), tt.drafts)
			}
			if len(f.Conditions) != tt.condCount {
				t.Errorf("%d conditions, want %d", len(f.Conditions), tt.condCount)
			}
			if len(f.Rejected) != len(tt.rejected) {
				t.Fatalf("rejected %+v, want %+v", f.Rejected, tt.rejected)
			}
			for i := range tt.rejected {
				if f.Rejected[i] != tt.rejected[i] {
					t.Errorf("rejected[%d] = %+v, want %+v", i, f.Rejected[i], tt.rejected[i])
				}
			}
		})
	}
}

func TestScenarioDraftDetails(t *testing.T) {
	tests := []struct {
		file       string
		wantSource rules.MedicationSource
		wantMlH    *float64
		wantBounds string
		wantDur    string
	}{
		// Rates and durations from testdata/scenarios/README.md.
		{"01-chronic-hypona-3pct-infusion.json", rules.FromCodeableConcept, ptr(25.0), "20 h", "nil"}, // 25 mL/h, 20 h bounds
		{"04-pediatric-saline-bolus.json", rules.FromCodeableConcept, ptr(420.0), "1 h", "nil"},       // 420 mL/h, 1 h bounds
		{"06-no-weight-no-height.json", rules.FromCodeableConcept, ptr(100.0), "", ""},                // rateRatio 100 mL / 1 h
		{"09-rapid-correction-high-risk.json", rules.FromReferenced, ptr(80.0), "", ""},               // NaCl/KCl 80 mL/h via Medication/med-kcl-saline
		{"10-hyperglycemia-pseudohypona-contained-3pct.json", rules.FromContained, ptr(30.0), "8 h", "nil"},
		{"13-acute-hypona-hypertonic-bolus.json", rules.FromCodeableConcept, nil, "", "20 min"}, // 150 mL over 20 min, no rate
	}
	for _, tt := range tests {
		t.Run(tt.file, func(t *testing.T) {
			f := Map(scenarioInput(t, filepath.Join("..", "testdata", "scenarios", tt.file)), ruleset(t))
			if len(f.DraftOrders) != 1 {
				t.Fatalf("draft orders %+v", f.DraftOrders)
			}
			o := f.DraftOrders[0]
			if o.Medication.Source != tt.wantSource {
				t.Errorf("medication source %q, want %q", o.Medication.Source, tt.wantSource)
			}
			if fptr(o.RateMlPerHour) != fptr(tt.wantMlH) {
				t.Errorf("rate %s mL/h, want %s", fptr(o.RateMlPerHour), fptr(tt.wantMlH))
			}
			if tt.wantBounds != "" && qstr(o.Bounds) != tt.wantBounds {
				t.Errorf("bounds %s, want %s", qstr(o.Bounds), tt.wantBounds)
			}
			if tt.wantDur != "" && qstr(o.Duration) != tt.wantDur {
				t.Errorf("duration %s, want %s", qstr(o.Duration), tt.wantDur)
			}
			if !o.Draft || !o.Selected {
				t.Errorf("draft %v selected %v, want both true (nil selections)", o.Draft, o.Selected)
			}
		})
	}
}
