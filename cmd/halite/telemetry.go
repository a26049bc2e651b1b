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
	"go.opentelemetry.io/otel/attribute"
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
// turns everything off; OTEL_TRACES_EXPORTER=none keeps tracing local;
// otherwise spans go over OTLP/HTTP to OTEL_EXPORTER_OTLP_(TRACES_)ENDPOINT
// (the exporter's default, http://localhost:4318, when unset), sampled as
// OTEL_TRACES_SAMPLER says. Metrics are exposed for Prometheus scraping.
func setupTelemetry(ctx context.Context, getenv func(string) string, revision string) (*telemetry, error) {
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
	if exp := strings.ToLower(getenv("OTEL_TRACES_EXPORTER")); exp != "none" {
		if exp != "" && exp != "otlp" {
			return nil, fmt.Errorf("telemetry: OTEL_TRACES_EXPORTER=%q: only otlp and none are supported", exp)
		}
		exporter, err := otlptracehttp.New(ctx)
		if err != nil {
			return nil, fmt.Errorf("telemetry: OTLP exporter: %w", err)
		}
		opts = append(opts, sdktrace.WithBatcher(exporter))
	}
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
