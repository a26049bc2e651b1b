package hooks

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"slices"
	"strings"
	"testing"
	"time"

	"go.opentelemetry.io/otel/attribute"
	"go.opentelemetry.io/otel/codes"
	sdkmetric "go.opentelemetry.io/otel/sdk/metric"
	"go.opentelemetry.io/otel/sdk/metric/metricdata"
	sdktrace "go.opentelemetry.io/otel/sdk/trace"
	"go.opentelemetry.io/otel/sdk/trace/tracetest"
	"go.opentelemetry.io/otel/trace"
)

// TestCauseOfEveryErrorKind: the cause table names who has to act for every
// error kind (with no reason) and every reason and prefetch code. The
// expectations are written out here, not read from the table.
func TestCauseOfEveryErrorKind(t *testing.T) {
	kinds := []struct {
		kind Kind
		want string
	}{
		{KindInternal, CauseHalite},
		{KindBadRequest, CauseCaller},
		{KindUnauthorized, CauseCaller},
		{KindForbidden, CauseCaller},
		{KindUnknownService, CauseCaller},
		{KindMethodNotAllowed, CauseCaller},
		{KindPrecondition, CauseCaller},
		{KindTooLarge, CauseCaller},
		{KindUnsupportedMedia, CauseCaller},
		{KindUnavailable, CauseHalite},
		{KindTimeout, CauseCaller},
	}
	if len(kinds) != len(statusOf) {
		t.Fatalf("%d kinds tested, %d in the status table: test every kind", len(kinds), len(statusOf))
	}
	for _, tc := range kinds {
		if got := CauseOf(&Error{Kind: tc.kind}); got != tc.want {
			t.Errorf("kind %v (HTTP %d): cause %q, want %q", tc.kind, statusOf[tc.kind].status, got, tc.want)
		}
	}
	if got := CauseOf(errors.New("a plain error")); got != CauseHalite {
		t.Errorf("an error with no kind: cause %q, want halite", got)
	}
	reasons := []struct {
		kind   Kind
		reason string
		want   string
	}{
		{KindUnavailable, ReasonStoreBusy, CauseStore},
		{KindUnavailable, ReasonStoreTimeout, CauseStore},
		{KindUnavailable, ReasonStoreQueueFull, CauseStore},
		{KindUnavailable, ReasonStoreFault, CauseStore},
		{KindUnavailable, ReasonNoStore, CauseConfiguration},
		{KindUnavailable, ReasonFHIRTimeout, CauseFHIRServer},
		{KindUnavailable, ReasonCallTimeout, CauseHalite},
		{KindUnavailable, ReasonBudget, CauseHalite},
		{KindUnavailable, ReasonKeysTimeout, CauseCaller},
		{KindUnavailable, ReasonCallerGone, CauseCaller},
		{KindPrecondition, CodeNotSent, CauseCaller},
		{KindPrecondition, CodeServerNotUsed, CauseConfiguration},
		{KindPrecondition, CodeTokenMissing, CauseCaller},
		{KindPrecondition, CodeOutcome, CauseFHIRServer},
		{KindPrecondition, CodeUnreadable, CauseCaller},
		{KindPrecondition, CodeFetchedBad, CauseFHIRServer},
		{KindPrecondition, CodeTimeout, CauseFHIRServer},
		{KindPrecondition, CodeHTTPAuth, CauseCaller},
		{KindPrecondition, CodeHTTPStatus, CauseFHIRServer},
		{KindPrecondition, CodeUnreachable, CauseFHIRServer},
		{KindPrecondition, CodeOffOrigin, CauseFHIRServer},
		{KindPrecondition, CodeBlockedAddress, CauseConfiguration},
		{KindPrecondition, CodeInsecure, CauseCaller},
		{KindPrecondition, CodeTooLarge, CauseConfiguration},
		{KindPrecondition, CodeCallBudget, CauseConfiguration},
		{KindPrecondition, CodeCancelled, CauseCaller},
	}
	if len(reasons) != len(causeTable) {
		t.Fatalf("%d reasons tested, %d in the cause table: test every reason", len(reasons), len(causeTable))
	}
	for _, tc := range reasons {
		if got := CauseOf(&Error{Kind: tc.kind, Reason: tc.reason}); got != tc.want {
			t.Errorf("reason %q: cause %q, want %q", tc.reason, got, tc.want)
		}
	}
}

