package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"net/http/pprof"
	"runtime/debug"
	"strconv"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"go.opentelemetry.io/otel"
	"go.opentelemetry.io/otel/attribute"
	"go.opentelemetry.io/otel/exporters/otlp/otlptrace/otlptracegrpc"
	"go.opentelemetry.io/otel/exporters/otlp/otlptrace/otlptracehttp"
	otelprom "go.opentelemetry.io/otel/exporters/prometheus"
	"go.opentelemetry.io/otel/metric"
	metricnoop "go.opentelemetry.io/otel/metric/noop"
	sdkmetric "go.opentelemetry.io/otel/sdk/metric"
	"go.opentelemetry.io/otel/sdk/resource"
	sdktrace "go.opentelemetry.io/otel/sdk/trace"
	semconv "go.opentelemetry.io/otel/semconv/v1.37.0"
	"go.opentelemetry.io/otel/trace"
	tracenoop "go.opentelemetry.io/otel/trace/noop"
)

// telemetry is the SDK side of OpenTelemetry, set up here only.
type telemetry struct {
	tracer   trace.TracerProvider
	meter    metric.MeterProvider
	metrics  http.Handler // Prometheus exposition of the metrics
	shutdown func(context.Context) error
}

// setupTelemetry follows the standard OTEL_* environment: OTEL_SDK_DISABLED
// turns everything off; spans are exported only where an exporter is
// configured — an OTLP endpoint (OTEL_EXPORTER_OTLP_TRACES_ENDPOINT or
// OTEL_EXPORTER_OTLP_ENDPOINT), or OTEL_TRACES_EXPORTER=otlp, which takes
// the exporter's default endpoint — over HTTP/protobuf or gRPC as
// OTEL_EXPORTER_OTLP_(TRACES_)PROTOCOL says, sampled as OTEL_TRACES_SAMPLER
// says; OTEL_TRACES_EXPORTER=none exports nothing. Spans are still made
// without an exporter: their trace context reaches logs and FHIR servers.
// Exporter errors are logged to log as JSON lines: the OpenTelemetry SDK
// reports them only through its process-wide error handler, which this
// sets. Metrics are exposed for Prometheus scraping.
func setupTelemetry(ctx context.Context, getenv func(string) string, revision string, log *slog.Logger) (*telemetry, error) {
	if strings.EqualFold(getenv("OTEL_SDK_DISABLED"), "true") {
		return &telemetry{tracer: tracenoop.NewTracerProvider(), meter: metricnoop.NewMeterProvider(),
			shutdown: func(context.Context) error { return nil }}, nil
	}
	version := "devel"
	if bi, ok := debug.ReadBuildInfo(); ok && bi.Main.Version != "" {
		version = bi.Main.Version
	}
	name := getenv("OTEL_SERVICE_NAME")
	if name == "" {
		name = "halite"
	}
	res, err := resource.Merge(resource.Default(), resource.NewSchemaless(
		semconv.ServiceName(name), semconv.ServiceVersion(version), attribute.String("halite.ruleset", revision)))
	if err != nil {
		return nil, fmt.Errorf("telemetry: resource: %w", err)
	}
	opts := []sdktrace.TracerProviderOption{sdktrace.WithResource(res)}
	exporter, where, err := traceExporter(ctx, getenv)
	if err != nil {
		return nil, err
	}
	// Every error the SDK reports (exports, the Prometheus exporter) is a
	// JSON log line.
	otel.SetErrorHandler(otel.ErrorHandlerFunc(func(err error) {
		log.Error("telemetry export failed", "error", err.Error())
	}))
	if exporter != nil {
		opts = append(opts, sdktrace.WithBatcher(exporter))
	}
	log.Info("traces", "export", where)
	tp := sdktrace.NewTracerProvider(opts...)
	reg := prometheus.NewRegistry()
	// The Go runtime's and the process's own metrics (goroutines, heap, GC,
	// CPU, open files), beside halite's.
	if err := errors.Join(reg.Register(collectors.NewGoCollector()),
		reg.Register(collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))); err != nil {
		return nil, fmt.Errorf("telemetry: runtime metrics: %w", err)
	}
	pexp, err := otelprom.New(otelprom.WithRegisterer(reg))
	if err != nil {
		return nil, fmt.Errorf("telemetry: prometheus exporter: %w", err)
	}
	mp := sdkmetric.NewMeterProvider(sdkmetric.WithResource(res), sdkmetric.WithReader(pexp))
	return &telemetry{tracer: tp, meter: mp, metrics: promhttp.HandlerFor(reg, promhttp.HandlerOpts{}),
		shutdown: func(ctx context.Context) error { return errors.Join(tp.Shutdown(ctx), mp.Shutdown(ctx)) }}, nil
}

