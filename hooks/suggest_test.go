package hooks

import (
	"encoding/json"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/rules"
)

func TestWithRate(t *testing.T) {
	for _, tc := range []struct {
		name, draft string
		ok          bool
	}{
		{"rateQuantity", `{"resourceType":"MedicationRequest","id":"d","dispenseRequest":{"quantity":{"value":500.0}},
			"dosageInstruction":[{"text":"3% at 40 mL/h","doseAndRate":[{"rateQuantity":{"value":40,"unit":"mL/h"}}]}]}`, true},
		{"rateRatio", `{"resourceType":"MedicationRequest","id":"d",
			"dosageInstruction":[{"doseAndRate":[{"rateRatio":{"numerator":{"value":100,"unit":"mL"},"denominator":{"value":1,"unit":"h"}}}]}]}`, true},
		{"two dosage instructions", `{"resourceType":"MedicationRequest","id":"d",
			"dosageInstruction":[{"doseAndRate":[{"rateQuantity":{"value":40}}]},{"doseAndRate":[{"rateQuantity":{"value":20}}]}]}`, false},
		{"bolus without a rate", `{"resourceType":"MedicationRequest","id":"d",
			"dosageInstruction":[{"doseAndRate":[{"doseQuantity":{"value":150,"unit":"mL"}}]}]}`, false},
		{"no draft", ``, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var draft json.RawMessage
			if tc.draft != "" {
				draft = json.RawMessage(tc.draft)
			}
			out, ok, err := withRate(draft, 18.7)
			if err != nil || ok != tc.ok {
				t.Fatalf("ok %v err %v, want ok %v", ok, err, tc.ok)
			}
			if !ok {
				return
			}
			s := string(out)
			if !strings.Contains(s, `"rateQuantity":{"code":"mL/h","system":"http://unitsofmeasure.org","unit":"mL/h","value":18.7}`) ||
				strings.Contains(s, "rateRatio") {
				t.Errorf("rate not replaced: %s", s)
			}
			if tc.name == "rateQuantity" && (!strings.Contains(s, `"value":500.0`) ||
				!strings.Contains(s, `"text":"Rate changed to 18.7 mL/h; earlier instruction: 3% at 40 mL/h"`)) {
				t.Errorf("other numbers or the instruction text were not kept: %s", s)
			}
		})
	}
}

// TestSuggestionsSkipWhatCannotBeBuilt: advice about an order not in the
// call (no draft to update or delete) becomes a sodium re-check only.
func TestSuggestionsSkipWhatCannotBeBuilt(t *testing.T) {
	f := rules.Finding{Order: "MedicationRequest/missing", Advice: []rules.Advice{
		{Kind: rules.AdviseRate, RateMlPerHour: 10, RecheckHours: 4, Label: "rate"},
		{Kind: rules.AdviseRecheck, RecheckHours: 4, Label: "recheck"},
		{Kind: rules.AdviseWithdraw, Label: "withdraw"},
	}}
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	got, err := suggestions(f, suggestionInput{At: at, PatientID: "p1", Drafts: map[string]json.RawMessage{}})
	if err != nil || len(got) != 1 || got[0].Label != "recheck" || got[0].UUID == "" {
		t.Fatalf("%+v %v", got, err)
	}
	res := string(got[0].Actions[0].Resource)
	if !strings.Contains(res, `"occurrenceDateTime":"2026-11-20T12:00:00Z"`) || !strings.Contains(res, `"reference":"Patient/p1"`) ||
		strings.Contains(res, "supportingInfo") || !strings.Contains(res, `"code":"2951-2"`) || strings.Contains(res, "encounter") {
		t.Errorf("re-check request %s", res)
	}
	// With context.encounterId the request belongs to that encounter
	// (FHIR R4 ServiceRequest.encounter, Reference(Encounter)).
	got, err = suggestions(f, suggestionInput{At: at, PatientID: "p1", EncounterID: "enc-7", Drafts: map[string]json.RawMessage{}})
	if err != nil || len(got) != 1 {
		t.Fatalf("%+v %v", got, err)
	}
	if res := string(got[0].Actions[0].Resource); !strings.Contains(res, `"encounter":{"reference":"Encounter/enc-7"}`) {
		t.Errorf("re-check request in an encounter %s", res)
	}
}
