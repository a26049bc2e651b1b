package hooks

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"io"
	"log/slog"
	"mime"
	"net/http"
	"strconv"
	"strings"
	"sync/atomic"
	"time"

	"github.com/gin-gonic/gin"
	"go.opentelemetry.io/contrib/instrumentation/github.com/gin-gonic/gin/otelgin"
	"go.opentelemetry.io/otel/attribute"
	"go.opentelemetry.io/otel/metric"
	"go.opentelemetry.io/otel/propagation"
	"go.opentelemetry.io/otel/trace"
)

// ServerConfig holds the HTTP-level settings of the service.
type ServerConfig struct {
	MaxBodyBytes int64         // request bodies past this are answered 413
	CallTimeout  time.Duration // time budget of one hook call, fetches included
	// CORSOrigins are the browser origins allowed to call the service.
	CORSOrigins []string
	// Authenticator verifies callers; nil is development mode, where
	// unsigned calls are accepted (the command allows it on loopback only).
	Authenticator Authenticator
	// PublicBaseURL is the base the EHR calls ("https://halite.example.org"),
	// from which the audience of each call is computed.
	PublicBaseURL string
	// Metrics, when set, is served at GET /metrics (Prometheus exposition).
	Metrics http.Handler
}

// Health tracks readiness: a draining server is alive but not ready.
type Health struct {
	draining atomic.Bool
}

// Drain marks the server as shutting down, so /readyz fails and load
// balancers stop sending calls while in-flight ones finish.
func (h *Health) Drain() { h.draining.Store(true) }

// NewHandler returns the HTTP handler: discovery, service calls, CORS,
// health and readiness.
func NewHandler(e *Engine, cfg ServerConfig, health *Health, log *slog.Logger) http.Handler {
	s := &server{engine: e, cfg: cfg, health: health, log: log,
		origins: map[string]bool{}, discovery: mustJSON(e.Registry().Discovery())}
	for _, o := range cfg.CORSOrigins {
		s.origins[strings.TrimRight(o, "/")] = true
	}
	r := gin.New()
	r.RedirectTrailingSlash = false
	r.RedirectFixedPath = false
	r.HandleMethodNotAllowed = true
	// Server spans per request, continuing the EHR's W3C trace context and
	// baggage; the span is named by route, never by the URL.
	r.Use(otelgin.Middleware("halite", otelgin.WithTracerProvider(e.tel.provider),
		otelgin.WithPropagators(propagation.NewCompositeTextMapPropagator(propagation.TraceContext{}, propagation.Baggage{}))),
		gin.CustomRecoveryWithWriter(io.Discard, s.recovered), s.accessLog, s.cors)
	r.GET("/cds-services", s.discover)
	r.POST("/cds-services/:id", s.call)
	r.POST("/cds-services/:id/feedback", s.feedback)
	for _, p := range []string{"/cds-services", "/cds-services/:id", "/cds-services/:id/feedback"} {
		r.OPTIONS(p, func(c *gin.Context) { c.Status(http.StatusNoContent) })
	}
	r.GET("/healthz", func(c *gin.Context) { c.Data(http.StatusOK, "application/json", []byte(`{"status":"ok"}`)) })
	r.GET("/readyz", s.ready)
	if cfg.Metrics != nil {
		r.GET("/metrics", gin.WrapH(cfg.Metrics))
	}
	r.NoRoute(func(c *gin.Context) {
		s.fail(c, &Error{Kind: KindUnknownService, Message: "no such endpoint"})
	})
	r.NoMethod(func(c *gin.Context) {
		s.fail(c, &Error{Kind: KindMethodNotAllowed, Message: "method not allowed"})
	})
	return r
}

type server struct {
	engine    *Engine
	cfg       ServerConfig
	health    *Health
	log       *slog.Logger
	origins   map[string]bool
	discovery []byte
}

func (s *server) discover(c *gin.Context) {
	c.Data(http.StatusOK, "application/json", s.discovery)
}

func (s *server) call(c *gin.Context) {
	id := c.Param("id")
	// Only JSON bodies: a browser can send text/plain across origins without
	// a CORS preflight, so accepting it would let any web page call halite.
	if mt, _, err := mime.ParseMediaType(c.GetHeader("Content-Type")); err != nil ||
		(mt != "application/json" && mt != "application/fhir+json") {
		s.fail(c, &Error{Kind: KindUnsupportedMedia, Field: "Content-Type",
			Message: "must be application/json"})
		return
	}
	// The caller is known before its body is read, so an unauthenticated
	// client cannot make halite hold buffers for it.
	ctx, ok := s.authenticate(c, "/cds-services/"+id)
	if !ok {
		return
	}
	body, err := readBody(c, s.cfg.MaxBodyBytes)
	if err != nil {
		s.fail(c, bodyError(err, s.cfg.MaxBodyBytes))
		return
	}
	if s.cfg.CallTimeout > 0 {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, s.cfg.CallTimeout)
		defer cancel()
	}
	out, err := s.engine.Handle(ctx, id, body, time.Now())
	if err != nil {
		fail(trace.SpanFromContext(ctx), causeOf(err), err)
		s.fail(c, err)
		return
	}
	c.Set(logCards, len(out.Response.Cards))
	c.Set(logKeys, keySummary(out.Keys))
	c.Data(http.StatusOK, "application/json", mustJSON(out.Response))
}

