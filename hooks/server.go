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
	"os"
	"sort"
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
	// App, when set, serves the sodium course app under /app/ (hooks/app).
	App http.Handler
	// StoreReady, when set, checks that the store answers; /readyz fails
	// while it does not, so the platform routes calls to other replicas.
	StoreReady func(context.Context) error
	// EvaluateAt, when not zero, is the time every call is evaluated at
	// instead of now (development mode only: fixtures evaluated as eval
	// --at evaluates them).
	EvaluateAt time.Time
	// ServerName is the host (and port) the service is reached by, for the
	// OpenTelemetry server.address of its HTTP spans and metrics; never the
	// caller's Host header, whose values are the caller's to choose.
	ServerName string
	// AuthFailureReasons are the reasons a token can be refused; each
	// reason's counter starts at zero.
	AuthFailureReasons []string
	// Capture, when set, is given each answered call (development mode
	// only: the command de-identifies and writes it for regression tests).
	Capture func(service string, body []byte, at time.Time, response Response)
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
		origins: map[string]bool{}, discovery: mustJSON(e.discovery())}
	for _, o := range cfg.CORSOrigins {
		s.origins[strings.TrimRight(o, "/")] = true
	}
	s.zeroCounters()
	r := gin.New()
	r.RedirectTrailingSlash = false
	r.RedirectFixedPath = false
	r.HandleMethodNotAllowed = true
	// Server spans per request, continuing the EHR's W3C trace context and
	// baggage; the span is named by route, never by the URL.
	// Probes (/healthz, /readyz, /metrics) and the app's static files
	// (/app/) are neither traced nor logged (but at DEBUG): a platform polls
	// the probes every few seconds, and the files are no news.
	r.Use(otelgin.Middleware(cfg.ServerName, otelgin.WithTracerProvider(e.tel.provider), otelgin.WithMeterProvider(e.tel.meters),
		otelgin.WithPropagators(propagation.NewCompositeTextMapPropagator(propagation.TraceContext{}, propagation.Baggage{})),
		otelgin.WithGinFilter(func(c *gin.Context) bool { return !isProbe(c.Request.URL.Path) })),
		s.accessLog, gin.CustomRecoveryWithWriter(io.Discard, s.recovered), s.cors) // a recovered panic is logged and counted
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
	if cfg.App != nil {
		r.GET("/app/*file", gin.WrapH(cfg.App))
		r.HEAD("/app/*file", gin.WrapH(cfg.App))
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
	// One deadline covers the whole call: authentication (the replay
	// check), the body, prefetch, rules and the card log.
	ctx, cancel := s.deadline(c)
	defer cancel()
	// The caller is known before its body is read, so an unauthenticated
	// client cannot make halite hold buffers for it.
	ctx, ok := s.authenticate(ctx, c, "/cds-services/"+id)
	if !ok {
		return
	}
	budget := s.engine.newCallBudget()
	defer budget.Release()
	body, err := s.readBody(ctx, c, budget)
	if err != nil {
		s.fail(c, err)
		return
	}
	at := time.Now()
	if !s.cfg.EvaluateAt.IsZero() {
		at = s.cfg.EvaluateAt
	}
	out, err := s.engine.handle(ctx, id, body, at, budget)
	if out != nil {
		c.Set(logKeys, keySummary(out.Keys))
		if failed := keyFailures(out.Keys); len(failed) > 0 {
			c.Set(logKeyFailures, strings.Join(failed, ","))
		}
	}
	if err != nil {
		s.fail(c, err)
		return
	}
	if s.cfg.Capture != nil {
		s.cfg.Capture(id, body, at, out.Response)
	}
	c.Set(logCards, len(out.Response.Cards))
	if n := out.UnknownPrefetchKeys; n > 0 {
		c.Set(logUnknownKeys, n)
	}
	if len(out.Dropped) > 0 {
		c.Set(logDropped, countSummary(out.Dropped))
	}
	c.Data(http.StatusOK, "application/json", mustJSON(out.Response))
}

