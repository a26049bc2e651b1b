package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"io"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// TestEvalCapturedRequest: eval reads a captured CDS Hooks request (the
// README's demo, built from scenario 01) as the service would receive it,
// and gives the cards the scenario bundle gives; its hook comes from the
// request.
func TestEvalCapturedRequest(t *testing.T) {
	demo := filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json")
	scenario := filepath.Join("..", "..", "testdata", "scenarios", "01-chronic-hypona-3pct-infusion.json")
	evalJSON := func(args ...string) []byte {
		t.Helper()
		var out, errOut bytes.Buffer
		err := run(context.Background(), append([]string{"eval", "--at", scenarioAt, "--json", "--service", "sodium-infusion-check"}, args...), &out, &errOut)
		var ex *exitError
		if err != nil && !errors.As(err, &ex) {
			t.Fatalf("eval %v: %v %s", args, err, errOut.String())
		}
		return out.Bytes()
	}
	got, want := responseSummaries(t, evalJSON(demo)), responseSummaries(t, evalJSON("--hook", "order-sign", scenario))
	if len(want) == 0 || !slices.Equal(got, want) {
		t.Errorf("captured request gave %q, the bundle %q", got, want)
	}
	var report bytes.Buffer
	err := run(context.Background(), []string{"eval", "--at", scenarioAt, demo}, &report, io.Discard)
	var ex *exitError
	if err != nil && !errors.As(err, &ex) {
		t.Fatal(err)
	}
	if !strings.HasPrefix(report.String(), "hook order-sign at "+scenarioAt) || !strings.Contains(report.String(), "== sodium-drug-risk") {
		t.Errorf("report of a captured request:\n%s", report.String())
	}
}

// TestEvalInputErrors: what eval says of inputs that are neither a Bundle
// nor a request, and of a --hook that contradicts the request.
func TestEvalInputErrors(t *testing.T) {
	dir := t.TempDir()
	for _, tc := range []struct {
		name, content string
		args          []string
		want          string
	}{
		{"hook mismatch", "", []string{"--hook", "patient-view"}, `is for hook "order-sign"`},
		{"select with a request", "", []string{"--select", "MedicationRequest/x"}, "is a captured request, sent as it is"},
		{"neither", `{"id":"x"}`, nil, `neither a FHIR Bundle (no "resourceType") nor a CDS Hooks request (no "hook")`},
		{"both", `{"resourceType":"Bundle","hook":"order-sign"}`, nil, `has both "hook" and "resourceType"`},
		{"hook not a string", `{"hook":3}`, nil, `"hook" must be a non-empty string`},
		{"not JSON", `hook: order-sign`, nil, "the document is not a JSON object"},
		{"not an object", `[1,2]`, nil, "the document is a JSON array"},
		{"truncated", `{"hook":`, nil, "read bundle"},
		{"unknown hook", `{"hook":"encounter-start","hookInstance":"x","context":{}}`, nil, `no service serves "encounter-start"`},
	} {
		t.Run(tc.name, func(t *testing.T) {
			path := filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json")
			if tc.content != "" {
				path = filepath.Join(dir, strings.ReplaceAll(tc.name, " ", "-")+".json")
				if err := os.WriteFile(path, []byte(tc.content), 0o600); err != nil {
					t.Fatal(err)
				}
			}
			err := run(context.Background(), append(append([]string{"eval", "--at", scenarioAt}, tc.args...), path), io.Discard, io.Discard)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("got %v, want an error containing %q", err, tc.want)
			}
		})
	}
}

// FuzzCapturedRequest: telling a request from a Bundle never panics, and a
// hook is returned only without an error.
func FuzzCapturedRequest(f *testing.F) {
	for _, s := range []string{`{"hook":"order-sign"}`, `{"resourceType":"Bundle"}`, `{"hook":1}`, `[]`, `null`, `{"hook":""}`, `{"hook":"a","resourceType":"B"}`} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		hook, err := capturedRequest("f", data)
		if err != nil && hook != "" {
			t.Errorf("hook %q with error %v", hook, err)
		}
	})
}

// TestCheckRequestCommand: the demo request conforms (exit 0); a broken
// one lists its problems with their paths, as text or JSON (exit 1); a
// --service that does not serve the request's hook is refused.
func TestCheckRequestCommand(t *testing.T) {
	demo := filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json")
	var out bytes.Buffer
	if err := run(context.Background(), []string{"check-request", demo}, &out, io.Discard); err != nil || !strings.Contains(out.String(), "0 errors") {
		t.Errorf("demo: %v\n%s", err, out.String())
	}
	broken := filepath.Join(t.TempDir(), "broken.json")
	if err := os.WriteFile(broken, []byte(`{"hook": "order-sign", "hookInstance": "x", "context": {"userId": "Practitioner/u", "patientId": "p1",
		"draftOrders": {"resourceType": "Bundle", "entry": []}}, "prefetch": {"patient": {"resourceType": "Patient", "id": "p2"}}}`), 0o600); err != nil {
		t.Fatal(err)
	}
	out.Reset()
	err := run(context.Background(), []string{"check-request", "--json", broken}, &out, io.Discard)
	var ex *exitError
	if !errors.As(err, &ex) || ex.code != exitFailure {
		t.Errorf("broken request: %v", err)
	}
	var problems []map[string]string
	if err := json.Unmarshal(out.Bytes(), &problems); err != nil {
		t.Fatalf("%v: %s", err, out.String())
	}
	found := map[string]bool{}
	for _, p := range problems {
		found[p["severity"]+" "+p["path"]] = true
	}
	for _, w := range []string{"error $.prefetch.patient.id", "error $.prefetch.sodium", "warning $.hookInstance"} {
		if !found[w] {
			t.Errorf("lacks %q in %v", w, problems)
		}
	}
	if err := run(context.Background(), []string{"check-request", "--service", "sodium-chart-review", demo}, io.Discard, io.Discard); err == nil ||
		!strings.Contains(err.Error(), "does not serve") {
		t.Errorf("--service of another hook: %v", err)
	}
}

// TestEvalFailOn: --fail-on tells an info card from none (exit 4 against
// 0) and refuses an unknown level.
func TestEvalFailOn(t *testing.T) {
	code := func(file string, args ...string) int {
		err := run(context.Background(), append(append([]string{"eval", "--hook", "patient-view", "--at", scenarioAt}, args...),
			filepath.Join("..", "..", "testdata", "scenarios", file)), io.Discard, io.Discard)
		var ex *exitError
		switch {
		case err == nil:
			return 0
		case errors.As(err, &ex):
			return ex.code
		}
		t.Fatalf("%s: %v", file, err)
		return -1
	}
	// 47: one info card; 12: no card on patient-view.
	if got := code("47-water-deprivation-central.json", "--fail-on", "info"); got != exitFailOn {
		t.Errorf("info card with --fail-on info: exit %d", got)
	}
	if got := code("47-water-deprivation-central.json", "--fail-on", "warning"); got != 0 {
		t.Errorf("info card with --fail-on warning: exit %d", got)
	}
	if got := code("47-water-deprivation-central.json"); got != 0 {
		t.Errorf("info card without --fail-on: exit %d", got)
	}
	if got := code("12-normal-sodium-two-drafts.json", "--fail-on", "info"); got != 0 {
		t.Errorf("no card with --fail-on info: exit %d", got)
	}
	if err := run(context.Background(), []string{"eval", "--fail-on", "high", "x.json"}, io.Discard, io.Discard); err == nil ||
		!strings.Contains(err.Error(), "--fail-on") {
		t.Errorf("--fail-on high: %v", err)
	}
}
