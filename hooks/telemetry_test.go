package hooks

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/halite-cds/halite/rules"
	"go.opentelemetry.io/otel/attribute"
	sdkmetric "go.opentelemetry.io/otel/sdk/metric"
	"go.opentelemetry.io/otel/sdk/metric/metricdata"
	sdktrace "go.opentelemetry.io/otel/sdk/trace"
	"go.opentelemetry.io/otel/sdk/trace/tracetest"
)

// memRecorder is a Recorder in memory.
type memRecorder struct{ cards int }

func (m *memRecorder) LogCards(_ context.Context, cards []LoggedCard) error {
	m.cards += len(cards)
	return nil
}
func (m *memRecorder) RecordOutcomes(context.Context, []CardOutcome) error { return nil }
func (m *memRecorder) CountCall(CallCount)                                 {}
func (m *memRecorder) PriorCards(context.Context, PriorQuery) ([]rules.ShownCard, error) {
	return nil, nil
}

type observed struct {
	spans   *tracetest.InMemoryExporter
	metrics *sdkmetric.ManualReader
	logs    *bytes.Buffer
	handler http.Handler
}

func observedHandler(t *testing.T) observed {
	t.Helper()
	spans := tracetest.NewInMemoryExporter()
	tp := sdktrace.NewTracerProvider(sdktrace.WithSyncer(spans))
	reader := sdkmetric.NewManualReader()
	mp := sdkmetric.NewMeterProvider(sdkmetric.WithReader(reader))
	tel, err := NewTelemetry(tp, mp)
	if err != nil {
		t.Fatal(err)
	}
	e := testEngine(t, nil)
	e.tel, e.recorder, e.hash = tel, &memRecorder{}, func(string) string { return "hash" }
	var logs bytes.Buffer
	h := NewHandler(e, ServerConfig{MaxBodyBytes: 8 << 20}, &Health{}, slog.New(slog.NewJSONHandler(&logs, nil)))
	return observed{spans: spans, metrics: reader, logs: &logs, handler: h}
}

func (o observed) post(t *testing.T, scenario, service, hook string) int {
	t.Helper()
	req, err := BuildRequest(loadScenario(t, scenario), mustService(t, service), RequestOptions{Hook: hook, UserID: "Practitioner/test-user"})
	if err != nil {
		return 0
	}
	r := httptest.NewRequest(http.MethodPost, "/cds-services/"+service, bytes.NewReader(mustMarshal(t, req)))
	r.Header.Set("Content-Type", "application/json")
	r.Header.Set("traceparent", "00-4bf92f3577b34da6a3ce929d0e0e4736-00f067aa0ba902b7-01")
	w := httptest.NewRecorder()
	o.handler.ServeHTTP(w, r)
	return w.Code
}

// TestSpanTree: one server span per call, continuing the EHR's trace, with
// children for prefetch resolution, mapping, the rule family and the card
// log write, and the call's attributes on the server span.
func TestSpanTree(t *testing.T) {
	o := observedHandler(t)
	// The handler evaluates at the current time: scenario 14's 3% order then
	// has no recent sodium, which is a warning card.
	if code := o.post(t, "14-hypona-3pct-overshoot.json", "sodium-infusion-check", HookOrderSign); code != 200 {
		t.Fatalf("status %d", code)
	}
	spans := o.spans.GetSpans()
	byName := map[string]tracetest.SpanStub{}
	for _, s := range spans {
		byName[s.Name] = s
	}
	root, ok := byName["POST /cds-services/:id"]
	if !ok {
		t.Fatalf("no server span; spans: %v", names(spans))
	}
	if root.SpanContext.TraceID().String() != "4bf92f3577b34da6a3ce929d0e0e4736" {
		t.Errorf("the EHR's trace context was not continued: %s", root.SpanContext.TraceID())
	}
	for _, child := range []string{"prefetch.resolve", "fhir.map", "rules.evaluate", "cardlog.write"} {
		s, ok := byName[child]
		if !ok || s.Parent.SpanID() != root.SpanContext.SpanID() {
			t.Errorf("%s is missing or not a child of the server span (spans %v)", child, names(spans))
		}
	}
	attrs := map[string]string{}
	for _, a := range root.Attributes {
		attrs[string(a.Key)] = a.Value.Emit()
	}
	for k, want := range map[string]string{"halite.service": "sodium-infusion-check", "halite.hook": "order-sign", "halite.indicator.highest": "warning"} {
		if attrs[k] != want {
			t.Errorf("server span %s = %q, want %q (all: %v)", k, attrs[k], want, attrs)
		}
	}
	if attrs["halite.cards"] == "" || attrs["halite.cards"] == "0" {
		t.Errorf("no card count on the server span: %v", attrs)
	}
}

func names(spans tracetest.SpanStubs) []string {
	var out []string
	for _, s := range spans {
		out = append(out, s.Name)
	}
	return out
}