// deadline is the call's context, ending call_timeout after it started.
func (s *server) deadline(c *gin.Context) (context.Context, context.CancelFunc) {
	if s.cfg.CallTimeout <= 0 {
		return context.WithCancel(c.Request.Context())
	}
	return context.WithTimeout(c.Request.Context(), s.cfg.CallTimeout)
}

// readBody reads the request body within the call's deadline, holding it
// in the process's byte budget: a declared length before it is read, an
// undeclared one (chunked) as it arrives. A body still arriving at the
// deadline is answered 408; a deadline already past (spent authenticating)
// is halite's 503, and so is a budget that cannot hold the body.
func (s *server) readBody(ctx context.Context, c *gin.Context, budget *CallBudget) ([]byte, error) {
	limit := s.cfg.MaxBodyBytes
	if ctx.Err() != nil {
		// The time went before the body was read (authentication waited):
		// halite's delay, not a slow upload.
		return nil, &Error{Kind: KindUnavailable, Reason: ReasonCallTimeout,
			Message: "the call's time budget ran out before its body was read", Err: ctx.Err()}
	}
	if d, ok := ctx.Deadline(); ok {
		// Past the deadline the connection's read fails; the 408 is still
		// written. A body already sent takes microseconds to read, but Go
		// refuses a read whose deadline has passed without trying it, so the
		// body always gets minBodyWindow: a 408 means it really did not come.
		_ = http.NewResponseController(c.Writer).SetReadDeadline(later(d, time.Now().Add(minBodyWindow)))
	}
	body, err := readBody(c, limit, budget.Hold)
	if err != nil {
		if errors.Is(err, ErrProcessBudget) {
			return nil, &Error{Kind: KindUnavailable, Reason: ReasonBudget,
				Message: "halite is holding too much data for other calls just now", Err: err}
		}
		if errors.Is(err, os.ErrDeadlineExceeded) {
			return nil, &Error{Kind: KindTimeout, Message: "the request body did not arrive within the call's time budget"}
		}
		return nil, bodyError(err, limit)
	}
	return body, nil
}

// authenticate verifies the caller for a call to path, answering 401 and
// returning false if refused, or 503 when the check could not be made (the
// replay cache's store or the caller's key set unavailable in time): that
// is never the caller's fault.
func (s *server) authenticate(ctx context.Context, c *gin.Context, path string) (context.Context, bool) {
	a := s.cfg.Authenticator
	if a == nil {
		return ctx, true
	}
	actx, span := s.engine.tel.start(ctx, "jwt.verify")
	caller, err := a.Authenticate(actx, c.GetHeader("Authorization"), strings.TrimRight(s.cfg.PublicBaseURL, "/")+path)
	if KindOf(err) == KindUnavailable {
		fail(span, CauseOf(err), err)
		if CauseOf(err) == CauseStore {
			s.engine.tel.storeFailure(ctx, StoreOpReplay, err)
		}
		span.End()
		s.fail(c, err)
		return nil, false
	}
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
	// Who called, on the call's span: every span of the call is under it.
	if srv := trace.SpanFromContext(ctx); srv.IsRecording() {
		srv.SetAttributes(attribute.String("halite.issuer", caller.Issuer))
		if caller.Tenant != "" {
			srv.SetAttributes(attribute.String("halite.tenant", caller.Tenant))
		}
	}
	return WithCaller(ctx, caller), true
}

