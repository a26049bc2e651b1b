package main

import (
	"context"
	"errors"
	"fmt"
	"github.com/halite-cds/halite/hooks/app"
	"io"
	"log/slog"
	"net"
	"net/http"
	"net/url"
	"os"
	"slices"
	"strings"
	"time"

	"github.com/gin-gonic/gin"
	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/auth"
	"github.com/halite-cds/halite/hooks/fhirclient"
	"github.com/halite-cds/halite/rules"
	"go.opentelemetry.io/otel/propagation"
)

var logLevels = map[string]slog.Level{
	"debug": slog.LevelDebug, "info": slog.LevelInfo, "warn": slog.LevelWarn, "error": slog.LevelError,
}

// serve runs the HTTP service until ctx is cancelled (SIGINT or SIGTERM),
// then stops taking calls and drains in-flight ones within the grace period.
func serve(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("serve", "serve [--config FILE] [--addr HOST:PORT] [--at RFC3339]", stderr)
	configPath := fs.String("config", "", "YAML configuration `file` (default: $HALITE_CONFIG, else embedded defaults)")
	addr := fs.String("addr", "", "listen address `HOST:PORT`, overriding listen_addr (default 127.0.0.1:8080)")
	atFlag := fs.String("at", "", "development mode only: evaluate every call at this `time` (RFC 3339) instead of now, as eval --at does, so fixtures give the cards they give there")
	if _, err := parseFlags(fs, args); err != nil {
		return err
	}
	cfg, err := loadConfig(*configPath, os.Getenv)
	if err != nil {
		return err
	}
	if *addr != "" {
		cfg.ListenAddr = *addr
	}
	var evaluateAt time.Time
	if *atFlag != "" {
		if !cfg.DevelopmentMode {
			return errors.New("--at: a fixed evaluation time is for development mode only (development_mode: true); a service evaluates calls now")
		}
		if evaluateAt, err = time.Parse(time.RFC3339, *atFlag); err != nil {
			return fmt.Errorf("--at: %q is not an RFC 3339 time such as 2026-11-20T08:00:00Z", *atFlag)
		}
	}
	if err := cfg.validate(); err != nil {
		return err
	}
	rs, err := loadRuleset(cfg.PolicyOverride)
	if err != nil {
		return err
	}
	if rs, err = displayRuleset(rs, cfg.DisplayTimezone, cfg.DisplayUnits); err != nil {
		return fmt.Errorf("display_timezone: %w", err)
	}
	codes, err := loadLabCodes(cfg.LabCodes)
	if err != nil {
		return err
	}
	log := slog.New(traceLogHandler{slog.NewJSONHandler(stderr, &slog.HandlerOptions{Level: logLevels[cfg.LogLevel]})}).
		With("ruleset", rs.Revision())
	st, hash, err := openStore(cfg.Store, log, false)
	if err != nil {
		return err
	}
	defer st.Close() // after the server has finished its calls: queued records are committed first
	// The replay cache is kept in the store, SQLite too: a token replayed
	// after a restart is refused, and replicas sharing a PostgreSQL
	// database share it.
	authn, err := authenticator(cfg, st, log)
	if err != nil {
		return err
	}
	if authn == nil {
		log.Warn("DEVELOPMENT MODE: local use only. Callers are NOT authenticated, the service listens on " +
			"loopback only, and plain-http FHIR servers on loopback are accepted. Do not use with real patient data.")
	}
	purgeCtx, stopPurge := context.WithCancel(context.Background())
	purged := make(chan struct{})
	go func() { purgeLoop(purgeCtx, st, cfg.Store, log); close(purged) }()
	defer func() { stopPurge(); <-purged }() // runs before st.Close
	gin.SetMode(gin.ReleaseMode)
	tel, err := setupTelemetry(ctx, os.Getenv, rs.Revision(), log)
	if err != nil {
		return err
	}
	defer func() {
		sctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
		defer cancel()
		if err := tel.shutdown(sctx); err != nil { // flushes spans still queued
			log.Warn("telemetry shutdown", "error", err.Error())
		}
	}()
	ht, err := hooks.NewTelemetry(tel.tracer, tel.meter)
	if err != nil {
		return err
	}
	// Listening before the engine is made gives the app's launch URL its
	// port in development, where no public_base_url need be set.
	ln, err := net.Listen("tcp", cfg.ListenAddr)
	if err != nil {
		return fmt.Errorf("serve: %w", err)
	}
	defer ln.Close()
	// Cards link the app at public_base_url; in development, at the listen
	// address; with neither, no card links it (a wildcard address is no URL).
	appURL := ""
	switch {
	case cfg.PublicBaseURL != "":
		appURL = strings.TrimRight(cfg.PublicBaseURL, "/") + app.LaunchPath
	case cfg.DevelopmentMode:
		appURL = "http://" + ln.Addr().String() + app.LaunchPath
	}
	engine := newEngine(rs, codes, cfg, log, recorder{st}, hash, ht, appURL, !evaluateAt.IsZero())
	log.Info("budgets", "memory_limit_bytes", cfg.memoryLimit, "process_bytes", cfg.Budget.ProcessBytes,
		"call_bytes", cfg.Budget.CallBytes, "max_response_bytes", cfg.FHIRClient.MaxResponseBytes, "store_queue_size", cfg.Store.QueueSize)
	health := &hooks.Health{}
	var capture func(string, []byte, time.Time, hooks.Response)
	if cfg.CaptureDir != "" {
		c, err := newCapturer(cfg.CaptureDir, log)
		if err != nil {
			return err
		}
		capture = c.capture
		log.Warn("CAPTURE: every answered call is written de-identified to capture_dir " + cfg.CaptureDir)
	}
	handler := hooks.NewHandler(engine, hooks.ServerConfig{
		MaxBodyBytes: cfg.MaxBodyBytes,
		CallTimeout:  time.Duration(cfg.CallTimeout),
		CORSOrigins:  cfg.CORSOrigins,
		// An untyped nil when no issuer is trusted: development mode.
		Authenticator: authn,
		PublicBaseURL: cfg.PublicBaseURL,
		Metrics:       metricsOnMain(cfg, tel.metrics),
		App:           app.Handler(appConnectOrigins(cfg)),
		StoreReady:    st.Ping,
		EvaluateAt:    evaluateAt,
		Capture:       capture,
		// Each refusal reason counted from zero once callers are verified.
		AuthFailureReasons: authReasons(cfg),
		ServerName:         serverName(cfg),
	}, health, log)
	if !evaluateAt.IsZero() {
		log.Warn("FIXED CLOCK: every call is evaluated at " + evaluateAt.Format(time.RFC3339) + " (serve --at), not now")
	}
	if cfg.AdminAddr != "" && tel.metrics != nil {
		_, stopAdmin, err := serveAdmin(cfg.AdminAddr, tel.metrics, cfg.AdminPprof, log)
		if err != nil {
			return err
		}
		defer stopAdmin()
	}

	// A call's handler sets its own read deadline (the call's), answering
	// a slow upload 408; the server's bounds lie past it, so a call is
	// always answered, never cut off.
	srv := &http.Server{
		Handler:           handler,
		ReadHeaderTimeout: 10 * time.Second,
		ReadTimeout:       time.Duration(cfg.CallTimeout) + 10*time.Second,
		WriteTimeout:      time.Duration(cfg.CallTimeout) + 10*time.Second,
		IdleTimeout:       2 * time.Minute,
		ErrorLog:          slog.NewLogLogger(log.Handler(), slog.LevelWarn),
	}
	served := make(chan error, 1)
	go func() { served <- srv.Serve(ln) }()
	log.Info("listening", "addr", ln.Addr().String())
	fmt.Fprintf(stdout, "halite listening on http://%s\n", ln.Addr())

	select {
	case err := <-served:
		return fmt.Errorf("serve: %w", err)
	case <-ctx.Done():
	}
	health.Drain()
	if d := time.Duration(cfg.DrainDelay); d > 0 {
		// Keep serving while load balancers notice the failing /readyz.
		log.Info("shutting down: readiness failed, still serving", "readiness_drain_delay", d.String())
		time.Sleep(d)
	}
	log.Info("shutting down: draining in-flight calls", "grace", time.Duration(cfg.ShutdownGrace).String())
	shutdownCtx, cancel := context.WithTimeout(context.Background(), time.Duration(cfg.ShutdownGrace))
	defer cancel()
	if err := srv.Shutdown(shutdownCtx); err != nil {
		return fmt.Errorf("serve: shutdown: %w", err)
	}
	if err := <-served; err != nil && !errors.Is(err, http.ErrServerClosed) {
		return fmt.Errorf("serve: %w", err)
	}
	log.Info("stopped")
	return nil
}