// TestNoPHIInTelemetry runs every scenario through every service and hook
// and checks that no span name or attribute, metric attribute or log line
// holds an identifier, a name, a birth date or a lab value from the bundles.
func TestNoPHIInTelemetry(t *testing.T) {
	o := observedHandler(t)
	files, _ := filepath.Glob(filepath.Join("..", "testdata", "scenarios", "*.json"))
	var secrets []string
	for _, f := range files {
		name := filepath.Base(f)
		secrets = append(secrets, phiOf(t, f)...)
		for _, svc := range NewRegistry(nil, nil).services {
			for _, hook := range svc.Hooks {
				o.post(t, name, svc.ID, hook)
			}
		}
	}
	var emitted []string
	for _, s := range o.spans.GetSpans() {
		emitted = append(emitted, s.Name)
		for _, a := range s.Attributes {
			emitted = append(emitted, a.Value.Emit())
		}
		for _, ev := range s.Events {
			for _, a := range ev.Attributes {
				emitted = append(emitted, a.Value.Emit())
			}
		}
	}
	var rm metricdata.ResourceMetrics
	if err := o.metrics.Collect(context.Background(), &rm); err != nil {
		t.Fatal(err)
	}
	series := 0
	for _, sm := range rm.ScopeMetrics {
		for _, m := range sm.Metrics {
			for _, set := range attributeSets(m) {
				series++
				emitted = append(emitted, set...)
			}
		}
	}
	emitted = append(emitted, strings.Split(o.logs.String(), "\n")...)
	all := strings.Join(emitted, "\n")
	for _, s := range secrets {
		if strings.Contains(all, s) {
			t.Errorf("telemetry contains %q from a scenario bundle", s)
		}
	}
	if len(o.spans.GetSpans()) < 100 || series == 0 || len(secrets) < 100 {
		t.Fatalf("too little observed to prove anything: %d spans, %d metric series, %d PHI strings", len(o.spans.GetSpans()), series, len(secrets))
	}
}

// attributeSets lists the attribute values of each data point of m.
func attributeSets(m metricdata.Metrics) [][]string {
	var out [][]string
	add := func(kvs []string) { out = append(out, kvs) }
	switch d := m.Data.(type) {
	case metricdata.Sum[int64]:
		for _, p := range d.DataPoints {
			add(values(p.Attributes.ToSlice()))
		}
	case metricdata.Histogram[float64]:
		for _, p := range d.DataPoints {
			add(values(p.Attributes.ToSlice()))
		}
	}
	return out
}

func values(kvs []attribute.KeyValue) []string {
	var out []string
	for _, kv := range kvs {
		out = append(out, string(kv.Key)+"="+kv.Value.Emit())
	}
	return out
}

// phiOf lists the identifiers, names, birth dates and lab values of a
// bundle: resource ids, identifier values, name parts, birthDate, and
// Observation values written as the bundle writes them (with their unit).
func phiOf(t *testing.T, file string) []string {
	data, err := os.ReadFile(file)
	if err != nil {
		t.Fatal(err)
	}
	var b struct {
		Entry []struct {
			Resource map[string]any `json:"resource"`
		} `json:"entry"`
	}
	if err := json.Unmarshal(data, &b); err != nil {
		t.Fatal(err)
	}
	var out []string
	for _, e := range b.Entry {
		r := e.Resource
		if id, _ := r["id"].(string); id != "" {
			out = append(out, id)
		}
		if bd, _ := r["birthDate"].(string); bd != "" {
			out = append(out, bd)
		}
		if ids, ok := r["identifier"].([]any); ok {
			for _, i := range ids {
				if v, _ := i.(map[string]any)["value"].(string); v != "" {
					out = append(out, v)
				}
			}
		}
		if ns, ok := r["name"].([]any); ok {
			for _, n := range ns {
				if f, _ := n.(map[string]any)["family"].(string); len(f) > 3 {
					out = append(out, f)
				}
			}
		}
		if vq, ok := r["valueQuantity"].(map[string]any); ok {
			out = append(out, fmt.Sprintf("%v %v", vq["value"], vq["unit"]))
		}
	}
	return out
}

// BenchmarkHookCallTracing: one order-sign call through the handler with
// tracing off (no-op provider) and on (every span sampled, exported to
// memory).
func BenchmarkHookCallTracing(b *testing.B) {
	req, err := BuildRequest(loadScenario(b, "14-hypona-3pct-overshoot.json"), mustService(b, "sodium-infusion-check"),
		RequestOptions{Hook: HookOrderSign, UserID: "Practitioner/test-user"})
	if err != nil {
		b.Fatal(err)
	}
	body := mustMarshal(b, req)
	for _, traced := range []bool{false, true} {
		name := "off"
		var tel *Telemetry
		if traced {
			name = "on"
			tp := sdktrace.NewTracerProvider(sdktrace.WithSampler(sdktrace.AlwaysSample()), sdktrace.WithBatcher(tracetest.NewNoopExporter()))
			tel, _ = NewTelemetry(tp, nil)
		} else {
			tel, _ = NewTelemetry(nil, nil)
		}
		b.Run(name, func(b *testing.B) {
			e := testEngine(b, nil)
			e.tel = tel
			h := NewHandler(e, ServerConfig{MaxBodyBytes: 8 << 20}, &Health{}, slog.New(slog.NewJSONHandler(io.Discard, nil)))
			b.ReportAllocs()
			for b.Loop() {
				r := httptest.NewRequest(http.MethodPost, "/cds-services/sodium-infusion-check", bytes.NewReader(body))
				r.Header.Set("Content-Type", "application/json")
				w := httptest.NewRecorder()
				h.ServeHTTP(w, r)
				if w.Code != 200 {
					b.Fatal(w.Code)
				}
			}
		})
	}
}