// authenticate verifies the caller for a call to path, answering 401 and
// returning false if refused.
func (s *server) authenticate(c *gin.Context, path string) (context.Context, bool) {
	ctx := c.Request.Context()
	a := s.cfg.Authenticator
	if a == nil {
		return ctx, true
	}
	actx, span := s.engine.tel.start(ctx, "jwt.verify")
	caller, err := a.Authenticate(actx, c.GetHeader("Authorization"), strings.TrimRight(s.cfg.PublicBaseURL, "/")+path)
	if err != nil {
		reason := "refused"
		if l, ok := err.(interface{ Label() string }); ok {
			reason = l.Label()
		}
		span.SetAttributes(attribute.String("halite.auth.refused", reason))
		fail(span, CauseCaller, err)
		span.End()
		s.engine.tel.authFailures.Add(ctx, 1, metric.WithAttributes(attribute.String("reason", reason)))
		c.Set(logAuth, reason)
		s.fail(c, &Error{Kind: KindUnauthorized, Message: "authentication required"})
		return nil, false
	}
	span.End()
	return WithCaller(ctx, caller), true
}

// feedback stores the EHR's outcomes for cards of service id. Its token's
// audience is the feedback URL itself. Success is 200 with no body.
func (s *server) feedback(c *gin.Context) {
	id := c.Param("id")
	// The caller is verified before anything about the service or the body
	// is answered, so an unauthenticated client learns nothing from it.
	ctx, ok := s.authenticate(c, "/cds-services/"+id+"/feedback")
	if !ok {
		return
	}
	if _, known := s.engine.Registry().Lookup(id); !known {
		s.fail(c, &Error{Kind: KindUnknownService, Message: "no CDS service with id " + quote(id)})
		return
	}
	if mt, _, err := mime.ParseMediaType(c.GetHeader("Content-Type")); err != nil || mt != "application/json" {
		s.fail(c, &Error{Kind: KindUnsupportedMedia, Field: "Content-Type", Message: "must be application/json"})
		return
	}
	body, err := readBody(c, s.cfg.MaxBodyBytes)
	if err != nil {
		s.fail(c, bodyError(err, s.cfg.MaxBodyBytes))
		return
	}
	rec := s.engine.recorder
	if rec == nil {
		s.fail(c, &Error{Kind: KindUnavailable, Message: "no feedback store is configured"})
		return
	}
	entries, err := DecodeFeedback(id, body)
	if err != nil {
		s.fail(c, err)
		return
	}
	caller := CallerFrom(ctx)
	for i := range entries {
		entries[i].Issuer, entries[i].Tenant = caller.Issuer, caller.Tenant
	}
	if err := rec.RecordOutcomes(ctx, entries); err != nil {
		s.fail(c, feedbackError(err))
		return
	}
	for _, o := range entries {
		s.engine.tel.feedbackOutcomes.Add(ctx, 1, metric.WithAttributes(attribute.String("service", id), attribute.String("outcome", o.Outcome)))
	}
	c.Status(http.StatusOK)
}

// readBody reads the request body, at most limit bytes. A body whose
// Content-Length is declared and within the limit is read into a buffer
// sized for it rather than a growing one (for a large prefetch, growth was
// most of a call's garbage); what is set aside before any byte arrives is
// capped at maxPrealloc, so a declared length alone cannot claim memory.
func readBody(c *gin.Context, limit int64) ([]byte, error) {
	r := http.MaxBytesReader(c.Writer, c.Request.Body, limit)
	n := c.Request.ContentLength
	if n <= 0 || n > limit {
		return io.ReadAll(r)
	}
	// bytes.MinRead spare, so that reading the end of the body does not grow it.
	buf := bytes.NewBuffer(make([]byte, 0, min(n, maxPrealloc)+bytes.MinRead))
	if _, err := buf.ReadFrom(r); err != nil {
		return nil, err
	}
	if int64(buf.Len()) != n {
		return nil, io.ErrUnexpectedEOF // net/http ends a body at its declared length
	}
	return buf.Bytes(), nil
}

// maxPrealloc bounds the buffer readBody sets aside for a declared length.
const maxPrealloc = 1 << 20

// bodyError is the answer to a request body that could not be read: 413
// when it passed the limit, 400 otherwise.
func bodyError(err error, limit int64) error {
	var tooLarge *http.MaxBytesError
	if errors.As(err, &tooLarge) {
		return &Error{Kind: KindTooLarge, Message: "request body is larger than the limit of " + formatBytes(limit)}
	}
	return &Error{Kind: KindBadRequest, Message: "request body could not be read"}
}

