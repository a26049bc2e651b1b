package rules

import (
	"encoding/json"
	"os"
	"regexp"
	"strings"
	"testing"
	"time"
)

// TestPrecision checks the display table: measured values at the precision
// laboratories report (common practice), trailing zeros dropped; computed
// figures at fixed decimals. 139.99997792809936 is the sodium the issue saw
// after a unit conversion.
func TestPrecision(t *testing.T) {
	for _, tc := range []struct {
		name string
		got  string
		want string
	}{
		{"converted sodium", show(Sodium, 139.99997792809936), "140"},
		{"sodium with a decimal", show(Sodium, 136.5), "136.5"},
		{"sodium to one decimal", show(Sodium, 136.2500001), "136.3"},
		{"converted potassium", show(Potassium, 3.0999999999999996), "3.1"},
		{"converted glucose", show(Glucose, 27.750000000000004), "27.8"},
		{"creatinine whole", show(Creatinine, 88.40000000000001), "88"},
		{"osmolality whole", show(SerumOsmolality, 284.99999), "285"},
		{"urine osmolality whole", show(UrineOsmolality, 99.6), "100"},
		{"converted weight", show(BodyWeight, 69.99996), "70"},
		{"weight with a decimal", show(BodyWeight, 3.45), "3.5"},
		{"change keeps its decimal", naChange.of(5), "5.0"},
		{"change rounds", naChange.of(4.96), "5.0"},
		{"signed rise", naChange.signed(2.25), "+2.3"},
		{"signed fall", naChange.signed(-1.26), "-1.3"},
		{"no minus zero", naChange.signed(-0.04), "+0.0"},
		{"per hour", naPerHour.of(0.4999), "0.50"},
		{"volume to the mL", volume24h.of(0.24), "0.240"},
		{"ordered rate", orderRate.of(1.2 * 60), "72"},
		{"course in hours from minutes", orderHours.of(100.0 / 60), "1.7"},
		{"policy window in days", orderHours.of(100.0 / 24), "4.2"},
		{"ordered litre in mL", orderMl.of(0.1 * 1000), "100"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if tc.got != tc.want {
				t.Errorf("got %q, want %q", tc.got, tc.want)
			}
		})
	}
}

// noise is a number with four or more decimals, which no card text writes.
var noise = regexp.MustCompile(`\d\.\d{4,}`)

// TestConvertedValuesInCardText: values that arrived in other units and
// were converted (invented facts) read as the laboratory reported them in
// every card they reach, while the Figures keep the values computed with.
func TestConvertedValuesInCardText(t *testing.T) {
	rs := loadRuleset(t)
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	const na = 139.99997792809936
	rate := 1.2 * 60 // 1.2 mL/min
	for _, tc := range []struct {
		name  string
		check Check
		facts func() Facts
		want  []string // in the summary or detail
	}{
		{"drug risk, new start at age 80", DrugRisk, func() Facts {
			f := assessFacts(t, SexFemale, "1946-01-10", 60, map[float64]float64{3: na}, nil)
			f.DraftOrders = []MedicationOrder{{Reference: "MedicationRequest/d", Medication: Medication{Text: "citalopram"}, Selected: true}}
			return f
		}, []string{"sodium 140 mmol/L", "Latest sodium: 140 mmol/L"}},
		{"drug risk, lithium and osmolalities", DrugRisk, func() Facts {
			f := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{3: 148.00000000000003}, map[Analyte][]Measurement{
				SerumOsmolality: {{Analyte: SerumOsmolality, Value: 305.00000000000006, At: at.Add(-3 * time.Hour)}},
				UrineOsmolality: {{Analyte: UrineOsmolality, Value: 179.99999999999997, At: at.Add(-2 * time.Hour)}},
			})
			f.DraftOrders = []MedicationOrder{{Reference: "MedicationRequest/d", Medication: Medication{Text: "lithium"}, Selected: true}}
			return f
		}, []string{"sodium is 148 mmol/L, urine osmolality 180 mOsm/kg", "Serum osmolality: 305 mOsm/kg"}},
		{"infusion, converted weight, rate and glucose", InfusionCheck, func() Facts {
			f := assessFacts(t, SexFemale, "1986-01-10", 69.99996, map[float64]float64{20: 112.00000000000001, 2: 115.99999999999999},
				map[Analyte][]Measurement{Glucose: {{Analyte: Glucose, Value: 27.750000000000004, At: at.Add(-2 * time.Hour)}}})
			f.DraftOrders = []MedicationOrder{{Reference: "MedicationRequest/d", Medication: Medication{Text: "3% saline"}, RateMlPerHour: &rate, Selected: true}}
			return f
		}, []string{"Latest sodium: 116 mmol/L", "nadir of 112 ", "of 70 kg", "72 mL/h for 24 h", "glucose 27.8 mmol/L"}},
		{"chart review, concentrating defect", ChartReview, func() Facts {
			return assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{3: 150.99999999999997}, map[Analyte][]Measurement{
				UrineOsmolality: {{Analyte: UrineOsmolality, Value: 119.99999999999999, At: at.Add(-2 * time.Hour)}},
			})
		}, []string{"Dilute urine (120 mOsm/kg) with sodium 151", "Latest sodium: 151 mmol/L"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := tc.facts()
			got := rs.Evaluate(tc.check, f)
			if len(got) == 0 {
				t.Fatal("no finding")
			}
			var text strings.Builder
			for _, fd := range got {
				text.WriteString(fd.Summary + "\n" + fd.Detail + "\n")
				for _, a := range fd.Advice {
					text.WriteString(a.Label + "\n")
				}
				if v, ok := fd.Figures["sodiumLatest"]; ok && v != f.Labs[Sodium][len(f.Labs[Sodium])-1].Value {
					t.Errorf("%s: figure sodiumLatest %v, want the value computed with", fd.Rule, v)
				}
			}
			for _, w := range tc.want {
				if !strings.Contains(text.String(), w) {
					t.Errorf("card text lacks %q:\n%s", w, text.String())
				}
			}
			if n := noise.FindString(text.String()); n != "" {
				t.Errorf("card text shows %q:\n%s", n, text.String())
			}
		})
	}
}

