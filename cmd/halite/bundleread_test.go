package main

import (
	"bytes"
	"errors"
	"io"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestEvalReadsBundlesAsSent: a bundle file with a UTF-8 byte-order mark
// is read (RFC 8259 §8.1); a JSON array, or a bundle of an earlier FHIR
// version, is refused in plain words.
func TestEvalReadsBundlesAsSent(t *testing.T) {
	scenario, err := os.ReadFile(filepath.Join("..", "..", "testdata", "scenarios", "02-ssri-new-start-mild-hypona.json"))
	if err != nil {
		t.Fatal(err)
	}
	dstu2 := `{"resourceType":"Bundle","type":"collection","entry":[{"resource":{"resourceType":"Patient","id":"p"}},` +
		`{"resource":{"resourceType":"MedicationOrder","id":"m","patient":{"reference":"Patient/p"}}}]}`
	for _, tc := range []struct {
		name, content, wantErr string
	}{
		{"byte-order mark", "\xEF\xBB\xBF" + string(scenario), ""},
		{"JSON array", "[" + string(scenario) + "]", "the document is a JSON array"},
		{"DSTU2 bundle", dstu2, "FHIR R4 expected: this is a DSTU2 MedicationOrder"},
	} {
		path := filepath.Join(t.TempDir(), "bundle.json")
		if err := os.WriteFile(path, []byte(tc.content), 0o600); err != nil {
			t.Fatal(err)
		}
		var out bytes.Buffer
		err := run(t.Context(), []string{"eval", "--hook", "order-sign", "--at", scenarioAt, path}, &out, io.Discard)
		if tc.wantErr == "" {
			// Read as the plain file is: the sertraline draft's card is there.
			if !strings.Contains(out.String(), "Sertraline (new start) can lower sodium") {
				t.Errorf("%s: %v; report:\n%.400s", tc.name, err, out.String())
			}
			continue
		}
		if err == nil || !strings.Contains(err.Error(), tc.wantErr) || strings.Contains(err.Error(), "Go value") {
			t.Errorf("%s: error %v; want one saying %q", tc.name, err, tc.wantErr)
		}
	}
}

// TestEvalNamesWhatNoQueryAsksFor: the bundle's resources a service's
// request does not carry (no prefetch query asks for an Encounter or a
// Provenance) are counted in its report, not passed over in silence.
func TestEvalNamesWhatNoQueryAsksFor(t *testing.T) {
	var out bytes.Buffer
	err := run(t.Context(), []string{"eval", "--hook", "order-sign", "--service", "sodium-infusion-check", "--at", scenarioAt,
		filepath.Join("..", "..", "testdata", "bundles", "transaction-urn-uuid.json")}, &out, io.Discard)
	var ee *exitError
	if err != nil && !errors.As(err, &ee) {
		t.Fatal(err)
	}
	want := "not read      1 × Encounter, 1 × Provenance: no prefetch query of this service asks for them"
	if !strings.Contains(strings.Join(strings.Fields(out.String()), " "), strings.Join(strings.Fields(want), " ")) {
		t.Errorf("report lacks %q:\n%s", want, out.String())
	}
}