// newEngine wires the engine with the outbound FHIR client. With trusted
// issuers, a call's fhirServer must be on its issuer's allowlist, or it is
// not used (the call is answered as if no server were given); without
// issuers (development mode) any https server, or loopback, is used.
func newEngine(rs *rules.Ruleset, codes *fhirmap.Codes, cfg Config, log *slog.Logger, rec hooks.Recorder, hash func(string) string, tel *hooks.Telemetry,
	appURL string, fixedClock bool) *hooks.Engine {
	opts := fhirclient.Options{
		Timeout:           time.Duration(cfg.FHIRClient.Timeout),
		MaxResponseBytes:  cfg.FHIRClient.MaxResponseBytes,
		AllowHTTPLoopback: cfg.DevelopmentMode,
		Transport:         fhirclient.NewTransport(cfg.DevelopmentMode, false), // one pool for all calls
		// W3C trace context only: the EHR's baggage is not passed on.
		Propagator: propagation.TraceContext{},
	}
	private := opts
	private.Transport = fhirclient.NewTransport(cfg.DevelopmentMode, true)
	return hooks.NewEngine(hooks.EngineConfig{
		Registry: hooks.NewRegistry(codes, rs),
		Ruleset:  rs,
		NewFetcher: func(server string, auth *hooks.FHIRAuthorization, caller hooks.Caller, budget *hooks.CallBudget) (hooks.Fetcher, error) {
			o := opts
			if len(cfg.Issuers) > 0 {
				entry, ok := allowedServer(cfg, caller, server)
				if !ok {
					return nil, errors.New("fhirServer is not on the calling issuer's allowlist")
				}
				if entry.AllowPrivate {
					o = private
				}
			}
			o.Budget = budget
			return fhirclient.New(server, auth.AccessToken, o)
		},
		Limits:      hooks.Limits{MaxPages: cfg.FHIRClient.MaxPages},
		Budget:      hooks.NewProcessBudget(cfg.Budget.ProcessBytes),
		CallBytes:   cfg.Budget.CallBytes,
		Log:         log,
		Telemetry:   tel,
		Recorder:    rec,
		PatientHash: hash,
		AppURL:      appURL,
		FixedClock:  fixedClock,
	})
}

