package hooks

import (
	"context"
	"errors"
	"fmt"
	"net/url"
	"strconv"
	"strings"
	"time"

	"go.opentelemetry.io/otel/attribute"
	"go.opentelemetry.io/otel/codes"
	"go.opentelemetry.io/otel/metric"
	metricnoop "go.opentelemetry.io/otel/metric/noop"
	"go.opentelemetry.io/otel/trace"
	tracenoop "go.opentelemetry.io/otel/trace/noop"
)

// Telemetry is how hooks reports through the OpenTelemetry API (never the
// SDK, which cmd sets up). Attributes never carry identifiers, names,
// dates of birth or lab values: only service ids, hooks, rule ids,
// indicators, counts, states and cause categories.
type Telemetry struct {
	provider         trace.TracerProvider
	tracer           trace.Tracer
	requestDuration  metric.Float64Histogram
	cards            metric.Int64Counter
	authFailures     metric.Int64Counter
	feedbackOutcomes metric.Int64Counter
	fetchDuration    metric.Float64Histogram
	unavailable      metric.Int64Counter
	suppressed       metric.Int64Counter
	storeFailures    metric.Int64Counter
	// meters is the provider the instruments came from, for the HTTP
	// server instrumentation's own (semantic-convention) metrics.
	meters metric.MeterProvider
}

// Store operations, the operation label of halite.store.failures.
const (
	StoreOpCardLog    = "card-log"    // writing a response's cards before it is sent
	StoreOpPriorCards = "prior-cards" // reading the cards already shown, to hold repeats back
	StoreOpFeedback   = "feedback"    // storing the EHR's feedback
	StoreOpReplay     = "replay"      // the token replay check
)

// storeOps are every store operation, each counted from start-up.
var storeOps = []string{StoreOpCardLog, StoreOpPriorCards, StoreOpFeedback, StoreOpReplay}

// storeReasons are the reasons a store fails, each counted from start-up.
var storeReasons = []string{ReasonStoreBusy, ReasonStoreTimeout, ReasonStoreQueueFull, ReasonStoreFault}

// DurationBuckets are the bucket bounds, in seconds, of the duration
// histograms: from half a millisecond (a call answered from prefetch) to
// 30 s (beyond any call deadline), so histogram_quantile has a bucket near
// every latency halite sees.
func DurationBuckets() []float64 {
	return []float64{0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30}
}

// NewTelemetry makes the tracer and instruments; nil providers are no-op.
func NewTelemetry(tp trace.TracerProvider, mp metric.MeterProvider) (*Telemetry, error) {
	if tp == nil {
		tp = tracenoop.NewTracerProvider()
	}
	if mp == nil {
		mp = metricnoop.NewMeterProvider()
	}
	m := mp.Meter("github.com/halite-cds/halite/hooks")
	t := &Telemetry{provider: tp, tracer: tp.Tracer("github.com/halite-cds/halite/hooks"), meters: mp}
	var err, e error
	t.requestDuration, e = m.Float64Histogram("halite.request.duration", metric.WithUnit("s"),
		metric.WithDescription("Duration of requests by route, service (hook and feedback calls), HTTP status and cause (failed calls)"),
		metric.WithExplicitBucketBoundaries(DurationBuckets()...))
	err = errors.Join(err, e)
	t.cards, e = m.Int64Counter("halite.cards", metric.WithDescription("Cards returned, by rule and indicator"))
	err = errors.Join(err, e)
	t.authFailures, e = m.Int64Counter("halite.auth.failures", metric.WithDescription("Refused caller tokens, by reason"))
	err = errors.Join(err, e)
	t.feedbackOutcomes, e = m.Int64Counter("halite.feedback.outcomes", metric.WithDescription("Feedback entries stored, by service and outcome"))
	err = errors.Join(err, e)
	t.fetchDuration, e = m.Float64Histogram("halite.fhir.fetch.duration", metric.WithUnit("s"),
		metric.WithDescription("FHIR fetches by server (server.address), prefetch key, outcome code (ok, timeout, http-status, …) and cause"),
		metric.WithExplicitBucketBoundaries(DurationBuckets()...))
	err = errors.Join(err, e)
	t.suppressed, e = m.Int64Counter("halite.cards.suppressed",
		metric.WithDescription("Findings held back as repeats, by rule, indicator and reason (select-to-sign, overridden, chart-unchanged)"))
	err = errors.Join(err, e)
	t.unavailable, e = m.Int64Counter("halite.unavailable",
		metric.WithDescription("Calls answered 503, by reason (store-busy, store-timeout, store-queue-full, store-fault, fhir-timeout, call-timeout, budget-exhausted, keys-unavailable, no-store, caller-gone)"))
	err = errors.Join(err, e)
	t.storeFailures, e = m.Int64Counter("halite.store.failures",
		metric.WithDescription("Store operations that failed, by operation (card-log, prior-cards, feedback, replay) and reason (store-busy, store-timeout, store-queue-full, store-fault)"))
	err = errors.Join(err, e)
	if err != nil {
		return nil, fmt.Errorf("telemetry: %w", err)
	}
	return t, nil
}

