package main

import (
	"bytes"
	"context"
	"encoding/json"
	"log/slog"
	"net"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"
)

// TestTraceExporterConfiguration: spans are exported only where an OTLP
// exporter is configured, over the protocol asked for (OpenTelemetry SDK
// environment variables: OTEL_TRACES_EXPORTER, OTEL_EXPORTER_OTLP_ENDPOINT,
// OTEL_EXPORTER_OTLP_TRACES_ENDPOINT, OTEL_EXPORTER_OTLP_PROTOCOL,
// OTEL_EXPORTER_OTLP_TRACES_PROTOCOL).
func TestTraceExporterConfiguration(t *testing.T) {
	for _, tc := range []struct {
		name     string
		env      map[string]string
		exporter bool
		where    string // a part of the start-up line's export field
		err      string
	}{
		{name: "nothing configured", exporter: false, where: "no OTLP endpoint configured"},
		{name: "none", env: map[string]string{"OTEL_TRACES_EXPORTER": "none", "OTEL_EXPORTER_OTLP_ENDPOINT": "http://collector:4318"}, where: "none"},
		{name: "endpoint", env: map[string]string{"OTEL_EXPORTER_OTLP_ENDPOINT": "http://collector:4318"}, exporter: true, where: "OTLP http/protobuf to http://collector:4318"},
		{name: "traces endpoint", env: map[string]string{"OTEL_EXPORTER_OTLP_TRACES_ENDPOINT": "http://collector:4318/v1/traces"}, exporter: true, where: "http/protobuf to http://collector:4318/v1/traces"},
		{name: "otlp asked for, default endpoint", env: map[string]string{"OTEL_TRACES_EXPORTER": "otlp"}, exporter: true, where: "default endpoint"},
		{name: "grpc", env: map[string]string{"OTEL_EXPORTER_OTLP_ENDPOINT": "http://collector:4317", "OTEL_EXPORTER_OTLP_PROTOCOL": "grpc"}, exporter: true, where: "OTLP grpc to"},
		{name: "traces protocol wins", env: map[string]string{"OTEL_EXPORTER_OTLP_ENDPOINT": "http://collector:4317", "OTEL_EXPORTER_OTLP_PROTOCOL": "http/protobuf",
			"OTEL_EXPORTER_OTLP_TRACES_PROTOCOL": "grpc"}, exporter: true, where: "OTLP grpc"},
		{name: "http/json", env: map[string]string{"OTEL_EXPORTER_OTLP_ENDPOINT": "http://collector:4318", "OTEL_EXPORTER_OTLP_PROTOCOL": "http/json"}, err: "only http/protobuf and grpc"},
		{name: "zipkin", env: map[string]string{"OTEL_TRACES_EXPORTER": "zipkin"}, err: "only otlp and none"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			exp, where, err := traceExporter(context.Background(), func(k string) string { return tc.env[k] })
			if tc.err != "" {
				if err == nil || !strings.Contains(err.Error(), tc.err) {
					t.Fatalf("error %v, want %q", err, tc.err)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if (exp != nil) != tc.exporter || !strings.Contains(where, tc.where) {
				t.Errorf("exporter %v, where %q; want exporter %v, where containing %q", exp != nil, where, tc.exporter, tc.where)
			}
			if exp != nil {
				_ = exp.Shutdown(context.Background())
			}
		})
	}
}

// TestExportErrorsAreJSONLogLines: a collector that cannot be reached is
// reported as JSON log lines at ERROR, never as plain text in the log.
func TestExportErrorsAreJSONLogLines(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	closed := ln.Addr().String()
	ln.Close() // nothing listens there now
	t.Setenv("HALITE_CONFIG", "")
	t.Setenv("OTEL_TRACES_EXPORTER", "otlp")
	t.Setenv("OTEL_EXPORTER_OTLP_ENDPOINT", "http://"+closed)
	t.Setenv("OTEL_EXPORTER_OTLP_TIMEOUT", "300") // ms, retries included
	t.Setenv("OTEL_BSP_SCHEDULE_DELAY", "50")     // ms
	base, logs, stop := startServe(t)
	resp, err := http.Post(base+"/cds-services/sodium-infusion-check", "application/json", bytes.NewReader(infusionRequest(t, "14-hypona-3pct-overshoot.json")))
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	deadline := time.Now().Add(10 * time.Second)
	for time.Now().Before(deadline) && !strings.Contains(logs.String(), "telemetry export failed") {
		time.Sleep(50 * time.Millisecond)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	exportErrors := 0
	for _, line := range strings.Split(strings.TrimSpace(logs.String()), "\n") {
		var m map[string]any
		if err := json.Unmarshal([]byte(line), &m); err != nil {
			t.Errorf("a log line that is not JSON: %q", line)
			continue
		}
		if m["msg"] == "telemetry export failed" {
			exportErrors++
			if m["level"] != slog.LevelError.String() {
				t.Errorf("export failure logged at %v", m["level"])
			}
		}
	}
	if exportErrors == 0 {
		t.Errorf("no export failure logged; log:\n%s", logs.String())
	}
}

// TestNoExporterByDefault: with no OTLP endpoint configured, serve says it
// exports no traces, and makes no connection attempt to log about.
func TestNoExporterByDefault(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	_, logs, stop := startServe(t)
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	var found bool
	for _, line := range strings.Split(strings.TrimSpace(logs.String()), "\n") {
		var m map[string]any
		if json.Unmarshal([]byte(line), &m) == nil && m["msg"] == "traces" {
			found = m["export"] == "none (no OTLP endpoint configured)"
		}
	}
	if !found || strings.Contains(logs.String(), "export failed") {
		t.Errorf("start-up log does not say no traces are exported:\n%s", logs.String())
	}
}

// TestFHIRFetchCarriesTraceContext: a fetch from the EHR's FHIR server
// carries a W3C traceparent in the EHR's trace (the trace id the call came
// with) whose parent is halite's fetch span, not the EHR's.
func TestFHIRFetchCarriesTraceContext(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	var mu sync.Mutex
	var seen []string
	fhir := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		mu.Lock()
		seen = append(seen, r.Header.Get("traceparent"))
		mu.Unlock()
		w.Header().Set("Content-Type", "application/fhir+json")
		_, _ = w.Write([]byte(`{"resourceType":"Bundle","type":"searchset","entry":[]}`))
	}))
	defer fhir.Close()
	base, _, stop := startServe(t)
	defer stop()
	var req map[string]any
	if err := json.Unmarshal(infusionRequest(t, "14-hypona-3pct-overshoot.json"), &req); err != nil {
		t.Fatal(err)
	}
	delete(req["prefetch"].(map[string]any), "sodium") // fetched instead
	req["fhirServer"] = fhir.URL
	req["fhirAuthorization"] = map[string]any{"access_token": "t", "token_type": "Bearer", "expires_in": 60, "scope": "patient/*.read", "subject": "halite"}
	body, _ := json.Marshal(req)
	hr, _ := http.NewRequest(http.MethodPost, base+"/cds-services/sodium-infusion-check", bytes.NewReader(body))
	hr.Header.Set("Content-Type", "application/json")
	const ehrTrace, ehrSpan = "4bf92f3577b34da6a3ce929d0e0e4736", "00f067aa0ba902b7"
	hr.Header.Set("traceparent", "00-"+ehrTrace+"-"+ehrSpan+"-01")
	resp, err := http.DefaultClient.Do(hr)
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	mu.Lock()
	defer mu.Unlock()
	if len(seen) == 0 {
		t.Fatalf("the FHIR server was not called (status %d)", resp.StatusCode)
	}
	for _, tp := range seen {
		parts := strings.Split(tp, "-")
		if len(parts) != 4 || parts[1] != ehrTrace || parts[2] == ehrSpan || len(parts[2]) != 16 {
			t.Errorf("traceparent %q: want trace %s with halite's fetch span as parent", tp, ehrTrace)
		}
	}
}
