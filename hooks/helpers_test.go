package hooks

import (
	"encoding/json"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/rules"
)

// scenarioAt is the evaluation time all scenario bundles are written for
// (testdata/scenarios/README.md).
var scenarioAt = time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)

func loadScenario(t testing.TB, name string) *fhirmap.Bundle {
	t.Helper()
	data, err := os.ReadFile(filepath.Join("..", "testdata", "scenarios", name))
	if err != nil {
		t.Fatal(err)
	}
	b, err := fhirmap.ParseBundle(data)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

func mustService(t testing.TB, id string) Service {
	t.Helper()
	s, ok := NewRegistry(nil, nil).Lookup(id)
	if !ok {
		t.Fatalf("no service %s", id)
	}
	return s
}

// requestMap builds a valid request for the scenario as a generic JSON map,
// so tests can break one field at a time.
func requestMap(t testing.TB, scenario, service, hook string) map[string]any {
	t.Helper()
	req, err := BuildRequest(loadScenario(t, scenario), mustService(t, service),
		RequestOptions{Hook: hook, UserID: "Practitioner/test-user"})
	if err != nil {
		t.Fatal(err)
	}
	raw, err := json.Marshal(req)
	if err != nil {
		t.Fatal(err)
	}
	var m map[string]any
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatal(err)
	}
	return m
}

func mustMarshal(t testing.TB, v any) []byte {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

func testEngine(t testing.TB, f FetcherFactory) *Engine {
	t.Helper()
	rs, err := rules.Load()
	if err != nil {
		t.Fatal(err)
	}
	return NewEngine(EngineConfig{Registry: NewRegistry(nil, nil), Ruleset: rs, NewFetcher: f, Limits: Limits{MaxPages: 5}})
}