// TestFetchCode: each way a fetch fails gets its code.
func TestFetchCode(t *testing.T) {
	for _, tc := range []struct {
		err  error
		want string
	}{
		{context.DeadlineExceeded, CodeTimeout},
		{context.Canceled, CodeCancelled},
		{statusFetch(404), CodeHTTPStatus},
		{statusFetch(401), CodeHTTPAuth},
		{statusFetch(403), CodeHTTPAuth},
		{ErrCallBudget, CodeCallBudget},
		{ErrProcessBudget, ReasonBudget},
		{codedError(CodeBlockedAddress), CodeBlockedAddress},
		{codedError("a code of no meaning here"), CodeUnreachable},
		{errors.New("connection refused"), CodeUnreachable},
	} {
		if got := fetchCode(tc.err); got != tc.want {
			t.Errorf("%v: code %q, want %q", tc.err, got, tc.want)
		}
	}
}

type codedError string

func (c codedError) Error() string { return "coded: " + string(c) }
func (c codedError) Code() string  { return string(c) }

// refusingAuth refuses every token for one reason.
type refusingAuth string

func (r refusingAuth) Authenticate(context.Context, string, string) (Caller, error) {
	return Caller{}, labelled(r)
}

type labelled string

func (l labelled) Error() string { return "refused: " + string(l) }
func (l labelled) Label() string { return string(l) }

// tenantAuth accepts every token as one issuer's and tenant's.
type tenantAuth struct{}

func (tenantAuth) Authenticate(context.Context, string, string) (Caller, error) {
	return Caller{Issuer: "https://ehr.example.org", Tenant: "ward-7"}, nil
}

// failingCardLog is a Recorder whose card log write fails.
type failingCardLog struct{ memRecorder }

func (failingCardLog) LogCards(context.Context, []LoggedCard) error { return errors.New("disk full") }

// ctxLogHandler records, for each log line, whether it was logged inside
// a span (so that the command's handler adds its trace id).
type ctxLogHandler struct {
	slog.Handler
	inSpan map[string]bool
}

func (h ctxLogHandler) Handle(ctx context.Context, r slog.Record) error {
	h.inSpan[r.Message] = trace.SpanContextFromContext(ctx).IsValid()
	return h.Handler.Handle(ctx, r)
}

