package rules

import (
	"strings"
	"testing"
	"time"
)

// TestDemyelinationRisk checks the high-risk features of Verbalis 2013 as
// restated by George JC et al., CJASN 2018 [V] (sodium ≤105 mmol/L,
// hypokalemia, alcoholism, malnutrition, advanced liver disease), on
// invented facts. Code lists are from memory (ICD-10-CM, SNOMED CT).
func TestDemyelinationRisk(t *testing.T) {
	p := policy(t).DemyelinationRisk
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	ago := func(h float64) time.Time { return at.Add(-time.Duration(h * float64(time.Hour))) }
	icd := func(code string) Condition {
		return Condition{Reference: "Condition/" + code, Codings: []Coding{{System: "http://hl7.org/fhir/sid/icd-10-cm", Code: code}}}
	}
	for _, tc := range []struct {
		name  string
		facts Facts
		want  []string // factors, in order
	}{
		{"none", Facts{Labs: map[Analyte][]Measurement{Sodium: {{Value: 118, At: ago(2)}}, Potassium: {{Value: 3.5, At: ago(2)}}}}, nil},
		{"sodium 105 is high risk (≤105)", Facts{Labs: map[Analyte][]Measurement{Sodium: {{Value: 105, At: ago(10)}}}},
			[]string{"sodium at or below 105 mmol/L"}},
		{"sodium 104 outside the 48-h window", Facts{Labs: map[Analyte][]Measurement{Sodium: {{Value: 104, At: ago(60)}}}}, nil},
		{"potassium 3.1", Facts{Labs: map[Analyte][]Measurement{Potassium: {{Value: 3.1, At: ago(20)}}}}, []string{"hypokalemia"}},
		{"coded conditions", Facts{Conditions: []Condition{icd("F10.20"), icd("E43"), icd("K70.30"), icd("F10.10"),
			{Reference: "Condition/s", Codings: []Coding{{System: "http://snomed.info/sct", Code: "19943007"}}}}},
			[]string{"alcohol use disorder", "malnutrition", "advanced liver disease"}},
		{"code in the wrong system", Facts{Conditions: []Condition{
			{Reference: "Condition/x", Codings: []Coding{{System: "http://snomed.info/sct", Code: "F10.20"}}}}}, nil},
		{"E4 alone is not E40-E46", Facts{Conditions: []Condition{icd("E4"), icd("E50")}}, nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got := DemyelinationRisk(p, tc.facts, at)
			var names []string
			for _, r := range got {
				names = append(names, r.Factor)
				if r.Evidence == "" {
					t.Errorf("%s has no evidence", r.Factor)
				}
			}
			if strings.Join(names, "|") != strings.Join(tc.want, "|") {
				t.Errorf("factors %q, want %q", names, tc.want)
			}
		})
	}
}