// TestSentValue: the "as sent" audit text keeps a laboratory's precision
// and drops a converting system's floating-point noise.
func TestSentValue(t *testing.T) {
	for in, want := range map[string]string{
		"15.000007772701675 mg/dL": "15 mg/dL",
		"139.99997792809936 meq/L": "140 meq/L",
		"3.0 mmol/L":               "3.0 mmol/L",
		"136.2 meq/L":              "136.2 meq/L",
		"0.000123 mmol/L":          "0.000123 mmol/L",
		"7.25 mmol/L":              "7.25 mmol/L",
		"n/a mg/dL":                "n/a mg/dL",
	} {
		if got := sentValue(in); got != want {
			t.Errorf("sentValue(%q) = %q, want %q", in, got, want)
		}
	}
}

// Curation notes stay in the data; clinicians read the citation only
// (issue 20). The inputs are the data's own forms.
func TestClinicianText(t *testing.T) {
	for in, want := range map[string]string{
		"(Verbalis JG et al., Am J Med 2013;126:S1-S42 (from memory))": "(Verbalis JG et al., Am J Med 2013;126:S1-S42)",
		"513 mEq/L [V] and more": "513 mEq/L and more",
		"from ingredient strengths ([derived] strength ÷ molar mass)":                                      "from ingredient strengths (strength ÷ molar mass)",
		"(Verbalis 2013; Spasovski 2014; from memory)":                                                     "(Verbalis 2013; Spasovski 2014)",
		"(serum reference interval 275-295, from memory)":                                                  "(serum reference interval 275-295)",
		"labs confirm it (reference notes §3; Verbalis 2013, from memory).":                                "labs confirm it (Verbalis 2013).",
		"Furst H et al., Am J Med Sci 2000;319:240-244 [V: the paper's opening; cut-offs from memory], in": "Furst H et al., Am J Med Sci 2000;319:240-244, in",
		"policy. RxNorm codes from the RxNorm Current Prescribable Content of 06-Oct-2025 (extract: github.com/x/y, commit a8fcf13a679fa37073e8fa83e11d5e0d8cc07276); re-validate every code against a current RxNorm release before clinical use. ATC codes from the WHO ATC index as extracted in atc-codes.tsv.": "policy.",
		"Latest sodium: 116 mmol/L (2026-11-20 05:00 UTC, Observation/a)": "Latest sodium: 116 mmol/L (2026-11-20 05:00 UTC, Observation/a)",
	} {
		if got := clinicianText(in); got != want {
			t.Errorf("clinicianText(%q)\n = %q\nwant %q", in, got, want)
		}
	}
}

// Times in card text are written in the display zone with their date and
// zone (issue 20); computation stays in UTC. Europe/Paris is UTC+1 in
// November (IANA tz database).
func TestLocalTimes(t *testing.T) {
	rs := loadRuleset(t)
	paris, err := time.LoadLocation("Europe/Paris")
	if err != nil {
		t.Skipf("no zone database: %v", err)
	}
	in := "Latest sodium: 116 mmol/L (2026-11-20 05:00 UTC, Observation/a); nadir 111.5 (2026-11-19 23:30 UTC)"
	want := "Latest sodium: 116 mmol/L (2026-11-20 06:00 CET, Observation/a); nadir 111.5 (2026-11-20 00:30 CET)"
	if got := rs.WithDisplay(Display{Zone: paris}).localTimes(in); got != want {
		t.Errorf("localTimes\n = %q\nwant %q", got, want)
	}
	if got := rs.localTimes(in); got != in {
		t.Errorf("without a display zone the text changed: %q", got)
	}
}