// TestFailedCallsNameTheirCause: a failed call's server span, access log
// line and request metric name the same cause, from the table, and the
// access log says which prefetch keys were not had and why; the fetch span
// is a client span naming the FHIR server and the key.
func TestFailedCallsNameTheirCause(t *testing.T) {
	const server = "https://fhir.example.org/r4"
	withServer := func(m map[string]any) {
		m["fhirServer"] = server
		m["fhirAuthorization"] = map[string]any{"access_token": "t", "token_type": "Bearer", "expires_in": 60,
			"scope": "patient/*.read", "subject": "halite"}
	}
	noSodium := func(m map[string]any) { delete(m["prefetch"].(map[string]any), "sodium") }
	fetching := func(f Fetcher) FetcherFactory {
		return func(string, *FHIRAuthorization, Caller, *CallBudget) (Fetcher, error) { return f, nil }
	}
	for _, tc := range []struct {
		name       string
		edit       func(map[string]any)
		factory    FetcherFactory
		auth       Authenticator
		recorder   Recorder
		body       string // instead of the scenario's request
		status     int
		cause      string
		keyFailure string // in the log's prefetch_failed and on the prefetch span
		level      string
	}{
		{name: "no FHIR server sent", edit: noSodium, status: 412, cause: CauseCaller, keyFailure: "sodium=not-sent", level: "WARN"},
		{name: "FHIR server not on the allowlist", edit: func(m map[string]any) { noSodium(m); withServer(m) },
			factory: func(string, *FHIRAuthorization, Caller, *CallBudget) (Fetcher, error) {
				return nil, errors.New("fhirServer is not on the calling issuer's allowlist")
			}, status: 412, cause: CauseConfiguration, keyFailure: "sodium=fhir-server-not-used", level: "WARN"},
		{name: "insecure FHIR server", edit: func(m map[string]any) { noSodium(m); withServer(m) },
			factory: func(string, *FHIRAuthorization, Caller, *CallBudget) (Fetcher, error) {
				return nil, codedError(CodeInsecure)
			}, status: 412, cause: CauseCaller, keyFailure: "sodium=insecure-fhir-server", level: "WARN"},
		{name: "FHIR server answers 404", edit: func(m map[string]any) { noSodium(m); withServer(m) },
			factory: fetching(statusFetch(404)), status: 412, cause: CauseFHIRServer, keyFailure: "sodium=http-status", level: "WARN"},
		{name: "FHIR server refuses the token", edit: func(m map[string]any) { noSodium(m); withServer(m) },
			factory: fetching(statusFetch(401)), status: 412, cause: CauseCaller, keyFailure: "sodium=http-auth", level: "WARN"},
		{name: "slow FHIR server", edit: func(m map[string]any) { noSodium(m); withServer(m) },
			factory: fetching(blockingFetcher{}), status: 503, cause: CauseFHIRServer, keyFailure: "sodium=timeout", level: "ERROR"},
		{name: "card log write fails", recorder: &failingCardLog{}, status: 503, cause: CauseStore, level: "ERROR"},
		{name: "malformed body", body: "{", status: 400, cause: CauseCaller, level: "WARN"},
		{name: "token refused", auth: refusingAuth("expired"), status: 401, cause: CauseCaller, level: "WARN"},
		{name: "answered", auth: tenantAuth{}, status: 200, level: "INFO"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			spans := tracetest.NewInMemoryExporter()
			reader := sdkmetric.NewManualReader()
			tel, err := NewTelemetry(sdktrace.NewTracerProvider(sdktrace.WithSyncer(spans)), sdkmetric.NewMeterProvider(sdkmetric.WithReader(reader)))
			if err != nil {
				t.Fatal(err)
			}
			e := testEngine(t, tc.factory)
			e.tel, e.hash = tel, func(string) string { return "hash" }
			e.recorder = &memRecorder{}
			if tc.recorder != nil {
				e.recorder = tc.recorder
			}
			var logs bytes.Buffer
			lh := ctxLogHandler{slog.NewJSONHandler(&logs, nil), map[string]bool{}}
			e.log = slog.New(lh)
			h := NewHandler(e, ServerConfig{MaxBodyBytes: 8 << 20, CallTimeout: 300 * time.Millisecond, Authenticator: tc.auth},
				&Health{}, slog.New(lh))
			m := requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign)
			if tc.edit != nil {
				tc.edit(m)
			}
			body := mustMarshal(t, m)
			if tc.body != "" {
				body = []byte(tc.body)
			}
			r := httptest.NewRequest(http.MethodPost, "/cds-services/sodium-infusion-check", bytes.NewReader(body))
			r.Header.Set("Content-Type", "application/json")
			r.Header.Set("Authorization", "Bearer x")
			w := httptest.NewRecorder()
			h.ServeHTTP(w, r)
			if w.Code != tc.status {
				t.Fatalf("status %d, want %d: %s", w.Code, tc.status, w.Body)
			}
			byName := map[string]tracetest.SpanStub{}
			for _, s := range spans.GetSpans() {
				byName[s.Name] = s
			}
			srv := byName["POST /cds-services/:id"]
			if got := attr(srv.Attributes, "halite.error.cause"); got != tc.cause {
				t.Errorf("server span cause %q, want %q", got, tc.cause)
			}
			if failed := srv.Status.Code == codes.Error; failed != (tc.status >= 500) {
				t.Errorf("server span status %v for HTTP %d: only a 5xx marks it failed", srv.Status.Code, tc.status)
			}
			line := requestLine(t, logs.String())
			if line["cause"] != nil && line["cause"] != tc.cause || line["cause"] == nil && tc.cause != "" {
				t.Errorf("log cause %v, want %q", line["cause"], tc.cause)
			}
			if line["level"] != tc.level {
				t.Errorf("log level %v, want %s", line["level"], tc.level)
			}
			if tc.keyFailure != "" {
				if got, _ := line["prefetch_failed"].(string); !strings.Contains(got, tc.keyFailure) {
					t.Errorf("log prefetch_failed %q, want it to name %s", got, tc.keyFailure)
				}
				ps := byName["prefetch.resolve"]
				if got := attrs(ps.Attributes, "halite.prefetch.failures"); !slices.Contains(got, tc.keyFailure) {
					t.Errorf("prefetch span failures %v, want %s", got, tc.keyFailure)
				}
			}
			if !slices.Contains(requestCauses(t, reader), tc.cause) {
				t.Errorf("request metric causes %v, want %q", requestCauses(t, reader), tc.cause)
			}
			if _, ok := lh.inSpan["fhirServer not used"]; ok && !lh.inSpan["fhirServer not used"] {
				t.Error(`"fhirServer not used" logged outside the call's span: no trace id`)
			}
			if tc.cause == CauseConfiguration && !lh.inSpan["fhirServer not used"] {
				t.Error(`an allowlist refusal logged no "fhirServer not used" line within the call's span`)
			}
			if tc.status == 200 {
				if attr(srv.Attributes, "halite.tenant") != "ward-7" || attr(srv.Attributes, "halite.issuer") != "https://ehr.example.org" {
					t.Errorf("server span lacks tenant and issuer: %v", srv.Attributes)
				}
			}
			if f, ok := byName["fhir.fetch"]; ok {
				if f.SpanKind != trace.SpanKindClient || attr(f.Attributes, "server.address") != "fhir.example.org" ||
					attr(f.Attributes, "halite.prefetch.key") != "sodium" || attr(f.Attributes, "server.port") != "443" ||
					attr(f.Attributes, "halite.error.cause") != tc.cause {
					t.Errorf("fetch span: kind %v, attributes %v", f.SpanKind, f.Attributes)
				}
			}
			if tc.cause == CauseStore && storeFailures(t, reader)["card-log/store-fault"] != 1 {
				t.Errorf("store failures %v, want one card-log store-fault", storeFailures(t, reader))
			}
		})
	}
}

