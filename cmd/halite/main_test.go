package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/rules"
)

var uuidPattern = regexp.MustCompile(`"uuid": "[0-9a-f-]{36}"`)

var update = flag.Bool("update", false, "rewrite golden files under testdata/")

const scenarioAt = "2026-11-20T08:00:00Z" // testdata/scenarios/README.md

func scenarioFiles(t *testing.T) []string {
	t.Helper()
	files, err := filepath.Glob(filepath.Join("..", "..", "testdata", "scenarios", "*.json"))
	if err != nil || len(files) < 8 {
		t.Fatalf("scenarios: %v (%d files)", err, len(files))
	}
	return files
}

// syncBuffer is a bytes.Buffer safe for the server goroutine and the test.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

// startServe runs `halite serve` on a free loopback port and returns its
// base URL, its log, and a stop function that returns run's error.
func startServe(t *testing.T, args ...string) (string, *syncBuffer, func() error) {
	t.Helper()
	if os.Getenv("OTEL_TRACES_EXPORTER") == "" { // no collector in unit tests: no endpoint, no exporter
		t.Setenv("OTEL_EXPORTER_OTLP_ENDPOINT", "")
		t.Setenv("OTEL_EXPORTER_OTLP_TRACES_ENDPOINT", "")
	}
	if os.Getenv("HALITE_STORE_DSN") == "" { // never the default ./halite-data inside the repository
		t.Setenv("HALITE_STORE_DSN", "sqlite:"+filepath.Join(t.TempDir(), "halite.db"))
	}
	ctx, cancel := context.WithCancel(context.Background())
	pr, pw := io.Pipe()
	logs := &syncBuffer{}
	done := make(chan error, 1)
	go func() {
		done <- run(ctx, append([]string{"serve", "--addr", "127.0.0.1:0"}, args...), pw, logs)
		pw.Close()
	}()
	line, err := bufio.NewReader(pr).ReadString('\n')
	if err != nil {
		cancel()
		t.Fatalf("serve did not start: %v; log: %s", err, logs.String())
	}
	go func() { _, _ = io.Copy(io.Discard, pr) }()
	base := strings.TrimSpace(strings.TrimPrefix(line, "halite listening on "))
	stop := func() error {
		cancel()
		select {
		case err := <-done:
			return err
		case <-time.After(30 * time.Second):
			t.Fatal("serve did not stop")
			return nil
		}
	}
	t.Cleanup(func() { cancel() })
	return base, logs, stop
}

func TestServeEndToEnd(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	base, logs, stop := startServe(t)

	resp, err := http.Get(base + "/cds-services")
	if err != nil {
		t.Fatal(err)
	}
	var d hooks.Discovery
	if err := json.NewDecoder(resp.Body).Decode(&d); err != nil || len(d.Services) != 5 {
		t.Fatalf("discovery: %v, %d services", err, len(d.Services))
	}
	resp.Body.Close()

	// Without trusted issuers, /readyz says callers are not authenticated.
	if resp, err = http.Get(base + "/readyz"); err != nil {
		t.Fatal(err)
	}
	ready, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if !strings.Contains(string(ready), "development") {
		t.Errorf("readyz does not say development mode: %s", ready)
	}

	// The README's curl example posts this file.
	demo, err := os.ReadFile(filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json"))
	if err != nil {
		t.Fatal(err)
	}
	resp, err = http.Post(base+"/cds-services/sodium-infusion-check", "application/json", bytes.NewReader(demo))
	if err != nil {
		t.Fatal(err)
	}
	body, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != 200 {
		t.Fatalf("order-sign: %d %s", resp.StatusCode, body)
	}
	if err := hooks.CheckNoEmpty(body, "cards"); err != nil {
		t.Errorf("response: %v", err)
	}
	if err := stop(); err != nil {
		t.Fatalf("serve returned %v", err)
	}
	log := logs.String()
	for _, want := range []string{"DEVELOPMENT MODE", `"ruleset":"`, `"route":"/cds-services/:id"`, `"status":200`, "stopped"} {
		if !strings.Contains(log, want) {
			t.Errorf("log lacks %s:\n%s", want, log)
		}
	}
	// No PHI in logs: the demo patient's id and the draft order's id never appear.
	for _, phi := range []string{"pt-alder", "mr-alder"} {
		if strings.Contains(log, phi) {
			t.Errorf("log contains identifier %q", phi)
		}
	}
}

// TestServeDrainsInFlight sends a call whose FHIR fetch is slow, stops the
// server while it is in flight, and expects the call to finish with 200.
func TestServeDrainsInFlight(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	b := readScenario(t, "06-no-weight-no-height.json")
	store := hooks.NewBundleStore(b)
	store.Token = "tok"
	entered := make(chan struct{}, 16)
	release := make(chan struct{})
	slow := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		entered <- struct{}{}
		<-release
		store.ServeHTTP(w, r)
	}))
	defer slow.Close()
	svc, _ := hooks.NewRegistry(nil, nil).Lookup("sodium-drug-risk")
	req, err := hooks.BuildRequest(b, svc, hooks.RequestOptions{Hook: "order-sign", UserID: "Practitioner/u",
		OmitPrefetch: true, FHIRServer: slow.URL, AccessToken: "tok"})
	if err != nil {
		t.Fatal(err)
	}
	base, _, stop := startServe(t)
	result := make(chan int, 1)
	go func() {
		resp, err := http.Post(base+"/cds-services/sodium-drug-risk", "application/json", bytes.NewReader(mustJSON(t, req)))
		if err != nil {
			result <- -1
			return
		}
		resp.Body.Close()
		result <- resp.StatusCode
	}()
	<-entered // the call is in flight, blocked in its first fetch
	stopped := make(chan error, 1)
	go func() { stopped <- stop() }()
	time.Sleep(100 * time.Millisecond) // give Shutdown time to begin; the assertion below does not depend on it
	close(release)
	if code := <-result; code != 200 {
		t.Errorf("in-flight call answered %d, want 200", code)
	}
	if err := <-stopped; err != nil {
		t.Errorf("serve returned %v", err)
	}
}

