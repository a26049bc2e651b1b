package fhirmap

import (
	"errors"
	"testing"
)

func TestCheckR4(t *testing.T) {
	for _, tc := range []struct {
		name, raw string
		notR4     bool
	}{
		{"DSTU2 MedicationOrder", `{"resourceType":"MedicationOrder","id":"m","patient":{"reference":"Patient/p"}}`, true},
		{"DSTU2 DiagnosticOrder", `{"resourceType":"DiagnosticOrder","id":"d"}`, true},
		{"STU3 ProcedureRequest", `{"resourceType":"ProcedureRequest","id":"p"}`, true},
		{"STU3 ReferralRequest", `{"resourceType":"ReferralRequest","id":"r"}`, true},
		{"STU3 MedicationRequest with requester.agent", `{"resourceType":"MedicationRequest","id":"m","requester":{"agent":{"reference":"Practitioner/1"}}}`, true},
		{"R4 MedicationRequest", `{"resourceType":"MedicationRequest","id":"m","requester":{"reference":"Practitioner/1"}}`, false},
		{"R4 ServiceRequest", `{"resourceType":"ServiceRequest","id":"s"}`, false},
		{"R4 Observation", `{"resourceType":"Observation","id":"o"}`, false},
	} {
		r, err := ReadResource([]byte(tc.raw))
		if err != nil {
			t.Fatal(err)
		}
		err = CheckR4(r)
		if got := errors.Is(err, ErrNotR4); got != tc.notR4 {
			t.Errorf("%s: CheckR4 = %v; want not-R4 %v", tc.name, err, tc.notR4)
		}
	}
}

func TestReadDocument(t *testing.T) {
	for _, tc := range []struct {
		name, in, want, err string
	}{
		{"object", `{"a":1}`, `{"a":1}`, ""},
		{"object after a UTF-8 byte-order mark", "\xEF\xBB\xBF{\"a\":1}", `{"a":1}`, ""},
		{"object after spaces", " \n{}", " \n{}", ""},
		{"array", `[{"resourceType":"Bundle"}]`, "", "the document is a JSON array; a JSON object is expected"},
		{"string", `"Bundle"`, "", "the document is a JSON string; a JSON object is expected"},
		{"XML", `<Bundle xmlns="http://hl7.org/fhir"/>`, "", "the document looks like XML; halite reads FHIR JSON"},
		{"number", `42`, "", "the document is not a JSON object"},
		{"empty", "\xEF\xBB\xBF  ", "", "the document is empty"},
	} {
		got, err := ReadDocument([]byte(tc.in))
		switch {
		case tc.err != "" && (err == nil || err.Error() != tc.err):
			t.Errorf("%s: error %v; want %q", tc.name, err, tc.err)
		case tc.err == "" && (err != nil || string(got) != tc.want):
			t.Errorf("%s: %q, %v; want %q", tc.name, got, err, tc.want)
		}
	}
}