// authReasons are the token refusal reasons to count from start-up: none
// in development mode, where no token is checked.
func authReasons(cfg Config) []string {
	if len(cfg.Issuers) == 0 {
		return nil
	}
	return auth.Reasons()
}

// serverName is the host the service is reached by: the public base URL's,
// else the listen address.
//
// It always has a port (the URL's, else its scheme's), so the HTTP
// instrumentation never takes one from the caller's Host header.
func serverName(cfg Config) string {
	if u, err := url.Parse(cfg.PublicBaseURL); err == nil && u.Host != "" {
		port := u.Port()
		if port == "" {
			port = "443"
			if u.Scheme == "http" {
				port = "80"
			}
		}
		return net.JoinHostPort(strings.ToLower(u.Hostname()), port)
	}
	return cfg.ListenAddr
}

// appConnectOrigins are the origins the app's page may call: the issuers'
// FHIR servers, app_connect_origins (their authorization servers), and in
// development mode any loopback port (serve-bundle --smart).
func appConnectOrigins(cfg Config) []string {
	var out []string
	if cfg.DevelopmentMode {
		out = append(out, "http://127.0.0.1:*", "http://localhost:*")
	}
	for _, is := range cfg.Issuers {
		for _, f := range is.FHIRServers {
			if u, err := url.Parse(f.BaseURL); err == nil && u.Host != "" {
				out = append(out, u.Scheme+"://"+u.Host)
			}
		}
	}
	out = append(out, cfg.AppConnectOrigins...)
	slices.Sort(out)
	return slices.Compact(out)
}
