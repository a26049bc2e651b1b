package hooks

import (
	"bytes"
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/halite-cds/halite/fhirmap"
)

var updateFixtures = flag.Bool("update", false, "rewrite testdata/load/ from its generator")

// loadBundle is the invented load-test patient (testdata/load/README.md):
// n Observations spread evenly over the 72 h before at (a weight first,
// then sodium seven times in twelve, potassium twice, glucose, creatinine
// and serum osmolality once each; sodium rising slowly from 118 to 124
// mmol/L), 20 active MedicationRequests and 3 draft orders (3% saline at
// 20 mL/h, 0.45% saline at 75 mL/h, sertraline 50 mg daily). Values are
// load data inside the policy's plausibility bounds, not clinical checks.
func loadBundle(n int, at time.Time) []byte {
	const pt = "pt-load"
	ucum := "http://unitsofmeasure.org"
	coding := func(system, code string) map[string]any {
		return map[string]any{"coding": []any{map[string]any{"system": system, "code": code}}}
	}
	var entries []any
	add := func(r map[string]any) {
		entries = append(entries, map[string]any{"fullUrl": "http://example.org/fhir/" + r["resourceType"].(string) + "/" + r["id"].(string), "resource": r})
	}
	add(map[string]any{"resourceType": "Patient", "id": pt, "gender": "female", "birthDate": "1958-03-14"})
	kinds := []struct{ code, unit string }{{"2951-2", "mmol/L"}, {"2823-3", "mmol/L"}, {"2951-2", "mmol/L"}, {"2345-7", "mg/dL"},
		{"2951-2", "mmol/L"}, {"2160-0", "mg/dL"}, {"2951-2", "mmol/L"}, {"2823-3", "mmol/L"}, {"2951-2", "mmol/L"}, {"2692-2", "mosm/kg"},
		{"2951-2", "mmol/L"}, {"2951-2", "mmol/L"}}
	span := 72 * time.Hour
	for i := 0; i < n; i++ {
		when := at.Add(-span + time.Duration(i+1)*span/time.Duration(n+1))
		progress := float64(i) / float64(max(n-1, 1))
		code, unit, value := "29463-7", "kg", 61.0
		if i > 0 {
			k := kinds[(i-1)%len(kinds)]
			code, unit = k.code, k.unit
			value = map[string]float64{"2951-2": math.Round(118 + 6*progress), "2823-3": 3.6, "2345-7": 104, "2160-0": 0.8, "2692-2": 252}[code]
		}
		add(map[string]any{"resourceType": "Observation", "id": fmt.Sprintf("obs-load-%04d", i), "status": "final",
			"code": coding(fhirmap.SystemLOINC, code), "subject": map[string]any{"reference": "Patient/" + pt},
			"effectiveDateTime": when.UTC().Format(time.RFC3339),
			"valueQuantity":     map[string]any{"value": value, "unit": unit, "system": ucum, "code": unit}})
	}
	oral := map[string]any{"coding": []any{map[string]any{"system": "http://snomed.info/sct", "code": "26643006"}}, "text": "oral"}
	iv := map[string]any{"coding": []any{map[string]any{"system": "http://snomed.info/sct", "code": "47625008"}}, "text": "IV"}
	daily := map[string]any{"repeat": map[string]any{"frequency": 1, "period": 1, "periodUnit": "d"}}
	med := func(id, status, rxnorm, text string, dose float64, doseUnit string) {
		add(map[string]any{"resourceType": "MedicationRequest", "id": id, "status": status, "intent": "order",
			"medicationCodeableConcept": map[string]any{"coding": []any{map[string]any{"system": fhirmap.SystemRxNorm, "code": rxnorm}}, "text": text},
			"subject":                   map[string]any{"reference": "Patient/" + pt},
			"authoredOn":                at.Add(-30 * 24 * time.Hour).UTC().Format(time.RFC3339),
			"dosageInstruction": []any{map[string]any{"route": oral, "timing": daily,
				"doseAndRate": []any{map[string]any{"doseQuantity": map[string]any{"value": dose, "unit": doseUnit, "system": ucum, "code": doseUnit}}}}}})
	}
	for i, m := range []struct{ rxnorm, text string }{
		{"7646", "omeprazole"}, {"29046", "lisinopril"}, {"6809", "metformin"}, {"83367", "atorvastatin"}, {"17767", "amlodipine"},
		{"4603", "furosemide"}, {"5487", "hydrochlorothiazide"}, {"2002", "carbamazepine"}, {"114477", "levetiracetam"}, {"15996", "mirtazapine"},
		{"51272", "quetiapine"}, {"1191", "aspirin"}, {"10582", "levothyroxine"}, {"7052", "morphine"}, {"161", "acetaminophen"},
		{"6918", "metoprolol"}, {"9997", "spironolactone"}, {"8640", "prednisone"}, {"32968", "clopidogrel"}, {"11289", "warfarin"},
	} {
		med(fmt.Sprintf("mr-load-active-%02d", i), "active", m.rxnorm, m.text, 10, "mg")
	}
	infusion := func(id, rxnorm, text string, rate, hours float64) {
		add(map[string]any{"resourceType": "MedicationRequest", "id": id, "status": "draft", "intent": "order",
			"medicationCodeableConcept": map[string]any{"coding": []any{map[string]any{"system": fhirmap.SystemRxNorm, "code": rxnorm}}, "text": text},
			"subject":                   map[string]any{"reference": "Patient/" + pt},
			"authoredOn":                at.Add(-10 * time.Minute).UTC().Format(time.RFC3339),
			"dosageInstruction": []any{map[string]any{"route": iv,
				"timing":      map[string]any{"repeat": map[string]any{"boundsDuration": map[string]any{"value": hours, "unit": "h", "system": ucum, "code": "h"}}},
				"doseAndRate": []any{map[string]any{"rateQuantity": map[string]any{"value": rate, "unit": "mL/h", "system": ucum, "code": "mL/h"}}}}}})
	}
	infusion("mr-load-draft-3pct", "730781", "sodium chloride 3% 500 mL IV", 20, 24)
	infusion("mr-load-draft-halfns", "1807552", "sodium chloride 0.45% 1000 mL IV", 75, 12)
	med("mr-load-draft-sertraline", "draft", "36437", "sertraline 50 mg oral once daily", 50, "mg")
	raw, err := json.MarshalIndent(map[string]any{"resourceType": "Bundle", "id": "load-order-sign", "type": "collection",
		"meta":  map[string]any{"tag": []any{map[string]any{"system": "http://example.org/fhir/tags", "code": "halite-test-fixture", "display": "Invented test data - not a real patient"}}},
		"entry": entries}, "", " ")
	if err != nil {
		panic(err)
	}
	return append(raw, '\n')
}