func (s *server) ready(c *gin.Context) {
	if s.health.draining.Load() {
		c.Data(http.StatusServiceUnavailable, "application/json", []byte(`{"status":"draining"}`))
		return
	}
	ready := map[string]string{"status": "ready", "ruleset": s.engine.Ruleset().Revision()}
	if s.cfg.Authenticator == nil {
		ready["mode"] = "development: callers are not authenticated"
	}
	c.Data(http.StatusOK, "application/json", mustJSON(ready))
}

// fail answers err with its status and an OperationOutcome. The log gets
// the error's kind and field only: messages can quote request values.
func (s *server) fail(c *gin.Context, err error) {
	c.Set(logError, errorSummary(err))
	c.Data(StatusOf(err), "application/json", mustJSON(OutcomeOf(err)))
	c.Abort()
}

func (s *server) recovered(c *gin.Context, v any) {
	s.log.Error("panic in handler", "route", c.FullPath())
	s.fail(c, errors.New("panic"))
}

// cors answers preflights and marks responses for the configured origins
// only (CDS Hooks 2.0 §CORS defers to OWASP: no wildcard).
func (s *server) cors(c *gin.Context) {
	origin := c.GetHeader("Origin")
	if origin == "" {
		c.Next()
		return
	}
	h := c.Writer.Header()
	h.Add("Vary", "Origin")
	if !s.origins[origin] {
		// Reads stay open (the browser withholds the answer); anything that
		// acts — preflights and POSTs — is refused.
		if c.Request.Method != http.MethodGet && c.Request.Method != http.MethodHead {
			s.fail(c, &Error{Kind: KindForbidden, Message: "origin not allowed"})
			return
		}
		c.Next()
		return
	}
	h.Set("Access-Control-Allow-Origin", origin)
	h.Set("Access-Control-Allow-Headers", "Authorization, Content-Type")
	h.Set("Access-Control-Allow-Methods", "GET, POST, OPTIONS")
	h.Set("Access-Control-Max-Age", "600")
	c.Next()
}

// Keys of per-request values the access log reads.
const (
	logCards = "halite.cards"
	logKeys  = "halite.prefetch"
	logError = "halite.error"
	logAuth  = "halite.auth" // why a token was refused
)

// accessLog writes one line per request: route, status, duration, card
// count and prefetch states. No body, query string or identifier is logged.
func (s *server) accessLog(c *gin.Context) {
	start := time.Now()
	c.Next()
	attrs := []any{"method", c.Request.Method, "route", c.FullPath(), "status", c.Writer.Status(),
		"duration_ms", float64(time.Since(start).Microseconds()) / 1000}
	if id := c.Param("id"); id != "" {
		if _, known := s.engine.Registry().Lookup(id); known {
			attrs = append(attrs, "service", id)
		}
	}
	if v, ok := c.Get(logCards); ok {
		attrs = append(attrs, "cards", v)
	}
	if v, ok := c.Get(logKeys); ok {
		attrs = append(attrs, "prefetch", v)
	}
	if v, ok := c.Get(logError); ok {
		attrs = append(attrs, "error", v)
	}
	if v, ok := c.Get(logAuth); ok {
		attrs = append(attrs, "auth_refused", v)
	}
	s.log.InfoContext(c.Request.Context(), "request", attrs...)
	mattrs := []attribute.KeyValue{attribute.Int("status", c.Writer.Status()), attribute.String("route", c.FullPath())}
	if id := c.Param("id"); id != "" {
		if _, known := s.engine.Registry().Lookup(id); known {
			mattrs = append(mattrs, attribute.String("service", id))
		}
	}
	s.engine.tel.requestDuration.Record(c.Request.Context(), time.Since(start).Seconds(), metric.WithAttributes(mattrs...))
}

// errorSummary describes err for logs without request values: its kind and
// the field at fault, or for internal errors the message (halite's own).
func errorSummary(err error) string {
	var e *Error
	switch {
	case !errors.As(err, &e):
		return "internal: " + err.Error()
	case e.Kind == KindInternal:
		return "internal: " + e.Error()
	case e.Field != "":
		return statusOf[e.Kind].issueType + " " + e.Field
	}
	return statusOf[e.Kind].issueType
}

func keySummary(keys []Resolved) string {
	parts := make([]string, 0, len(keys))
	for _, k := range keys {
		p := k.Key.Key + "=" + string(k.State)
		if k.Partial {
			p += "(partial)"
		}
		parts = append(parts, p)
	}
	return strings.Join(parts, ",")
}

func mustJSON(v any) []byte {
	b, err := json.Marshal(v)
	if err != nil {
		panic("hooks: marshal response: " + err.Error()) // only halite's own types reach here
	}
	return b
}

func formatBytes(n int64) string {
	const mib = 1 << 20
	if n%mib == 0 {
		return strconv.FormatInt(n/mib, 10) + " MiB"
	}
	return strconv.FormatInt(n, 10) + " bytes"
}
