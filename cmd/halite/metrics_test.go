package main

import (
	"bufio"
	"bytes"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
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
// counter for every reason and the feedback counter for every service and
// outcome, at zero.
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
		{"halite_unavailable_total{", `reason="keys-unavailable"`}, {"halite_feedback_outcomes_total{", `outcome="overridden",service="sodium-chart-review"`}} {
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