// feedback stores the EHR's outcomes for cards of service id. Its token's
// audience is the feedback URL itself. Success is 200 with no body.
func (s *server) feedback(c *gin.Context) {
	id := c.Param("id")
	ctx, cancel := s.deadline(c)
	defer cancel()
	// The caller is verified before anything about the service or the body
	// is answered, so an unauthenticated client learns nothing from it.
	ctx, ok := s.authenticate(ctx, c, "/cds-services/"+id+"/feedback")
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
	budget := s.engine.newCallBudget()
	defer budget.Release()
	body, err := s.readBody(ctx, c, budget)
	if err != nil {
		s.fail(c, err)
		return
	}
	rec := s.engine.recorder
	if rec == nil {
		s.fail(c, &Error{Kind: KindUnavailable, Reason: ReasonNoStore, Message: "no feedback store is configured"})
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
		err = feedbackError(err)
		if CauseOf(err) == CauseStore {
			s.engine.tel.storeFailure(ctx, StoreOpFeedback, err)
		}
		s.fail(c, err)
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
// hold takes the body's bytes from the process's budget: a declared length
// before reading (until the call's deadline at most), others as they come.
func readBody(c *gin.Context, limit int64, hold func(int64) error) ([]byte, error) {
	r := http.MaxBytesReader(c.Writer, c.Request.Body, limit)
	n := c.Request.ContentLength
	if n <= 0 || n > limit {
		return io.ReadAll(heldReader{r, hold})
	}
	if err := hold(n); err != nil {
		return nil, err
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

// heldReader holds each part of a body of undeclared length as it is read.
type heldReader struct {
	r    io.Reader
	hold func(int64) error
}

func (h heldReader) Read(p []byte) (int, error) {
	n, err := h.r.Read(p)
	if n > 0 {
		if herr := h.hold(int64(n)); herr != nil {
			return 0, herr
		}
	}
	return n, err
}

// minBodyWindow is the least time a request body is given to arrive, even
// when the call's deadline is nearer.
const minBodyWindow = 250 * time.Millisecond

func later(a, b time.Time) time.Time {
	if a.After(b) {
		return a
	}
	return b
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
	if s.cfg.StoreReady != nil {
		ctx, cancel := context.WithTimeout(c.Request.Context(), readyTimeout)
		defer cancel()
		if err := s.cfg.StoreReady(ctx); err != nil {
			c.Set(logError, "store unreachable")
			c.Data(http.StatusServiceUnavailable, "application/json", []byte(`{"status":"store-unreachable"}`))
			return
		}
	}
	ready := map[string]string{"status": "ready", "ruleset": s.engine.Ruleset().Revision()}
	if s.cfg.Authenticator == nil {
		ready["mode"] = "development: callers are not authenticated"
	}
	c.Data(http.StatusOK, "application/json", mustJSON(ready))
}

// readyTimeout bounds the store check of one /readyz probe.
const readyTimeout = time.Second

// fail answers err with its status and an OperationOutcome, and names its
// cause on the call's span, in its log line and in its metric. The log gets
// the error's kind and field only: messages can quote request values.
func (s *server) fail(c *gin.Context, err error) {
	c.Set(logError, errorSummary(err))
	c.Set(logCause, CauseOf(err))
	// The call's server span names the cause; only a 5xx marks it failed
	// (OpenTelemetry HTTP semantic conventions leave a server span's status
	// unset for 4xx: the server did its job).
	span := trace.SpanFromContext(c.Request.Context())
	if StatusOf(err) >= http.StatusInternalServerError {
		fail(span, CauseOf(err), err)
	} else {
		span.SetAttributes(attribute.String("halite.error.cause", CauseOf(err)))
	}
	if KindOf(err) == KindUnavailable {
		reason := ReasonStoreFault
		var e *Error
		if errors.As(err, &e) && e.Reason != "" {
			reason = e.Reason
		}
		c.Header("Retry-After", strconv.Itoa(RetryAfterSeconds))
		s.engine.tel.unavailable.Add(c.Request.Context(), 1, metric.WithAttributes(attribute.String("reason", reason)))
	}
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
	logCause = "halite.cause" // who has to act on a failed call (Cause* constants)
	// logKeyFailures names the keys not had and why ("sodium=timeout").
	logKeyFailures = "halite.prefetch.failures"
	logAuth        = "halite.auth" // why a token was refused
	// logUnknownKeys counts prefetch keys the service did not ask for; their
	// names are the EHR's text and are never logged.
	logUnknownKeys = "halite.prefetch.unknown"
	// logDropped counts the resources not used, by reason category (never
	// which resources).
	logDropped = "halite.dropped"
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
	cause, _ := c.Get(logCause)
	if cause != nil {
		attrs = append(attrs, "cause", cause)
	}
	if v, ok := c.Get(logKeyFailures); ok {
		attrs = append(attrs, "prefetch_failed", v)
	}
	if v, ok := c.Get(logAuth); ok {
		attrs = append(attrs, "auth_refused", v)
	}
	if v, ok := c.Get(logUnknownKeys); ok {
		attrs = append(attrs, "prefetch_unknown_keys", v)
	}
	if v, ok := c.Get(logDropped); ok {
		attrs = append(attrs, "dropped", v)
	}
	// By outcome: a caller's mistake (4xx) is a warning, a failure on
	// halite's side or its dependencies' (5xx) an error, so filtering WARN
	// and above finds every failed call.
	level := slog.LevelInfo
	if isProbe(c.Request.URL.Path) && c.Writer.Status() < http.StatusBadRequest {
		level = slog.LevelDebug // a probe answered is no news (a failed one is logged)
	}
	switch st := c.Writer.Status(); {
	case st >= http.StatusInternalServerError:
		level = slog.LevelError
	case st >= http.StatusBadRequest:
		level = slog.LevelWarn
	}
	s.log.Log(c.Request.Context(), level, "request", attrs...)
	mattrs := []attribute.KeyValue{attribute.Int("status", c.Writer.Status()), attribute.String("route", c.FullPath())}
	if cause != nil {
		mattrs = append(mattrs, attribute.String("cause", cause.(string)))
	}
	if id := c.Param("id"); id != "" {
		if _, known := s.engine.Registry().Lookup(id); known {
			mattrs = append(mattrs, attribute.String("service", id))
		}
	}
	s.engine.tel.requestDuration.Record(c.Request.Context(), time.Since(start).Seconds(), metric.WithAttributes(mattrs...))
}

// zeroCounters starts the counters an alert divides or compares at zero
// for every label set known in advance (the 503 reasons; each service's
// feedback outcomes), so that a series exists before its first event.
func (s *server) zeroCounters() {
	ctx := context.Background()
	for _, reason := range []string{ReasonStoreBusy, ReasonStoreTimeout, ReasonStoreQueueFull, ReasonStoreFault, ReasonFHIRTimeout,
		ReasonCallTimeout, ReasonBudget, ReasonKeysTimeout, ReasonNoStore, ReasonCallerGone} {
		s.engine.tel.unavailable.Add(ctx, 0, metric.WithAttributes(attribute.String("reason", reason)))
	}
	for _, reason := range s.cfg.AuthFailureReasons {
		s.engine.tel.authFailures.Add(ctx, 0, metric.WithAttributes(attribute.String("reason", reason)))
	}
	for _, op := range storeOps {
		for _, reason := range storeReasons {
			s.engine.tel.storeFailures.Add(ctx, 0, metric.WithAttributes(attribute.String("operation", op), attribute.String("reason", reason)))
		}
	}
	for _, svc := range s.engine.Registry().Services() {
		for _, outcome := range []string{"accepted", "overridden"} {
			s.engine.tel.feedbackOutcomes.Add(ctx, 0, metric.WithAttributes(attribute.String("service", svc.ID), attribute.String("outcome", outcome)))
		}
	}
}

// isProbe reports whether path is a health, readiness or metrics probe,
// or one of the app's static files: requests that are no news.
func isProbe(path string) bool {
	return path == "/healthz" || path == "/readyz" || path == "/metrics" || strings.HasPrefix(path, "/app/")
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
	case e.Reason != "":
		return statusOf[e.Kind].issueType + " " + e.Reason
	}
	return statusOf[e.Kind].issueType
}

// countSummary writes counts by category as "a=1,b=2", in name order.
func countSummary(counts map[string]int) string {
	parts := make([]string, 0, len(counts))
	for k, n := range counts {
		parts = append(parts, k+"="+strconv.Itoa(n))
	}
	sort.Strings(parts)
	return strings.Join(parts, ",")
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
