package fhirmap

import (
	"encoding/json"
	"fmt"
	"testing"

	"github.com/halite-cds/halite/rules"
)

func TestMapCondition(t *testing.T) {
	// E87.1 hypo-osmolality and hyponatremia (ICD-10-CM) and 89627008
	// hyponatremia (SNOMED CT), as in scenario 01 (testdata/scenarios/README.md).
	code := `"code":{"coding":[{"system":"http://hl7.org/fhir/sid/icd-10-cm","code":"E87.1","display":"Hypo-osmolality and hyponatremia"},{"system":"http://snomed.info/sct","code":"89627008"}],"text":"Hyponatremia"}`
	status := func(system, c string) string {
		if c == "" {
			return ""
		}
		return fmt.Sprintf(`{"coding":[{"system":%q,"code":%q}]}`, system, c)
	}
	const clin = "http://terminology.hl7.org/CodeSystem/condition-clinical"
	const ver = "http://terminology.hl7.org/CodeSystem/condition-ver-status"
	tests := []struct {
		name        string
		clinical    string
		verif       string
		subject     string
		wantInclude bool
		wantReject  string
	}{
		// Clinical and verification status codes from the FHIR R4 Condition value sets.
		{"active", "active", "", "Patient/p1", true, ""},
		{"active confirmed", "active", "confirmed", "Patient/p1", true, ""},
		{"recurrence", "recurrence", "", "Patient/p1", true, ""},
		{"relapse", "relapse", "provisional", "Patient/p1", true, ""},
		{"resolved", "resolved", "confirmed", "Patient/p1", false, ""},
		{"inactive", "inactive", "", "Patient/p1", false, ""},
		{"remission", "remission", "", "Patient/p1", false, ""},
		{"no clinical status", "", "confirmed", "Patient/p1", false, ""},
		{"active but refuted", "active", "refuted", "Patient/p1", false, ""},
		{"active but entered-in-error", "active", "entered-in-error", "Patient/p1", false, ""},
		{"other patient", "active", "", "Patient/p2", false, "subject is not the patient in context"},
		{"no subject", "active", "", "", false, "subject is not the patient in context"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			s := `{"resourceType":"Condition","id":"c1",` + code
			if c := status(clin, tt.clinical); c != "" {
				s += `,"clinicalStatus":` + c
			}
			if v := status(ver, tt.verif); v != "" {
				s += `,"verificationStatus":` + v
			}
			if tt.subject != "" {
				s += fmt.Sprintf(`,"subject":{"reference":%q}`, tt.subject)
			}
			f := mapResources(t, json.RawMessage(s+"}"))
			if !tt.wantInclude {
				if len(f.Conditions) != 0 {
					t.Errorf("conditions %+v, want none", f.Conditions)
				}
			} else {
				want := rules.Condition{
					Reference: "Condition/c1",
					Codings: []rules.Coding{
						{System: "http://hl7.org/fhir/sid/icd-10-cm", Code: "E87.1", Display: "Hypo-osmolality and hyponatremia"},
						{System: "http://snomed.info/sct", Code: "89627008"},
					},
					Text:               "Hyponatremia",
					ClinicalStatus:     tt.clinical,
					VerificationStatus: tt.verif,
				}
				if len(f.Conditions) != 1 || fmt.Sprintf("%+v", f.Conditions[0]) != fmt.Sprintf("%+v", want) {
					t.Errorf("conditions %+v, want [%+v]", f.Conditions, want)
				}
			}
			switch {
			case tt.wantReject == "" && len(perResource(f.Rejected)) != 0:
				t.Errorf("rejected %+v, want only counts (an inactive condition is not an error)", f.Rejected)
			case tt.wantReject != "" && (len(f.Rejected) != 1 || f.Rejected[0] != rules.Rejection{Source: "Condition/c1", Reason: tt.wantReject}):
				t.Errorf("rejected %+v, want Condition/c1 %q", f.Rejected, tt.wantReject)
			}
		})
	}
}