type noFetch struct{}

// statusFetch fails as a FHIR server answering status would.
type statusFetch int

func (s statusFetch) Fetch(context.Context, string) ([]byte, error) { return nil, s }
func (s statusFetch) Error() string                                 { return fmt.Sprintf("status %d", int(s)) }
func (s statusFetch) HTTPStatus() int                               { return int(s) }

// TestFetchSpanHTTPAttributes: a fetch span carries the method and the
// status (200 on success, the server's on a status failure, none when no
// answer came), per the OpenTelemetry HTTP semantic conventions.
func TestFetchSpanHTTPAttributes(t *testing.T) {
	spans := tracetest.NewInMemoryExporter()
	tel, err := NewTelemetry(sdktrace.NewTracerProvider(sdktrace.WithSyncer(spans)), sdkmetric.NewMeterProvider())
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name   string
		next   Fetcher
		status int64 // 0: no status attribute
	}{
		{"ok", noFetch{}, 200},
		{"404", statusFetch(404), 404},
		{"no answer", blockingFetcher{}, 0},
	} {
		spans.Reset()
		ctx, cancel := context.WithCancel(context.Background())
		cancel() // the blocking fetcher then ends at once
		tracedFetcher{next: tc.next, t: tel}.Fetch(ctx, "Observation?patient=p")
		attrs := map[string]attribute.Value{}
		for _, a := range spans.GetSpans()[0].Attributes {
			attrs[string(a.Key)] = a.Value
		}
		if m := attrs["http.request.method"]; m.AsString() != "GET" {
			t.Errorf("%s: method %q", tc.name, m.AsString())
		}
		if st, ok := attrs["http.response.status_code"]; ok != (tc.status != 0) || st.AsInt64() != tc.status {
			t.Errorf("%s: status %v (present %v), want %d", tc.name, st.AsInt64(), ok, tc.status)
		}
	}
}

func (noFetch) Fetch(context.Context, string) ([]byte, error) { return []byte("{}"), nil }

// TestFetchSpanResourceType: the fetch span names the resource type of a
// query or read, "page" for an absolute next link, and "other" for
// anything else a server's link may hold (which could be an identifier).
func TestFetchSpanResourceType(t *testing.T) {
	spans := tracetest.NewInMemoryExporter()
	tel, err := NewTelemetry(sdktrace.NewTracerProvider(sdktrace.WithSyncer(spans)), sdkmetric.NewMeterProvider())
	if err != nil {
		t.Fatal(err)
	}
	f := tracedFetcher{next: noFetch{}, t: tel}
	for ref, want := range map[string]string{
		"Observation?patient=pt-1&code=2951-2":               "Observation",
		"MedicationRequest/mr-1":                             "MedicationRequest",
		"https://fhir.example.org/r4?_getpages=abc&offset=2": "page",
		"pt-12345":              "other",
		"observation?patient=x": "other",
		"Obs3rvation?x":         "other",
		"":                      "other",
	} {
		spans.Reset()
		f.Fetch(context.Background(), ref)
		got := ""
		for _, a := range spans.GetSpans()[0].Attributes {
			if a.Key == "fhir.resource_type" {
				got = a.Value.AsString()
			}
		}
		if got != want {
			t.Errorf("%q: fhir.resource_type %q, want %q", ref, got, want)
		}
	}
}

// TestProbesNotTracedNorLogged: /healthz and /readyz make no span and no
// log line at the default level, while a call does.
func TestProbesNotTracedNorLogged(t *testing.T) {
	o := observedHandler(t)
	for _, p := range []string{"/healthz", "/readyz"} {
		w := httptest.NewRecorder()
		o.handler.ServeHTTP(w, httptest.NewRequest(http.MethodGet, p, nil))
		if w.Code != 200 {
			t.Fatalf("%s: %d", p, w.Code)
		}
	}
	if spans := o.spans.GetSpans(); len(spans) != 0 || o.logs.Len() != 0 {
		t.Errorf("probes traced or logged: spans %v, logs %s", names(spans), o.logs.String())
	}
	w := httptest.NewRecorder()
	o.handler.ServeHTTP(w, httptest.NewRequest(http.MethodGet, "/cds-services", nil))
	if len(o.spans.GetSpans()) == 0 || !strings.Contains(o.logs.String(), `"route":"/cds-services"`) {
		t.Errorf("discovery was not traced and logged: %s", o.logs.String())
	}
}
