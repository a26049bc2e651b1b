package hooks

import (
	"context"
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"github.com/halite-cds/halite/fhirmap"
)

// benchRequest is a patient-view call to sodium-chart-review with 200
// Observations across the prefetch keys and 20 active MedicationRequests.
// All values, codes after 36437 and the birth date are invented load data,
// not clinical check values.
func benchRequest(b *testing.B) []byte {
	b.Helper()
	at := scenarioAt
	codes := []struct{ key, code, unit string }{
		{"sodium", "2951-2", "mmol/L"}, {"chemistry", "2823-3", "mmol/L"},
		{"chemistry", "2345-7", "mg/dL"}, {"bodySize", "29463-7", "kg"},
	}
	values := map[string]float64{"2951-2": 128, "2823-3": 3.9, "2345-7": 110, "29463-7": 70}
	entries := map[string][]map[string]any{}
	for i := 0; i < 200; i++ {
		c := codes[i%len(codes)]
		entries[c.key] = append(entries[c.key], map[string]any{"resource": map[string]any{
			"resourceType": "Observation", "id": fmt.Sprintf("o%d", i), "status": "final",
			"code":              map[string]any{"coding": []any{map[string]any{"system": "http://loinc.org", "code": c.code}}},
			"subject":           map[string]any{"reference": "Patient/p1"},
			"effectiveDateTime": at.Add(-time.Duration(i) * 30 * time.Minute).Format(time.RFC3339),
			"valueQuantity": map[string]any{"value": values[c.code] + float64(i%5), "unit": c.unit,
				"system": "http://unitsofmeasure.org", "code": c.unit},
		}})
	}
	for i := 0; i < 20; i++ {
		entries["medications"] = append(entries["medications"], map[string]any{"resource": map[string]any{
			"resourceType": "MedicationRequest", "id": fmt.Sprintf("m%d", i), "status": "active", "intent": "order",
			"subject": map[string]any{"reference": "Patient/p1"},
			"medicationCodeableConcept": map[string]any{"coding": []any{map[string]any{
				"system": fhirmap.SystemRxNorm, "code": fmt.Sprint(36437 + i)}}, "text": "test drug"},
			"dosageInstruction": []any{map[string]any{"doseAndRate": []any{map[string]any{
				"doseQuantity": map[string]any{"value": 50, "unit": "mg", "system": "http://unitsofmeasure.org", "code": "mg"}}}}},
		}})
	}
	prefetch := map[string]any{"patient": map[string]any{"resourceType": "Patient", "id": "p1", "gender": "female",
		"birthDate": "1961-04-02"}}
	for key, es := range entries {
		prefetch[key] = map[string]any{"resourceType": "Bundle", "type": "searchset", "entry": es}
	}
	prefetch["urine"], prefetch["conditions"] = nil, nil
	req := map[string]any{"hook": "patient-view", "hookInstance": "bench",
		"context": map[string]any{"userId": "Practitioner/u1", "patientId": "p1"}, "prefetch": prefetch}
	raw, err := json.Marshal(req)
	if err != nil {
		b.Fatal(err)
	}
	return raw
}

// BenchmarkDecodeResolveMap measures request decoding, prefetch resolution
// and mapping for 200 Observations and 20 MedicationRequests.
func BenchmarkDecodeResolveMap(b *testing.B) {
	body := benchRequest(b)
	e := testEngine(b, nil)
	svc := mustService(b, "sodium-chart-review")
	b.SetBytes(int64(len(body)))
	b.ReportAllocs()
	for b.Loop() {
		c, err := DecodeCall(svc, body)
		if err != nil {
			b.Fatal(err)
		}
		keys, err := Resolve(context.Background(), svc, c, nil, e.limits)
		if err != nil {
			b.Fatal(err)
		}
		f := fhirmap.Map(mapInput(c, keys, scenarioAt), e.ruleset)
		if len(f.Labs["sodium"]) != 50 || len(f.Medications) != 20 {
			b.Fatalf("mapped %d sodium, %d medications", len(f.Labs["sodium"]), len(f.Medications))
		}
	}
}
