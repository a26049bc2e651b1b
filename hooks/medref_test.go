package hooks

import (
	"context"
	"testing"

	"github.com/halite-cds/halite/rules"
)

// TestEngineFetchesReferencedMedication: a draft names its product only by
// "Medication/{id}" and the request does not carry it; with a FHIR server the
// engine reads it, without one the reference stays unresolved (and is noted).
func TestEngineFetchesReferencedMedication(t *testing.T) {
	const medication = `{"resourceType":"Medication","id":"med-x","code":{"text":"sodium chloride 3% (invented product)"},` +
		`"ingredient":[{"itemCodeableConcept":{"coding":[{"system":"http://www.nlm.nih.gov/research/umls/rxnorm","code":"9863"}]},` +
		`"strength":{"numerator":{"value":3,"code":"g","system":"http://unitsofmeasure.org"},` +
		`"denominator":{"value":100,"code":"mL","system":"http://unitsofmeasure.org"}}}]}`
	req := map[string]any{
		"hook": "order-sign", "hookInstance": "i-1",
		"fhirServer": "https://ehr.example.org/fhir",
		"fhirAuthorization": map[string]any{"access_token": "t", "token_type": "Bearer", "expires_in": 60,
			"scope": "patient/*.read", "subject": "halite"},
		"context": map[string]any{"userId": "Practitioner/u", "patientId": "p1", "draftOrders": map[string]any{
			"resourceType": "Bundle", "type": "collection", "entry": []any{map[string]any{"resource": map[string]any{
				"resourceType": "MedicationRequest", "id": "d1", "status": "draft", "intent": "order",
				"subject":             map[string]any{"reference": "Patient/p1"},
				"medicationReference": map[string]any{"reference": "Medication/med-x"}}}}}},
		"prefetch": map[string]any{"patient": nil, "sodium": nil, "chemistry": nil, "urine": nil, "bodySize": nil, "conditions": nil, "medications": nil, "administrations": nil, "procedures": nil},
	}
	for _, tc := range []struct {
		name    string
		fetcher *mapFetcher
		source  rules.MedicationSource
	}{
		{"with server", &mapFetcher{bodies: map[string]string{"Medication/med-x": medication}}, rules.FromReferenced},
		{"server fails", &mapFetcher{}, rules.FromUnresolved},
	} {
		t.Run(tc.name, func(t *testing.T) {
			e := testEngine(t, func(string, *FHIRAuthorization, Caller, *CallBudget) (Fetcher, error) { return tc.fetcher, nil })
			out, err := e.Handle(context.Background(), "sodium-infusion-check", mustMarshal(t, req), scenarioAt)
			if err != nil {
				t.Fatal(err)
			}
			d := out.Facts.DraftOrders
			if len(d) != 1 || d[0].Medication.Source != tc.source {
				t.Fatalf("draft %+v, want medication source %s", d, tc.source)
			}
			if len(tc.fetcher.asked) != 1 || tc.fetcher.asked[0] != "Medication/med-x" {
				t.Errorf("fetched %v, want exactly Medication/med-x", tc.fetcher.asked)
			}
		})
	}
}
