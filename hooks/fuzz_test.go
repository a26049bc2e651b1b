package hooks

import (
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"testing"

	"github.com/halite-cds/halite/fhirmap"
)

// FuzzHandle feeds arbitrary bodies through the whole pipeline of one
// service: it must never panic, and must either answer a valid response or
// fail with a client error (400/412), never an internal one.
func FuzzHandle(f *testing.F) {
	files, _ := filepath.Glob(filepath.Join("..", "testdata", "scenarios", "*.json"))
	for _, file := range files {
		data, err := os.ReadFile(file)
		if err != nil {
			f.Fatal(err)
		}
		b, err := fhirmap.ParseBundle(data)
		if err != nil {
			continue
		}
		for _, svc := range NewRegistry(nil, nil).Services() {
			for _, hook := range svc.Hooks {
				if req, err := BuildRequest(b, svc, RequestOptions{Hook: hook, UserID: "Practitioner/u1"}); err == nil {
					raw, _ := json.Marshal(req)
					f.Add(svc.ID, raw)
				}
			}
		}
	}
	f.Add("sodium-drug-risk", []byte(`{"hook":"order-sign","hookInstance":"x","context":{"userId":"Practitioner/1","patientId":"p","draftOrders":{"resourceType":"Bundle"}},"prefetch":{"patient":null,"sodium":{"resourceType":"OperationOutcome"}}}`))
	e := testEngine(f, nil)
	f.Fuzz(func(t *testing.T, id string, body []byte) {
		out, err := e.Handle(context.Background(), id, body, scenarioAt)
		if err != nil {
			switch KindOf(err) {
			case KindBadRequest, KindPrecondition, KindUnknownService:
				return
			}
			t.Fatalf("internal error for a client's input: %v", err)
		}
		if err := ValidateResponse(out.Response); err != nil {
			t.Fatalf("invalid response: %v", err)
		}
	})
}