// TestLoadFixtureCurrent: testdata/load/order-sign-60.json is what the
// generator makes (go test ./hooks -run TestLoadFixtureCurrent -update).
func TestLoadFixtureCurrent(t *testing.T) {
	path := filepath.Join("..", "testdata", "load", "order-sign-60.json")
	want := loadBundle(60, scenarioAt)
	if *updateFixtures {
		if err := os.WriteFile(path, want, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	got, err := os.ReadFile(path)
	if err != nil || !bytes.Equal(got, want) {
		t.Fatalf("%s is not current (%v); run go test ./hooks -run TestLoadFixtureCurrent -update", path, err)
	}
	b, err := fhirmap.ParseBundle(got)
	if err != nil {
		t.Fatal(err)
	}
	counts := map[string]int{}
	for _, e := range b.Entries {
		r, _ := fhirmap.ReadResource(e.Resource)
		counts[r.Type]++
	}
	if counts["Observation"] != 60 || counts["MedicationRequest"] != 23 || counts["Patient"] != 1 {
		t.Errorf("fixture holds %v; want 60 Observations, 20 active and 3 draft MedicationRequests", counts)
	}
}

// uncapped fills each Observation prefetch of req with every Observation
// of the bundle whose code it holds: halite's templates ask for the 200
// newest per key, but an EHR need not honour _count.
func uncapped(b *testing.B, req *Request, bundle *fhirmap.Bundle) *Request {
	codeOf := func(raw json.RawMessage) string {
		var o struct {
			ResourceType string `json:"resourceType"`
			Code         struct {
				Coding []struct{ Code string } `json:"coding"`
			} `json:"code"`
		}
		if json.Unmarshal(raw, &o) != nil || o.ResourceType != "Observation" || len(o.Code.Coding) == 0 {
			return ""
		}
		return o.Code.Coding[0].Code
	}
	for key, raw := range req.Prefetch {
		pb, err := fhirmap.ParseBundle(raw)
		if err != nil {
			continue // the Patient
		}
		codes := map[string]bool{}
		for _, e := range pb.Entries {
			if c := codeOf(e.Resource); c != "" {
				codes[c] = true
			}
		}
		if len(codes) == 0 {
			continue
		}
		var entries []map[string]json.RawMessage
		for _, e := range bundle.Entries {
			if codes[codeOf(e.Resource)] {
				entries = append(entries, map[string]json.RawMessage{"resource": e.Resource})
			}
		}
		req.Prefetch[key] = mustMarshal(b, map[string]any{"resourceType": "Bundle", "type": "searchset", "entry": entries})
	}
	return req
}

// loadRequest is the order-sign request to svc for the load patient with n
// Observations, with the bundle it was built from.
func loadRequest(tb testing.TB, svc Service, n int) (*Request, *fhirmap.Bundle) {
	tb.Helper()
	bundle, err := fhirmap.ParseBundle(loadBundle(n, scenarioAt))
	if err != nil {
		tb.Fatal(err)
	}
	req, err := BuildRequest(bundle, svc, RequestOptions{Hook: "order-sign", UserID: "Practitioner/load"})
	if err != nil {
		tb.Fatal(err)
	}
	return req, bundle
}

// BenchmarkHandleObservations measures one whole order-sign call —
// decode, prefetch resolution, mapping, rules, cards — through
// Engine.Handle for the load patient with 60, 600 and 6,000 Observations,
// to each order-sign service, reporting the cost per Observation.
func BenchmarkHandleObservations(b *testing.B) {
	e := testEngine(b, nil)
	for _, id := range []string{"sodium-infusion-check", "sodium-drug-risk"} {
		svc := mustService(b, id)
		for _, n := range []int{60, 600, 6000} {
			req, bundle := loadRequest(b, svc, n)
			body := mustMarshal(b, uncapped(b, req, bundle))
			out, err := e.Handle(context.Background(), svc.ID, body, scenarioAt)
			if err != nil || len(out.Response.Cards) == 0 {
				b.Fatalf("setup: %v, %d cards", err, len(out.Response.Cards))
			}
			b.Run(fmt.Sprintf("%s/%d", id, n), func(b *testing.B) {
				b.SetBytes(int64(len(body)))
				b.ReportAllocs()
				for b.Loop() {
					if _, err := e.Handle(context.Background(), svc.ID, body, scenarioAt); err != nil {
						b.Fatal(err)
					}
				}
				b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(n), "ns/observation")
			})
		}
	}
}

// BenchmarkRenderCards measures turning the load patient's drug-risk
// findings into CDS Hooks cards (with suggestions), checking them and
// encoding the response.
func BenchmarkRenderCards(b *testing.B) {
	e := testEngine(b, nil)
	svc := mustService(b, "sodium-drug-risk")
	req, _ := loadRequest(b, svc, 60)
	call, err := DecodeCall(svc, mustMarshal(b, req))
	if err != nil {
		b.Fatal(err)
	}
	keys, err := Resolve(context.Background(), svc, call, nil, e.limits)
	if err != nil {
		b.Fatal(err)
	}
	findings := e.ruleset.Evaluate(svc.Check, fhirmap.Map(mapInput(call, keys, scenarioAt), e.ruleset))
	if len(findings) == 0 {
		b.Fatal("setup: no findings")
	}
	drafts, order := draftIndex(call.DraftEntries)
	in := suggestionInput{At: scenarioAt, PatientID: call.Context.PatientID, Drafts: drafts, DraftOrder: order}
	b.ReportAllocs()
	for b.Loop() {
		cards, err := renderCards(findings, e.ruleset.Revision(), in)
		if err != nil {
			b.Fatal(err)
		}
		if err := ValidateResponse(Response{Cards: cards}); err != nil {
			b.Fatal(err)
		}
		mustJSON(Response{Cards: cards})
	}
}
