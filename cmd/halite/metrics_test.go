package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks"
)

// TestMetricsDurationBuckets scrapes /metrics after a call whose FHIR
// fetches each take at least 300 ms (a slow server in front of the
// scenario's data) and reads the histograms: bounds in seconds from 0.5 ms
// to 30 s, no fetch and no call in the buckets up to 0.25 s, and the call
// and its fetches counted by the 2.5 s bucket.
func TestMetricsDurationBuckets(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	b := readScenario(t, "06-no-weight-no-height.json")
	store := hooks.NewBundleStore(b)
	store.Token = "tok"
	slow := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		time.Sleep(300 * time.Millisecond)
		store.ServeHTTP(w, r)
	}))
	defer slow.Close()
	svc, _ := hooks.NewRegistry(nil, nil).Lookup("sodium-drug-risk")
	req, err := hooks.BuildRequest(b, svc, hooks.RequestOptions{Hook: "order-sign", UserID: "Practitioner/u",
		OmitPrefetch: true, FHIRServer: slow.URL, AccessToken: "tok"})
	if err != nil {
		t.Fatal(err)
	}
	t.Setenv("HALITE_CALL_TIMEOUT", "10s")
	base, _, stop := startServe(t)
	defer stop()
	resp, err := http.Post(base+"/cds-services/sodium-drug-risk", "application/json", bytes.NewReader(mustJSON(t, req)))
	if err != nil {
		t.Fatal(err)
	}
	io.Copy(io.Discard, resp.Body)
	resp.Body.Close()
	if resp.StatusCode != 200 {
		t.Fatalf("call: %d", resp.StatusCode)
	}
	resp, err = http.Get(base + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	// bucket[name][le] sums the cumulative counts of every series.
	bucket := map[string]map[string]float64{}
	sc := bufio.NewScanner(resp.Body)
	runtime := map[string]bool{}
	for sc.Scan() {
		line := sc.Text()
		for _, m := range []string{"go_goroutines ", "go_memstats_heap_alloc_bytes ", "process_cpu_seconds_total ", "process_open_fds "} {
			if strings.HasPrefix(line, m) {
				runtime[m] = true
			}
		}
		name, rest, ok := strings.Cut(line, "_bucket{")
		if !ok || strings.HasPrefix(line, "#") {
			continue
		}
		labels, value, _ := strings.Cut(rest, "} ")
		_, le, _ := strings.Cut(labels, `le="`)
		le, _, _ = strings.Cut(le, `"`)
		if strings.Contains(labels, `route="/metrics"`) {
			continue
		}
		v, err := strconv.ParseFloat(value, 64)
		if err != nil {
			t.Fatalf("%q: %v", line, err)
		}
		if bucket[name] == nil {
			bucket[name] = map[string]float64{}
		}
		bucket[name][le] += v
	}
	if len(runtime) != 4 {
		t.Errorf("Go runtime and process metrics: found %v", runtime)
	}
	for _, name := range []string{"halite_request_duration_seconds", "halite_fhir_fetch_duration_seconds"} {
		b := bucket[name]
		for _, bound := range hooks.DurationBuckets() {
			if _, ok := b[strconv.FormatFloat(bound, 'g', -1, 64)]; !ok {
				t.Errorf("%s has no bucket le=%g: %v", name, bound, b)
			}
		}
		if b["0.25"] != 0 || b["2.5"] < 1 {
			t.Errorf("%s: %v in le=0.25 (want 0), %v in le=2.5 (want ≥ 1)", name, b["0.25"], b["2.5"])
		}
	}
}