// attr is the value of attribute key, as text ("" when absent).
func attr(kvs []attribute.KeyValue, key string) string {
	for _, kv := range kvs {
		if string(kv.Key) == key {
			return kv.Value.Emit()
		}
	}
	return ""
}

func attrs(kvs []attribute.KeyValue, key string) []string {
	for _, kv := range kvs {
		if string(kv.Key) == key {
			return kv.Value.AsStringSlice()
		}
	}
	return nil
}

// requestLine is the access log's line for the one request.
func requestLine(t *testing.T, logs string) map[string]any {
	t.Helper()
	for _, l := range strings.Split(logs, "\n") {
		var m map[string]any
		if json.Unmarshal([]byte(l), &m) == nil && m["msg"] == "request" {
			return m
		}
	}
	t.Fatalf("no request line in %s", logs)
	return nil
}

// requestCauses lists the cause labels of halite.request.duration ("" for
// a point without one).
func requestCauses(t *testing.T, reader *sdkmetric.ManualReader) []string {
	t.Helper()
	var rm metricdata.ResourceMetrics
	if err := reader.Collect(context.Background(), &rm); err != nil {
		t.Fatal(err)
	}
	var out []string
	for _, sm := range rm.ScopeMetrics {
		for _, m := range sm.Metrics {
			if h, ok := m.Data.(metricdata.Histogram[float64]); ok && m.Name == "halite.request.duration" {
				for _, p := range h.DataPoints {
					v, _ := p.Attributes.Value("cause")
					out = append(out, v.AsString())
				}
			}
		}
	}
	return out
}

// storeFailures maps "operation/reason" to halite.store.failures' count.
func storeFailures(t *testing.T, reader *sdkmetric.ManualReader) map[string]int64 {
	t.Helper()
	var rm metricdata.ResourceMetrics
	if err := reader.Collect(context.Background(), &rm); err != nil {
		t.Fatal(err)
	}
	out := map[string]int64{}
	for _, sm := range rm.ScopeMetrics {
		for _, m := range sm.Metrics {
			if s, ok := m.Data.(metricdata.Sum[int64]); ok && m.Name == "halite.store.failures" {
				for _, p := range s.DataPoints {
					op, _ := p.Attributes.Value("operation")
					reason, _ := p.Attributes.Value("reason")
					out[op.AsString()+"/"+reason.AsString()] = p.Value
				}
			}
		}
	}
	return out
}