// Every string of the rules data that can reach a card keeps some text once
// its curation marks are taken out, unless it was nothing but a mark (a
// drug citation "(from memory)", which the card then leaves out).
func TestClinicianTextOnTheData(t *testing.T) {
	for _, p := range []string{"data/policy.json", "data/drugs.json", "data/infusates.json"} {
		data, err := os.ReadFile(p)
		if err != nil {
			t.Fatal(err)
		}
		var v map[string]any
		if err := json.Unmarshal(data, &v); err != nil {
			t.Fatal(err)
		}
		delete(v, "note") // each file's own note is for reviewers (halite rules), never on a card
		var walk func(any)
		walk = func(v any) {
			switch x := v.(type) {
			case map[string]any:
				for _, e := range x {
					walk(e)
				}
			case []any:
				for _, e := range x {
					walk(e)
				}
			case string:
				c := clinicianText(x)
				if strings.TrimSpace(c) == "" && x != "" && x != "(from memory)" {
					t.Errorf("%s: %q leaves nothing", p, x)
				}
				if dataCurationMark.MatchString(c) {
					t.Errorf("%s: %q keeps a mark: %q", p, x, c)
				}
			}
		}
		walk(v)
	}
}

// dataCurationMark is any curation mark left in cleaned text.
var dataCurationMark = regexp.MustCompile(`\[V|\[derived|from memory|reference notes|extract: |RxNorm codes from|ATC codes from|github\.com|commit [0-9a-f]`)

// TestDisplayUnits: card text in the site's units, computation unchanged.
// Check values are the usual conversion factors (common practice; from
// memory, and consistent with the molar masses fhirmap converts with):
// glucose 1 mmol/L = 18.0 mg/dL, urea 1 mmol/L = 2.8 mg/dL urea nitrogen,
// creatinine 88.4 µmol/L = 1.00 mg/dL; for sodium and potassium 1 mmol/L =
// 1 mEq/L (monovalent ions).
func TestDisplayUnits(t *testing.T) {
	text := "Sodium 120 mmol/L, rose 9 mmol/L in 24 h; glucose " + quantity(Glucose, 10) + "; urea " + quantity(Urea, 10) +
		" (sent as " + kept("3.0 mmol/L") + "); creatinine " + quantity(Creatinine, 88.4) + "; potassium " + quantity(Potassium, 3.1)
	for _, c := range []struct {
		units DisplayUnits
		want  string
	}{
		{DisplayUnits{}, "Sodium 120 mmol/L, rose 9 mmol/L in 24 h; glucose 10 mmol/L; urea 10 mmol/L (sent as 3.0 mmol/L); creatinine 88 umol/L; potassium 3.1 mmol/L"},
		{DisplayUnits{Electrolytes: "mEq/L"}, "Sodium 120 mEq/L, rose 9 mEq/L in 24 h; glucose 10 mmol/L; urea 10 mmol/L (sent as 3.0 mmol/L); creatinine 88 umol/L; potassium 3.1 mEq/L"},
		{DisplayUnits{Electrolytes: "mEq/L", Glucose: "mg/dL", Urea: "mg/dL", Creatinine: "mg/dL"},
			"Sodium 120 mEq/L, rose 9 mEq/L in 24 h; glucose 180 mg/dL; urea 28 mg/dL (urea nitrogen) (sent as 3.0 mmol/L); creatinine 1 mg/dL; potassium 3.1 mEq/L"},
	} {
		r := (&Ruleset{}).WithDisplay(Display{Units: c.units})
		if got := r.displayUnits(text); got != c.want {
			t.Errorf("%+v:\n got %s\nwant %s", c.units, got, c.want)
		}
	}
	if plainUnits(text) != "Sodium 120 mmol/L, rose 9 mmol/L in 24 h; glucose 10 mmol/L; urea 10 mmol/L (sent as 3.0 mmol/L); creatinine 88 umol/L; potassium 3.1 mmol/L" {
		t.Errorf("plain text: %s", plainUnits(text))
	}
	if err := (DisplayUnits{Glucose: "mEq/L"}).Validate(); err == nil || !strings.Contains(err.Error(), "glucose") {
		t.Errorf("glucose in mEq/L accepted: %v", err)
	}
}