func readScenario(t *testing.T, name string) *fhirmap.Bundle {
	t.Helper()
	data, err := os.ReadFile(filepath.Join("..", "..", "testdata", "scenarios", name))
	if err != nil {
		t.Fatal(err)
	}
	b, err := fhirmap.ParseBundle(data)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

func mustJSON(t *testing.T, v any) []byte {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// TestEvalGolden runs every scenario on every hook and compares the exact
// CDS Hooks responses with testdata/golden (regenerate with -update).
func TestEvalGolden(t *testing.T) {
	for _, file := range scenarioFiles(t) {
		for _, hook := range []string{"order-sign", "order-select", "patient-view"} {
			name := strings.TrimSuffix(filepath.Base(file), ".json") + "." + hook + ".json"
			t.Run(name, func(t *testing.T) {
				var out, errOut bytes.Buffer
				err := run(context.Background(), []string{"eval", "--hook", hook, "--at", scenarioAt, "--json", file}, &out, &errOut)
				var ex *exitError
				if err != nil && !errors.As(err, &ex) {
					t.Fatalf("eval: %v %s", err, errOut.String())
				}
				golden := filepath.Join("..", "..", "testdata", "golden", name)
				// Card and suggestion uuids are random per call; goldens hold a placeholder.
				got := uuidPattern.ReplaceAll(out.Bytes(), []byte(`"uuid": "<uuid>"`))
				if *update {
					if err := os.WriteFile(golden, got, 0o644); err != nil {
						t.Fatal(err)
					}
				}
				want, err := os.ReadFile(golden)
				if err != nil {
					t.Fatalf("%v (run with -update to create)", err)
				}
				if !bytes.Equal(got, want) {
					t.Errorf("response differs from %s:\n%s", golden, out.String())
				}
				var all map[string]hooks.Response
				if err := json.Unmarshal(out.Bytes(), &all); err != nil || len(all) == 0 {
					t.Fatalf("output is not a map of responses: %v", err)
				}
				for id, r := range all {
					if err := hooks.ValidateResponse(r); err != nil {
						t.Errorf("%s: %v", id, err)
					}
				}
			})
		}
	}
}

func TestEvalSingleServiceAndReport(t *testing.T) {
	file := filepath.Join("..", "..", "testdata", "scenarios", "07-malformed-data.json")
	var out bytes.Buffer
	if err := run(context.Background(), []string{"eval", "--hook", "order-sign", "--service", "sodium-drug-risk",
		"--at", scenarioAt, "--json", file}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	var r hooks.Response
	if err := json.Unmarshal(out.Bytes(), &r); err != nil || r.Cards == nil {
		t.Fatalf("--service --json must print exactly one response: %v %s", err, out.String())
	}
	out.Reset()
	if err := run(context.Background(), []string{"eval", file, "--hook", "order-sign", "--at", scenarioAt}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	report := out.String()
	// The reasons the malformed scenario's observations are rejected.
	for _, want := range []string{"== sodium-infusion-check", "== sodium-drug-risk", "status is missing",
		`unit "mmol/dL"`, "implausible value 1400", "no effective time", `status "preliminary"`,
		"no valueQuantity", "duplicate of", `Patient.gender "f"`} {
		if !strings.Contains(report, want) {
			t.Errorf("report lacks %q:\n%s", want, report)
		}
	}
}

func TestCommandErrors(t *testing.T) {
	dir := t.TempDir()
	notBundle := filepath.Join(dir, "patient.json")
	os.WriteFile(notBundle, []byte(`{"resourceType":"Patient","id":"x"}`), 0o644)
	notJSON := filepath.Join(dir, "bad.json")
	os.WriteFile(notJSON, []byte(`{"resourceType":`), 0o644)
	noType := filepath.Join(dir, "notype.json")
	os.WriteFile(noType, []byte(`{"resourceType":"Bundle","entry":[]}`), 0o644)
	document := filepath.Join(dir, "document.json")
	os.WriteFile(document, []byte(`{"resourceType":"Bundle","type":"document","entry":[]}`), 0o644)
	noPatient := filepath.Join(dir, "empty.json")
	os.WriteFile(noPatient, []byte(`{"resourceType":"Bundle","type":"collection","entry":[]}`), 0o644)
	scenario := scenarioFiles(t)[0]
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"frobnicate"}, "unknown command"},
		{[]string{"eval", scenario}, "--hook is required"},
		{[]string{"eval", "--hook", "encounter-start", scenario}, "no service serves"},
		{[]string{"eval", "--hook", "order-sign", "--service", "sodium-chart-review", scenario}, "does not serve"},
		{[]string{"eval", "--hook", "order-sign"}, "BUNDLE file is required"},
		{[]string{"eval", "--hook", "order-sign", filepath.Join(dir, "missing.json")}, "no such file"},
		{[]string{"eval", "--hook", "order-sign", notBundle}, `want "Bundle"`},
		{[]string{"eval", "--hook", "order-sign", notJSON}, "read bundle"},
		{[]string{"eval", "--hook", "patient-view", noPatient}, "no Patient"},
		{[]string{"eval", "--hook", "patient-view", noType}, "Bundle.type is missing"},
		{[]string{"request", "--hook", "patient-view", document}, `Bundle.type "document"`},
		{[]string{"eval", "--hook", "order-sign", "--at", "yesterday", scenario}, "--at"},
		{[]string{"serve", "--addr", "0.0.0.0:8080"}, "listen_addr"},
	} {
		err := run(context.Background(), tc.args, io.Discard, io.Discard)
		if err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%v: got %v, want an error containing %q", tc.args, err, tc.want)
		}
	}
}