// TestLogLevelByOutcome: an answered call is logged at INFO, a caller's
// mistake (4xx) at WARN; 5xx at ERROR is checked by the outage tests.
func TestLogLevelByOutcome(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	base, logs, stop := startServe(t)
	demo, err := os.ReadFile(filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json"))
	if err != nil {
		t.Fatal(err)
	}
	for _, body := range [][]byte{demo, []byte(`{"hook": 1}`)} {
		resp, err := http.Post(base+"/cds-services/sodium-infusion-check", "application/json", bytes.NewReader(body))
		if err != nil {
			t.Fatal(err)
		}
		io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	levels := map[float64]string{}
	for _, l := range strings.Split(logs.String(), "\n") {
		var line struct {
			Level  string  `json:"level"`
			Msg    string  `json:"msg"`
			Status float64 `json:"status"`
		}
		if json.Unmarshal([]byte(l), &line) == nil && line.Msg == "request" {
			levels[line.Status] = line.Level
		}
	}
	if levels[200] != "INFO" || levels[400] != "WARN" {
		t.Errorf("levels by status %v, want 200 INFO and 400 WARN", levels)
	}
}

// TestCountersAtZero: before any call, /metrics already has the 503
// counter for every reason, the feedback counter for every service and
// outcome, and the store-failure counter for every operation and reason,
// at zero.
func TestCountersAtZero(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	base, _, stop := startServe(t)
	defer stop()
	resp, err := http.Get(base + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	body, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	for _, want := range [][2]string{{"halite_unavailable_total{", `reason="store-busy"`}, {"halite_unavailable_total{", `reason="fhir-timeout"`},
		{"halite_unavailable_total{", `reason="keys-unavailable"`}, {"halite_feedback_outcomes_total{", `outcome="overridden",service="sodium-chart-review"`},
		{`halite_store_failures_total{operation="card-log"`, `reason="store-fault"`}, {`halite_store_failures_total{operation="replay"`, `reason="store-busy"`}} {
		found := false
		for _, line := range strings.Split(string(body), "\n") {
			if strings.HasPrefix(line, want[0]) && strings.Contains(line, want[1]) {
				found = true
				if !strings.HasSuffix(line, "} 0") {
					t.Errorf("%s is not zero at start-up", line)
				}
			}
		}
		if !found {
			t.Errorf("no series %s%s} at start-up", want[0], want[1])
		}
	}
}

// scrapeFile is the recorded scrape the alert rules and the dashboard
// are checked against (deploy/prometheus_test.go, promtool in .ci/run).
var scrapeFile = filepath.Join("..", "..", "deploy", "prometheus", "testdata", "scrape.prom")

// TestRecordedScrape scrapes /metrics of a server that verifies its
// callers after an answered call, a call whose FHIR server fails (412), a
// malformed call (400) and one without a token (401), and holds the
// recorded scrape to it: the same metric families with the same label
// names (values differ from run to run). -update records it anew.
func TestRecordedScrape(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	failing := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.WriteHeader(http.StatusInternalServerError)
	}))
	defer failing.Close()
	dir, cfgPath := localIssuer(t)
	cfg, err := os.ReadFile(cfgPath)
	if err != nil {
		t.Fatal(err)
	}
	cfg = append(cfg, []byte("    fhir_servers:\n      - base_url: "+failing.URL+"\n")...)
	if err := os.WriteFile(cfgPath, cfg, 0o600); err != nil {
		t.Fatal(err)
	}
	base, _, stop := startServe(t, "--config", cfgPath)
	defer stop()
	token := func() string {
		var out bytes.Buffer
		if err := run(context.Background(), []string{"token", "--key", filepath.Join(dir, "issuer-private.jwk"), "--iss", "https://ehr.example.org",
			"--aud", "http://127.0.0.1/cds-services/sodium-infusion-check"}, &out, io.Discard); err != nil {
			t.Fatal(err)
		}
		return "Bearer " + strings.TrimSpace(out.String())
	}
	demo, err := os.ReadFile(filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json"))
	if err != nil {
		t.Fatal(err)
	}
	var req map[string]any
	if err := json.Unmarshal(demo, &req); err != nil {
		t.Fatal(err)
	}
	delete(req["prefetch"].(map[string]any), "sodium")
	req["fhirServer"] = failing.URL
	req["fhirAuthorization"] = map[string]any{"access_token": "t", "token_type": "Bearer", "expires_in": 60, "scope": "patient/*.read", "subject": "halite"}
	for _, c := range []struct {
		body   []byte
		authz  string
		status int
	}{{demo, token(), 200}, {mustJSON(t, req), token(), 412}, {[]byte("{"), token(), 400}, {demo, "", 401}} {
		if status, body := postJSON(t, base+"/cds-services/sodium-infusion-check", c.authz, c.body); status != c.status {
			t.Fatalf("call answered %d, want %d: %s", status, c.status, body)
		}
	}
	resp, err := http.Get(base + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	live, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if *update {
		if err := os.WriteFile(scrapeFile, live, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	recorded, err := os.ReadFile(scrapeFile)
	if err != nil {
		t.Fatalf("%v (record it with go test ./cmd/halite -run TestRecordedScrape -update)", err)
	}
	got, want := seriesShapes(string(live)), seriesShapes(string(recorded))
	for s := range want {
		if !got[s] {
			t.Errorf("the recorded scrape has %s, the live one does not (re-record with -update)", s)
		}
	}
	for s := range got {
		if !want[s] {
			t.Errorf("the live scrape has %s, the recorded one does not (re-record with -update)", s)
		}
	}
	for _, s := range []string{`halite_auth_failures_total{otel_scope_name,otel_scope_schema_url,otel_scope_version,reason}`,
		`halite_request_duration_seconds_bucket{cause,le,otel_scope_name,otel_scope_schema_url,otel_scope_version,route,service,status}`,
		`halite_fhir_fetch_duration_seconds_bucket{cause,code,le,otel_scope_name,otel_scope_schema_url,otel_scope_version,prefetch_key,server_address}`} {
		if !got[s] {
			t.Errorf("the scrape lacks %s", s)
		}
	}
}

// seriesShapes lists halite's and the HTTP server's series of a scrape as
// "name{label,names}", the label names sorted.
func seriesShapes(scrape string) map[string]bool {
	out := map[string]bool{}
	for _, line := range strings.Split(scrape, "\n") {
		if !strings.HasPrefix(line, "halite_") && !strings.HasPrefix(line, "http_server_") {
			continue
		}
		name, rest, _ := strings.Cut(line, "{")
		labels, _, _ := strings.Cut(rest, "} ")
		var names []string
		for _, kv := range strings.Split(labels, `",`) {
			if k, _, ok := strings.Cut(kv, "="); ok {
				names = append(names, k)
			}
		}
		sort.Strings(names)
		out[name+"{"+strings.Join(names, ",")+"}"] = true
	}
	return out
}