// storeFailure counts a failed store operation by its reason.
func (t *Telemetry) storeFailure(ctx context.Context, op string, err error) {
	reason := ReasonStoreFault
	var e *Error
	if errors.As(err, &e) && e.Reason != "" {
		reason = e.Reason
	}
	t.storeFailures.Add(ctx, 1, metric.WithAttributes(attribute.String("operation", op), attribute.String("reason", reason)))
}

func (t *Telemetry) start(ctx context.Context, name string, attrs ...attribute.KeyValue) (context.Context, trace.Span) {
	return t.tracer.Start(ctx, name, trace.WithAttributes(attrs...))
}

// fail records err on span with its cause category.
func fail(span trace.Span, cause string, err error) {
	span.SetAttributes(attribute.String("halite.error.cause", cause))
	span.SetStatus(codes.Error, cause)
	// The error text can quote request values: record only its kind.
	span.AddEvent("exception", trace.WithAttributes(attribute.String("exception.type", fmt.Sprintf("%T", err))))
}

// tracedFetcher wraps a Fetcher with a client span and a duration per
// fetch. The span names the FHIR server's host, the prefetch key and the
// resource type, never the reference or query: they carry patient ids.
type tracedFetcher struct {
	next Fetcher
	t    *Telemetry
	// host and port are the FHIR server's (OpenTelemetry server.address
	// and server.port).
	host string
	port int
}

// newTracedFetcher traces fetch, made for the FHIR server at base.
func newTracedFetcher(fetch Fetcher, t *Telemetry, base string) tracedFetcher {
	f := tracedFetcher{next: fetch, t: t}
	if u, err := url.Parse(base); err == nil {
		f.host = strings.ToLower(u.Hostname()) // one series per server, however the caller spells it
		f.port, _ = strconv.Atoi(u.Port())
		if f.port == 0 && u.Scheme == "https" {
			f.port = 443
		} else if f.port == 0 && u.Scheme == "http" {
			f.port = 80
		}
	}
	return f
}

func (f tracedFetcher) Fetch(ctx context.Context, ref string) ([]byte, error) {
	typ := ref
	if i := strings.IndexAny(typ, "/?"); i >= 0 {
		typ = typ[:i]
	}
	switch {
	case strings.Contains(typ, ":"): // an absolute next-page URL
		typ = "page"
	case !isResourceTypeName(typ): // whatever else a server's link holds stays out of traces
		typ = "other"
	}
	key := prefetchKeyFrom(ctx)
	// A client span (OpenTelemetry HTTP semantic conventions name the
	// attributes); the FHIR client sends its context as traceparent.
	ctx, span := f.t.tracer.Start(ctx, "fhir.fetch", trace.WithSpanKind(trace.SpanKindClient), trace.WithAttributes(
		attribute.String("fhir.resource_type", typ), attribute.String("halite.prefetch.key", key),
		attribute.String("server.address", f.host), attribute.Int("server.port", f.port),
		attribute.String("http.request.method", "GET")))
	defer span.End()
	start := time.Now()
	body, err := f.next.Fetch(ctx, ref)
	code, cause := "ok", ""
	// A Fetcher succeeds only on 200; a failure reports the status it got,
	// if it got one.
	if err != nil {
		code = fetchCode(err)
		cause = CodeCause(code)
		span.SetAttributes(attribute.String("error.type", code))
		fail(span, cause, err)
		var st interface{ HTTPStatus() int }
		if errors.As(err, &st) {
			span.SetAttributes(attribute.Int("http.response.status_code", st.HTTPStatus()))
		}
	} else {
		span.SetAttributes(attribute.Int("http.response.status_code", 200))
	}
	span.SetAttributes(attribute.Int("http.response.body.size", len(body)))
	f.t.fetchDuration.Record(ctx, time.Since(start).Seconds(), metric.WithAttributes(
		attribute.String("server.address", f.host), attribute.String("prefetch.key", key),
		attribute.String("code", code), attribute.String("cause", cause)))
	return body, err
}

// prefetchKeyCtx carries the prefetch key a fetch is made for.
type prefetchKeyCtx struct{}

// withPrefetchKey marks ctx as fetching for key (a service's key name, or
// keyMedications for the medications orders refer to).
func withPrefetchKey(ctx context.Context, key string) context.Context {
	return context.WithValue(ctx, prefetchKeyCtx{}, key)
}

func prefetchKeyFrom(ctx context.Context) string {
	if k, ok := ctx.Value(prefetchKeyCtx{}).(string); ok {
		return k
	}
	return "other"
}

// keyMedications names the fetches of Medication resources that orders
// refer to, which no prefetch key covers.
const keyMedications = "medications"

// isResourceTypeName reports whether s has the form of a FHIR resource
// type name: an upper-case letter, then letters (every R4 resource type
// has that form; from memory, not a quoted rule of the specification).
func isResourceTypeName(s string) bool {
	if len(s) < 2 || len(s) > 64 || s[0] < 'A' || s[0] > 'Z' {
		return false
	}
	for i := 1; i < len(s); i++ {
		if c := s[i]; !('a' <= c && c <= 'z' || 'A' <= c && c <= 'Z') {
			return false
		}
	}
	return true
}