func mustLookup(t *testing.T, id string) hooks.Service {
	s, ok := hooks.NewRegistry(nil, nil).Lookup(id)
	if !ok {
		t.Fatal(id)
	}
	return s
}

func TestExitStatus(t *testing.T) {
	card := func(ind string) hooks.Card { return hooks.Card{Indicator: ind} }
	for _, tc := range []struct {
		cards []hooks.Card
		want  int
	}{
		{nil, 0}, {[]hooks.Card{card("info")}, 0}, {[]hooks.Card{card("info"), card("warning")}, 2},
		{[]hooks.Card{card("critical"), card("warning")}, 3},
	} {
		got := exitStatus(map[string]*hooks.Outcome{"a": {Response: hooks.Response{Cards: tc.cards}}})
		if got != tc.want {
			t.Errorf("%v: exit %d, want %d", tc.cards, got, tc.want)
		}
	}
}

// TestRequestCommand checks the request an EHR would send: patientId from
// the bundle's Patient, drafts in draftOrders, every prefetch key answered.
func TestRequestCommand(t *testing.T) {
	file := filepath.Join("..", "..", "testdata", "scenarios", "12-normal-sodium-two-drafts.json")
	var out bytes.Buffer
	if err := run(context.Background(), []string{"request", "--hook", "order-select", "--service", "sodium-drug-risk", file},
		&out, io.Discard); err != nil {
		t.Fatal(err)
	}
	var req hooks.Request
	if err := json.Unmarshal(out.Bytes(), &req); err != nil {
		t.Fatal(err)
	}
	c, err := hooks.DecodeCall(mustLookup(t, "sodium-drug-risk"), out.Bytes())
	if err != nil {
		t.Fatalf("the service rejects the request it was built for: %v", err)
	}
	if len(c.DraftEntries) != 2 || len(c.Context.Selections) != 2 {
		t.Errorf("%d drafts, %d selections; the scenario has two drafts", len(c.DraftEntries), len(c.Context.Selections))
	}
	for _, k := range mustLookup(t, "sodium-drug-risk").Prefetch {
		if _, ok := req.Prefetch[k.Key]; !ok {
			t.Errorf("prefetch %s missing", k.Key)
		}
	}
	out.Reset()
	if err := run(context.Background(), []string{"request", "--hook", "order-sign", "--service", "sodium-drug-risk",
		"--no-prefetch", "--fhir-server", "https://ehr.example.org/fhir", "--access-token", "t", file}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	req = hooks.Request{}
	if err := json.Unmarshal(out.Bytes(), &req); err != nil {
		t.Fatal(err)
	}
	if req.Prefetch != nil || req.FHIRServer != "https://ehr.example.org/fhir" || req.FHIRAuthorization == nil {
		t.Errorf("--no-prefetch --fhir-server: %s", out.String())
	}
	out.Reset()
	if err := run(context.Background(), []string{"request", "--hook", "order-sign", "--service", "sodium-drug-risk",
		"--encounter", "enc-12", file}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	if c, err := hooks.DecodeCall(mustLookup(t, "sodium-drug-risk"), out.Bytes()); err != nil || c.Context.EncounterID != "enc-12" ||
		c.ContextTokens["encounterId"] != "enc-12" {
		t.Errorf("--encounter: %v, context %+v", err, c)
	}
}

// TestDemoRequestCurrent keeps the README's demo request equal to what
// `halite request` makes from its scenario (apart from hookInstance).
func TestDemoRequestCurrent(t *testing.T) {
	var out bytes.Buffer
	scenario := filepath.Join("..", "..", "testdata", "scenarios", "01-chronic-hypona-3pct-infusion.json")
	if err := run(context.Background(), []string{"request", "--hook", "order-sign", "--service", "sodium-infusion-check",
		scenario}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	demoPath := filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json")
	demo, err := os.ReadFile(demoPath)
	if err != nil {
		t.Fatal(err)
	}
	strip := func(b []byte) string {
		var m map[string]any
		if err := json.Unmarshal(b, &m); err != nil {
			t.Fatal(err)
		}
		delete(m, "hookInstance")
		s, _ := json.Marshal(m)
		return string(s)
	}
	if *update {
		if err := os.WriteFile(demoPath, out.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	if strip(out.Bytes()) != strip(demo) {
		t.Errorf("%s is stale; run go test ./cmd/halite -run TestDemoRequestCurrent -update", demoPath)
	}
}

// TestServeReadinessFailsDuringDrainDelay: after SIGTERM, /readyz answers
// 503 while the listener still serves, for readiness_drain_delay.
func TestServeReadinessFailsDuringDrainDelay(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	// A generous delay: the test only needs one /readyz poll inside it, even
	// on a loaded CI machine.
	t.Setenv("HALITE_READINESS_DRAIN_DELAY", "3s")
	base, _, stop := startServe(t)
	stopped := make(chan error, 1)
	go func() { stopped <- stop() }()
	saw503 := false
	for i := 0; i < 600 && !saw503; i++ { // bounded poll; the delay keeps the listener open
		resp, err := http.Get(base + "/readyz")
		if err != nil {
			break
		}
		resp.Body.Close()
		saw503 = resp.StatusCode == http.StatusServiceUnavailable
		time.Sleep(10 * time.Millisecond)
	}
	if !saw503 {
		t.Error("/readyz never answered 503 during the drain delay")
	}
	if err := <-stopped; err != nil {
		t.Errorf("serve returned %v", err)
	}
}

// TestServeBundleFetchPath follows the README's serve-bundle example: a
// request with no prefetch, pointed at `halite serve-bundle`, is answered
// through the fetch path by `halite serve --at`, with the cards eval gives
// for the scenario at that time.
func TestServeBundleFetchPath(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	scenario := filepath.Join("..", "..", "testdata", "scenarios", "09-rapid-correction-high-risk.json")
	ctx, cancel := context.WithCancel(context.Background())
	pr, pw := io.Pipe()
	done := make(chan error, 1)
	go func() {
		done <- run(ctx, []string{"serve-bundle", "--addr", "127.0.0.1:0", "--page-size", "2", "--token", "tok", scenario},
			pw, io.Discard)
		pw.Close()
	}()
	line, err := bufio.NewReader(pr).ReadString('\n')
	if err != nil {
		cancel()
		t.Fatal(err)
	}
	go func() { _, _ = io.Copy(io.Discard, pr) }()
	fhirURL := strings.TrimSpace(line[strings.Index(line, "http://"):])

	var req bytes.Buffer
	if err := run(context.Background(), []string{"request", "--hook", "patient-view", "--no-prefetch",
		"--fhir-server", fhirURL, "--access-token", "tok", scenario}, &req, io.Discard); err != nil {
		t.Fatal(err)
	}
	var reqs map[string]json.RawMessage
	if err := json.Unmarshal(req.Bytes(), &reqs); err != nil {
		t.Fatal(err)
	}
	base, logs, stop := startServe(t, "--at", scenarioAt)
	resp, err := http.Post(base+"/cds-services/sodium-chart-review", "application/json", bytes.NewReader(reqs["sodium-chart-review"]))
	if err != nil {
		t.Fatal(err)
	}
	body, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != 200 {
		t.Fatalf("status %d: %s", resp.StatusCode, body)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(logs.String(), "sodium=fetched") || strings.Contains(logs.String(), "tok\"") {
		t.Errorf("the call did not go through the fetch path, or logged the token:\n%s", logs.String())
	}
	if !strings.Contains(logs.String(), "FIXED CLOCK") {
		t.Errorf("serve --at did not say its clock is fixed:\n%s", logs.String())
	}
	var evalOut bytes.Buffer
	err = run(context.Background(), []string{"eval", "--hook", "patient-view", "--service", "sodium-chart-review", "--at", scenarioAt, "--json", scenario},
		&evalOut, io.Discard)
	var ex *exitError
	if err != nil && !errors.As(err, &ex) {
		t.Fatal(err)
	}
	if got, want := responseSummaries(t, body), responseSummaries(t, evalOut.Bytes()); len(want) == 0 || !slices.Equal(got, want) {
		t.Errorf("serve --at gave cards %q, eval --at %q", got, want)
	}
	cancel()
	if err := <-done; err != nil {
		t.Errorf("serve-bundle returned %v", err)
	}
	if err := run(context.Background(), []string{"serve-bundle", "--addr", "0.0.0.0:0", scenario}, io.Discard, io.Discard); err == nil ||
		!strings.Contains(err.Error(), "loopback") {
		t.Errorf("serve-bundle on a public address: %v", err)
	}
}

// responseSummaries are the card summaries of a CDS Hooks response.
func responseSummaries(t *testing.T, body []byte) []string {
	t.Helper()
	var r struct {
		Cards []struct {
			Summary string `json:"summary"`
		} `json:"cards"`
	}
	if err := json.Unmarshal(body, &r); err != nil {
		t.Fatalf("%v: %s", err, body)
	}
	var out []string
	for _, c := range r.Cards {
		out = append(out, c.Summary)
	}
	return out
}

// TestServeAtOnlyInDevelopment: a fixed clock is refused outside
// development mode, and a malformed time is named.
func TestServeAtOnlyInDevelopment(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	t.Setenv("HALITE_DEVELOPMENT_MODE", "false")
	err := run(context.Background(), []string{"serve", "--addr", "127.0.0.1:0", "--at", scenarioAt}, io.Discard, io.Discard)
	if err == nil || !strings.Contains(err.Error(), "development mode only") {
		t.Errorf("serve --at outside development mode: %v", err)
	}
	t.Setenv("HALITE_DEVELOPMENT_MODE", "true")
	err = run(context.Background(), []string{"serve", "--addr", "127.0.0.1:0", "--at", "yesterday"}, io.Discard, io.Discard)
	if err == nil || !strings.Contains(err.Error(), "not an RFC 3339 time") {
		t.Errorf("serve --at yesterday: %v", err)
	}
}

// TestEvalPolicyOverride: a site override changes the card and the
// ruleset revision stamped on it; a bad override is refused by name.
func TestEvalPolicyOverride(t *testing.T) {
	file := filepath.Join("..", "..", "testdata", "scenarios", "15-hypona-3pct-at-suggested-rate.json")
	evalJSON := func(extra ...string) hooks.Response {
		t.Helper()
		var out bytes.Buffer
		args := append([]string{"eval", "--hook", "order-sign", "--service", "sodium-infusion-check", "--at", scenarioAt, "--json"}, extra...)
		err := run(context.Background(), append(args, file), &out, io.Discard)
		var ee *exitError
		if err != nil && !errors.As(err, &ee) {
			t.Fatal(err)
		}
		var r hooks.Response
		if err := json.Unmarshal(out.Bytes(), &r); err != nil || len(r.Cards) != 1 {
			t.Fatalf("want one card: %v %s", err, out.String())
		}
		return r
	}
	base := evalJSON()
	override := filepath.Join(t.TempDir(), "site.json")
	if err := os.WriteFile(override, []byte(`{"cards": {"rules": {"hypertonic-saline-projection": {"indicator": "warning", "recheckHours": 2}}}}`), 0o600); err != nil {
		t.Fatal(err)
	}
	site := evalJSON("--policy-override", override)
	if base.Cards[0].Indicator != "info" || site.Cards[0].Indicator != "warning" {
		t.Errorf("indicators %s → %s, want info → warning", base.Cards[0].Indicator, site.Cards[0].Indicator)
	}
	if bytes.Equal(base.Cards[0].Extension, site.Cards[0].Extension) {
		t.Error("the override did not change the ruleset revision on the card")
	}
	bad := filepath.Join(t.TempDir(), "bad.json")
	if err := os.WriteFile(bad, []byte(`{"limits": {"hyponatremiaRise24h": {"value": 12}}}`), 0o600); err != nil {
		t.Fatal(err)
	}
	err := run(context.Background(), []string{"eval", "--hook", "order-sign", "--policy-override", bad, file}, io.Discard, io.Discard)
	if err == nil || !strings.Contains(err.Error(), "policy_override") || !strings.Contains(err.Error(), "needs its source") {
		t.Errorf("bad override: %v", err)
	}
}

// TestRulesCommand: halite rules prints the revision, thresholds and the
// knowledge base; --json is the same as data.
func TestRulesCommand(t *testing.T) {
	var out bytes.Buffer
	if err := run(context.Background(), []string{"rules"}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	text := out.String()
	for _, want := range []string{"ruleset 2026.", "hyponatremia rise per 24 h", "sodium-projected-over-limit",
		"sodium below 125", "sertraline", "RxNorm 36437", "lithium", "re-validate every code"} {
		if !strings.Contains(text, want) {
			t.Errorf("rules output lacks %q", want)
		}
	}
	out.Reset()
	if err := run(context.Background(), []string{"rules", "--json"}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	var doc struct {
		Ruleset string `json:"ruleset"`
		Drugs   struct {
			Ingredients []json.RawMessage `json:"ingredients"`
		} `json:"drugs"`
	}
	if err := json.Unmarshal(out.Bytes(), &doc); err != nil || !strings.HasPrefix(doc.Ruleset, "2026.") || len(doc.Drugs.Ingredients) < 80 {
		t.Errorf("rules --json: %v, %s, %d ingredients", err, doc.Ruleset, len(doc.Drugs.Ingredients))
	}
}

// TestEvalLocalLabCodes: a bundle whose sodium results carry only a site's
// code gives the same card as with LOINC once --lab-codes names the code,
// and none without; a bad codes file is refused, naming the entry.
func TestEvalLocalLabCodes(t *testing.T) {
	scenario := filepath.Join("..", "..", "testdata", "scenarios", "29-overcorrected-19-in-36h.json")
	data, err := os.ReadFile(scenario)
	if err != nil {
		t.Fatal(err)
	}
	// The example site code NA-SER in deploy/lab-codes.example.json.
	local := bytes.ReplaceAll(data, []byte(`"system": "http://loinc.org",
              "code": "2951-2"`), []byte(`"system": "http://lab.example.org/codes",
              "code": "NA-SER"`))
	if bytes.Equal(local, data) {
		t.Fatal("the scenario's sodium codings were not found to replace")
	}
	file := filepath.Join(t.TempDir(), "local.json")
	if err := os.WriteFile(file, local, 0o600); err != nil {
		t.Fatal(err)
	}
	codes := filepath.Join("..", "..", "deploy", "lab-codes.example.json")
	evalCards := func(path string, extra ...string) []hooks.Card {
		t.Helper()
		var out bytes.Buffer
		args := append([]string{"eval", "--hook", "patient-view", "--service", "sodium-chart-review", "--at", scenarioAt, "--json"}, extra...)
		err := run(context.Background(), append(args, path), &out, io.Discard)
		var ee *exitError
		if err != nil && !errors.As(err, &ee) {
			t.Fatal(err)
		}
		var r hooks.Response
		if err := json.Unmarshal(out.Bytes(), &r); err != nil {
			t.Fatalf("%v %s", err, out.String())
		}
		return r.Cards
	}
	want := evalCards(scenario)
	if len(want) == 0 {
		t.Fatal("scenario 29 gives no card")
	}
	if got := evalCards(file); len(got) != 0 {
		t.Errorf("site-coded sodium read without --lab-codes: %d cards", len(got))
	}
	got := evalCards(file, "--lab-codes", codes)
	if len(got) != len(want) || got[0].Summary != want[0].Summary {
		t.Errorf("with --lab-codes: %d cards %v, want %d like the LOINC-coded scenario (%q)", len(got), got, len(want), want[0].Summary)
	}
	bad := filepath.Join(t.TempDir(), "bad.json")
	if err := os.WriteFile(bad, []byte(`{"codes":[{"system":"http://lab.example.org/codes","code":"K","analyte":"kalium"}]}`), 0o600); err != nil {
		t.Fatal(err)
	}
	err = run(context.Background(), []string{"eval", "--hook", "patient-view", "--lab-codes", bad, file}, io.Discard, io.Discard)
	if err == nil || !strings.Contains(err.Error(), "lab_codes") || !strings.Contains(err.Error(), `codes[0]: analyte "kalium"`) {
		t.Errorf("bad codes file: %v", err)
	}
	// The server refuses it at start-up.
	t.Setenv("HALITE_LAB_CODES", bad)
	err = run(context.Background(), []string{"serve", "--addr", "127.0.0.1:0"}, io.Discard, io.Discard)
	if err == nil || !strings.Contains(err.Error(), "lab_codes") {
		t.Errorf("serve with a bad lab_codes: %v", err)
	}
}

// curationMark matches reviewers' curation notes: verification marks,
// "from memory", note numbers, repository addresses and commit hashes.
var curationMark = regexp.MustCompile(`from memory|\[V\b[^\]]*\]|\[derived\b|reference notes|§\d|github\.com|commit [0-9a-f]{7,}|\.tsv\b`)

// TestGoldenCardsCarryNoCurationNotes: no card a clinician reads shows the
// curation notes that stay in the rules data (issue 20).
func TestGoldenCardsCarryNoCurationNotes(t *testing.T) {
	files, err := filepath.Glob(filepath.Join("..", "..", "testdata", "golden", "*.json"))
	if err != nil || len(files) == 0 {
		t.Fatalf("no golden files: %v", err)
	}
	cards, links := 0, 0
	for _, f := range files {
		data, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		var all map[string]hooks.Response
		if err := json.Unmarshal(data, &all); err != nil {
			t.Fatalf("%s: %v", f, err)
		}
		for svc, r := range all {
			for _, c := range r.Cards {
				cards++
				texts := []string{c.Summary, c.Detail}
				for _, s := range c.Suggestions {
					texts = append(texts, s.Label)
				}
				for _, text := range texts {
					if m := curationMark.FindString(text); m != "" {
						t.Errorf("%s %s: card %q shows %q", filepath.Base(f), svc, c.Summary, m)
					}
				}
				for _, l := range c.Links {
					links++
					if l.Type != "absolute" || !rules.LinkAddress.MatchString(l.URL) {
						t.Errorf("%s %s: link %+v is not an absolute PubMed, PubMed Central or DOI address", filepath.Base(f), svc, l)
					}
				}
			}
		}
	}
	if cards < 50 || links == 0 {
		t.Errorf("only %d golden cards and %d links scanned", cards, links)
	}
}

// TestEvalDisplayTimezone: --display-timezone writes every time on a card in
// that zone with its date and zone name; a name that is not an IANA zone is
// refused, by eval and at the server's start-up.
func TestEvalDisplayTimezone(t *testing.T) {
	file := filepath.Join("..", "..", "testdata", "scenarios", "14-hypona-3pct-overshoot.json")
	var out bytes.Buffer
	err := run(context.Background(), []string{"eval", "--hook", "order-sign", "--service", "sodium-infusion-check", "--at", scenarioAt,
		"--json", "--display-timezone", "America/New_York", file}, &out, io.Discard)
	var ee *exitError
	if err != nil && !errors.As(err, &ee) {
		t.Fatal(err)
	}
	var r hooks.Response
	if err := json.Unmarshal(out.Bytes(), &r); err != nil || len(r.Cards) != 1 {
		t.Fatalf("%v %s", err, out.String())
	}
	// The latest sodium, 2026-11-20 05:00 UTC, is 00:00 in New York (EST, UTC−5, in November).
	d := r.Cards[0].Detail
	if !strings.Contains(d, "(2026-11-20 00:00 EST, Observation/obs-nyssa-na-04)") || strings.Contains(d, " UTC") {
		t.Errorf("times not in the display zone:\n%s", d)
	}
	err = run(context.Background(), []string{"eval", "--hook", "order-sign", "--display-timezone", "Mars/Olympus", file}, io.Discard, io.Discard)
	if err == nil || !strings.Contains(err.Error(), "IANA time zone") {
		t.Errorf("bad zone: %v", err)
	}
	t.Setenv("HALITE_DISPLAY_TIMEZONE", "Mars/Olympus")
	if err := run(context.Background(), []string{"serve", "--addr", "127.0.0.1:0"}, io.Discard, io.Discard); err == nil ||
		!strings.Contains(err.Error(), "display_timezone") {
		t.Errorf("serve with a bad display_timezone: %v", err)
	}
}

// TestEvalDisplayUnits: with every display unit set to the mass or
// equivalent unit, no card of any scenario writes mmol/L except where a
// result is quoted as sent, no unit token reaches the text, and the
// figures (what is computed) are those of the canonical run.
func TestEvalDisplayUnits(t *testing.T) {
	files, err := filepath.Glob(filepath.Join("..", "..", "testdata", "scenarios", "*.json"))
	if err != nil || len(files) < 30 {
		t.Fatalf("scenarios: %v", err)
	}
	evalJSON := func(hook, file string, extra ...string) map[string]hooks.Response {
		var out bytes.Buffer
		args := append([]string{"eval", "--hook", hook, "--at", scenarioAt, "--json"}, extra...)
		err := run(context.Background(), append(args, file), &out, io.Discard)
		var ee *exitError
		if err != nil && !errors.As(err, &ee) {
			t.Fatalf("%s %s: %v", filepath.Base(file), hook, err)
		}
		var all map[string]hooks.Response
		if err := json.Unmarshal(out.Bytes(), &all); err != nil {
			t.Fatalf("%s: %v", filepath.Base(file), err)
		}
		return all
	}
	sentAs := regexp.MustCompile(`\(sent as [^)]*\)`)
	mass, cards := 0, 0
	for _, f := range files {
		for _, hook := range []string{"patient-view", "order-select", "order-sign"} {
			plain := evalJSON(hook, f)
			shown := evalJSON(hook, f, "--display-units", "electrolytes=mEq/L,glucose=mg/dL,urea=mg/dL,creatinine=mg/dL")
			for svc, r := range shown {
				for i, c := range r.Cards {
					cards++
					text := c.Summary + "\n" + c.Detail
					if strings.ContainsAny(text, "\uE000\uE001\uE002") {
						t.Errorf("%s %s %s: a unit token reached the card", filepath.Base(f), hook, svc)
					}
					if strings.Contains(sentAs.ReplaceAllString(text, ""), "mmol/L") {
						t.Errorf("%s %s %s: mmol/L outside a quoted result:\n%s", filepath.Base(f), hook, svc, text)
					}
					if strings.Contains(text, "mg/dL (urea nitrogen)") || regexp.MustCompile(`glucose \d+ mg/dL`).MatchString(text) {
						mass++
					}
					if !bytes.Equal(plain[svc].Cards[i].Extension, c.Extension) {
						t.Errorf("%s %s %s: the figures changed with the display units", filepath.Base(f), hook, svc)
					}
				}
			}
		}
	}
	if cards < 80 || mass == 0 {
		t.Errorf("%d cards checked, %d with a mass unit: the scenarios no longer exercise the units", cards, mass)
	}
	for _, bad := range []string{"glucose=mEq/L", "sodium=mEq/L", "electrolytes=mEq/L,electrolytes=mmol/L", "electrolytes"} {
		err := run(context.Background(), []string{"eval", "--hook", "order-sign", "--display-units", bad, files[0]}, io.Discard, io.Discard)
		if err == nil || !strings.Contains(err.Error(), "--display-units") {
			t.Errorf("%s: %v", bad, err)
		}
	}
	t.Setenv("HALITE_DISPLAY_UNITS_UREA", "mmol/kg")
	if err := run(context.Background(), []string{"serve", "--addr", "127.0.0.1:0"}, io.Discard, io.Discard); err == nil ||
		!strings.Contains(err.Error(), "display_units.urea") {
		t.Errorf("serve with a bad display_units.urea: %v", err)
	}
}

// infusionRequest is the order-sign request `halite request` builds for
// sodium-infusion-check from a scenario (its name under testdata/scenarios).
func infusionRequest(t *testing.T, scenario string) []byte {
	t.Helper()
	var req bytes.Buffer
	path := filepath.Join("..", "..", "testdata", "scenarios", scenario)
	if err := run(context.Background(), []string{"request", "--hook", "order-sign", "--service", "sodium-infusion-check", path}, &req, io.Discard); err != nil {
		t.Fatal(err)
	}
	return req.Bytes()
}