// traceExporter is the span exporter the environment configures, nil for
// none, with where it exports to (for the start-up log line).
func traceExporter(ctx context.Context, getenv func(string) string) (sdktrace.SpanExporter, string, error) {
	kind := strings.ToLower(getenv("OTEL_TRACES_EXPORTER"))
	endpoint := getenv("OTEL_EXPORTER_OTLP_TRACES_ENDPOINT")
	if endpoint == "" {
		endpoint = getenv("OTEL_EXPORTER_OTLP_ENDPOINT")
	}
	switch {
	case kind == "none":
		return nil, "none (OTEL_TRACES_EXPORTER=none)", nil
	case kind != "" && kind != "otlp":
		return nil, "", fmt.Errorf("telemetry: OTEL_TRACES_EXPORTER=%q: only otlp and none are supported", kind)
	case kind == "" && endpoint == "":
		return nil, "none (no OTLP endpoint configured)", nil
	}
	protocol := strings.ToLower(getenv("OTEL_EXPORTER_OTLP_TRACES_PROTOCOL"))
	if protocol == "" {
		protocol = strings.ToLower(getenv("OTEL_EXPORTER_OTLP_PROTOCOL"))
	}
	if endpoint == "" {
		endpoint = "the exporter's default endpoint"
	}
	var exp sdktrace.SpanExporter
	var err error
	switch protocol {
	case "", "http/protobuf":
		protocol = "http/protobuf"
		exp, err = otlptracehttp.New(ctx)
	case "grpc":
		exp, err = otlptracegrpc.New(ctx)
	default:
		return nil, "", fmt.Errorf("telemetry: OTLP protocol %q: only http/protobuf and grpc are supported", protocol)
	}
	if err != nil {
		return nil, "", fmt.Errorf("telemetry: OTLP exporter: %w", err)
	}
	return exp, "OTLP " + protocol + " to " + endpoint, nil
}

// traceLogHandler adds trace_id and span_id to every record logged with a
// context inside a span.
type traceLogHandler struct{ slog.Handler }

func (h traceLogHandler) Handle(ctx context.Context, r slog.Record) error {
	if sc := trace.SpanContextFromContext(ctx); sc.IsValid() {
		r.AddAttrs(slog.String("trace_id", sc.TraceID().String()), slog.String("span_id", sc.SpanID().String()))
	}
	return h.Handler.Handle(ctx, r)
}

func (h traceLogHandler) WithAttrs(as []slog.Attr) slog.Handler {
	return traceLogHandler{h.Handler.WithAttrs(as)}
}

func (h traceLogHandler) WithGroup(name string) slog.Handler {
	return traceLogHandler{h.Handler.WithGroup(name)}
}

// metricsOnMain is the /metrics handler for the main listener: none when
// an admin listener is configured.
func metricsOnMain(c Config, h http.Handler) http.Handler {
	if c.AdminAddr != "" {
		return nil
	}
	return h
}

// maxProfileSeconds bounds a CPU profile or execution trace request.
const maxProfileSeconds = 60

// boundedSeconds refuses a profile longer than maxProfileSeconds.
func boundedSeconds(h http.HandlerFunc) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		if v := r.URL.Query().Get("seconds"); v != "" {
			if n, err := strconv.Atoi(v); err != nil || n < 1 || n > maxProfileSeconds {
				http.Error(w, fmt.Sprintf("seconds must be 1 to %d", maxProfileSeconds), http.StatusBadRequest)
				return
			}
		}
		h(w, r)
	}
}

// serveAdmin serves /metrics on the admin listener, and Go's profiles
// under /debug/pprof/ when withPprof is set. It returns the address
// listened on and a function that stops the listener.
func serveAdmin(addr string, metrics http.Handler, withPprof bool, log *slog.Logger) (string, func(), error) {
	ln, err := net.Listen("tcp", addr)
	if err != nil {
		return "", nil, fmt.Errorf("admin listener: %w", err)
	}
	mux := http.NewServeMux()
	mux.Handle("GET /metrics", metrics)
	if withPprof {
		mux.HandleFunc("GET /debug/pprof/", pprof.Index)
		mux.HandleFunc("GET /debug/pprof/cmdline", pprof.Cmdline)
		mux.HandleFunc("GET /debug/pprof/profile", boundedSeconds(pprof.Profile))
		mux.HandleFunc("GET /debug/pprof/symbol", pprof.Symbol)
		mux.HandleFunc("GET /debug/pprof/trace", boundedSeconds(pprof.Trace))
	}
	// WriteTimeout is left unset: a CPU profile or trace streams for as
	// long as its ?seconds= asks.
	srv := &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}
	go func() { _ = srv.Serve(ln) }()
	log.Info("admin listener", "addr", ln.Addr().String(), "pprof", withPprof)
	return ln.Addr().String(), func() { srv.Close() }, nil
}
