package main

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"database/sql"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/go-jose/go-jose/v4"
	"github.com/golang-jwt/jwt/v5"
	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/hooks"
	"go.opentelemetry.io/otel/trace"
)

// fhirRecorder is a FHIR server answering from a scenario bundle that
// records every request's path and bearer token.
type fhirRecorder struct {
	mu     sync.Mutex
	hits   int
	tokens map[string]bool
}

func newFHIRRecorder(t *testing.T, scenario string) (*httptest.Server, *fhirRecorder) {
	t.Helper()
	data, err := os.ReadFile(scenario)
	if err != nil {
		t.Fatal(err)
	}
	b, err := fhirmap.ParseBundle(data)
	if err != nil {
		t.Fatal(err)
	}
	store := hooks.NewBundleStore(b)
	rec := &fhirRecorder{tokens: map[string]bool{}}
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		rec.mu.Lock()
		rec.hits++
		rec.tokens[r.Header.Get("Authorization")] = true
		rec.mu.Unlock()
		ref := strings.TrimPrefix(r.URL.RequestURI(), "/fhir/")
		out, err := store.Query(ref)
		if err != nil {
			http.Error(w, "not found", http.StatusNotFound)
			return
		}
		w.Header().Set("Content-Type", "application/fhir+json")
		w.Write(out)
	}))
	t.Cleanup(srv.Close)
	return srv, rec
}

func (r *fhirRecorder) count() (int, map[string]bool) {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.hits, r.tokens
}

// TestServeWithTrustedIssuer runs `halite serve` with one trusted issuer:
// unsigned or forged calls get 401 without detail and fetch nothing; a
// signed call with its fhirServer on the issuer's allowlist is answered
// from that server, which alone sees the access token; a server off the
// allowlist is never contacted (412: the required data cannot be had).
func TestServeWithTrustedIssuer(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	scenario := filepath.Join("..", "..", "testdata", "scenarios", "09-rapid-correction-high-risk.json")
	allowed, allowedRec := newFHIRRecorder(t, scenario)
	other, otherRec := newFHIRRecorder(t, scenario)

	key, err := ecdsa.GenerateKey(elliptic.P384(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	set, _ := json.Marshal(jose.JSONWebKeySet{Keys: []jose.JSONWebKey{{Key: &key.PublicKey, KeyID: "k1", Use: "sig"}}})
	jwksPath := filepath.Join(dir, "jwks.json")
	if err := os.WriteFile(jwksPath, set, 0o600); err != nil {
		t.Fatal(err)
	}
	cfg := "public_base_url: http://127.0.0.1\ndevelopment_mode: true\nissuers:\n" +
		"  - iss: https://ehr.example.org\n    jwks_file: " + jwksPath + "\n" +
		"    fhir_servers:\n      - base_url: " + allowed.URL + "/fhir\n"
	cfgPath := filepath.Join(dir, "halite.yaml")
	if err := os.WriteFile(cfgPath, []byte(cfg), 0o600); err != nil {
		t.Fatal(err)
	}
	base, logs, stop := startServe(t, "--config", cfgPath)
	const aud = "http://127.0.0.1/cds-services/sodium-chart-review"
	token := func(jti, audience string, k *ecdsa.PrivateKey) string {
		tok := jwt.NewWithClaims(jwt.SigningMethodES384, jwt.MapClaims{"iss": "https://ehr.example.org", "aud": audience,
			"iat": time.Now().Unix(), "exp": time.Now().Add(time.Minute).Unix(), "jti": jti, "sub": "ehr"})
		tok.Header["kid"] = "k1"
		s, err := tok.SignedString(k)
		if err != nil {
			t.Fatal(err)
		}
		return "Bearer " + s
	}
	request := func(server string) []byte {
		var req bytes.Buffer
		if err := run(context.Background(), []string{"request", "--hook", "patient-view", "--service", "sodium-chart-review",
			"--no-prefetch", "--fhir-server", server + "/fhir", "--access-token", "secret-access-token", scenario}, &req, io.Discard); err != nil {
			t.Fatal(err)
		}
		return req.Bytes()
	}
	post := func(body []byte, authz string) (int, string) {
		return postJSON(t, base+"/cds-services/sodium-chart-review", authz, body)
	}
	forger, _ := ecdsa.GenerateKey(elliptic.P384(), rand.Reader)
	for name, authz := range map[string]string{
		"unsigned":       "",
		"forged":         token("f1", aud, forger),
		"other audience": token("f2", "http://127.0.0.1/cds-services/sodium-drug-risk", key),
		"garbage":        "Bearer abc.def.ghi",
	} {
		status, body := post(request(allowed.URL), authz)
		if status != http.StatusUnauthorized || !strings.Contains(body, `"diagnostics":"authentication required"`) {
			t.Errorf("%s: %d %s", name, status, body)
		}
	}
	if hits, _ := allowedRec.count(); hits != 0 {
		t.Errorf("refused calls fetched %d times", hits)
	}
	if status, body := post(request(allowed.URL), token("ok-1", aud, key)); status != http.StatusOK {
		t.Fatalf("signed call: %d %s", status, body)
	}
	hits, tokens := allowedRec.count()
	if hits == 0 || len(tokens) != 1 || !tokens["Bearer secret-access-token"] {
		t.Errorf("allowlisted server: %d hits, tokens %v", hits, tokens)
	}
	if status, _ := post(request(other.URL), token("ok-2", aud, key)); status != http.StatusPreconditionFailed {
		t.Errorf("fhirServer off the allowlist: status %d, want 412", status)
	}
	if hits, _ := otherRec.count(); hits != 0 {
		t.Errorf("the server off the allowlist was contacted %d times", hits)
	}
	resp, err := http.Get(base + "/readyz")
	if err != nil {
		t.Fatal(err)
	}
	ready, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if strings.Contains(string(ready), "development") {
		t.Errorf("readyz says development mode with a trusted issuer: %s", ready)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	l := logs.String()
	if !strings.Contains(l, `"auth_refused":"signature"`) || strings.Contains(l, "secret-access-token") || strings.Contains(l, "eyJ") {
		t.Errorf("log must give refusal reasons and never a token:\n%s", l)
	}
}

// TestKeysAndToken: halite keys makes an issuer whose JWKS file halite
// trusts, and halite token signs a call that serve accepts once.
func TestKeysAndToken(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	dir, cfgPath := localIssuer(t)
	if st, err := os.Stat(filepath.Join(dir, "issuer-private.jwk")); err != nil || st.Mode().Perm() != 0o600 {
		t.Fatalf("private key file: %v %v", st, err)
	}
	var out bytes.Buffer
	base, _, stop := startServe(t, "--config", cfgPath)
	out.Reset()
	if err := run(context.Background(), []string{"token", "--key", filepath.Join(dir, "issuer-private.jwk"), "--iss", "https://ehr.example.org",
		"--aud", "http://127.0.0.1/cds-services/sodium-infusion-check"}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	demo, _ := os.ReadFile(filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json"))
	call := func() int {
		status, _ := postJSON(t, base+"/cds-services/sodium-infusion-check", "Bearer "+strings.TrimSpace(out.String()), demo)
		return status
	}
	if first, second := call(), call(); first != 200 || second != 401 {
		t.Errorf("signed call %d, replay %d; want 200 then 401", first, second)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
}

// TestReplicasShareReplayCache: two `halite serve` replicas on one
// PostgreSQL store refuse on one a token already used on the other.
func TestReplicasShareReplayCache(t *testing.T) {
	dsn := os.Getenv("HALITE_TEST_POSTGRES_DSN")
	if dsn == "" {
		if os.Getenv("CI") == "true" {
			t.Fatal("CI must run the PostgreSQL tests: HALITE_TEST_POSTGRES_DSN is not set")
		}
		t.Skip("HALITE_TEST_POSTGRES_DSN not set")
	}
	t.Setenv("HALITE_CONFIG", "")
	schema := fmt.Sprintf("halite_replicas_%d", time.Now().UnixNano())
	db, err := sql.Open("pgx", dsn)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := db.Exec("CREATE SCHEMA " + schema); err != nil {
		t.Fatal(err)
	}
	defer func() { db.Exec("DROP SCHEMA " + schema + " CASCADE"); db.Close() }()
	sep := "?"
	if strings.Contains(dsn, "?") {
		sep = "&"
	}
	t.Setenv("HALITE_STORE_DSN", dsn+sep+"search_path="+schema)
	dir, cfgPath := localIssuer(t)
	a, _, stopA := startServe(t, "--config", cfgPath)
	b, _, stopB := startServe(t, "--config", cfgPath)
	var tok bytes.Buffer
	if err := run(context.Background(), []string{"token", "--key", filepath.Join(dir, "issuer-private.jwk"), "--iss", "https://ehr.example.org",
		"--aud", "http://127.0.0.1/cds-services/sodium-infusion-check"}, &tok, io.Discard); err != nil {
		t.Fatal(err)
	}
	demo, _ := os.ReadFile(filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json"))
	call := func(base string) int {
		status, _ := postJSON(t, base+"/cds-services/sodium-infusion-check", "Bearer "+strings.TrimSpace(tok.String()), demo)
		return status
	}
	if first, second := call(a), call(b); first != 200 || second != 401 {
		t.Errorf("replica A %d, replica B with the same token %d; want 200 then 401", first, second)
	}
	var cards int
	db.QueryRow("SELECT count(*) FROM " + schema + ".card_log").Scan(&cards)
	if cards == 0 {
		t.Error("no card was logged in PostgreSQL")
	}
	if err := stopA(); err != nil {
		t.Fatal(err)
	}
	if err := stopB(); err != nil {
		t.Fatal(err)
	}
}

// TestReplayRefusedAfterRestart: on one node with SQLite, a token used
// before a restart is refused after it (the jti is kept in the store).
func TestReplayRefusedAfterRestart(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	t.Setenv("HALITE_STORE_DSN", "sqlite:"+filepath.Join(t.TempDir(), "halite.db"))
	dir, cfgPath := localIssuer(t)
	var tok bytes.Buffer
	if err := run(context.Background(), []string{"token", "--key", filepath.Join(dir, "issuer-private.jwk"), "--iss", "https://ehr.example.org",
		"--aud", "http://127.0.0.1/cds-services/sodium-infusion-check"}, &tok, io.Discard); err != nil {
		t.Fatal(err)
	}
	demo, _ := os.ReadFile(filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json"))
	var statuses []int
	for range 2 {
		base, _, stop := startServe(t, "--config", cfgPath)
		status, _ := postJSON(t, base+"/cds-services/sodium-infusion-check", "Bearer "+strings.TrimSpace(tok.String()), demo)
		statuses = append(statuses, status)
		if err := stop(); err != nil {
			t.Fatal(err)
		}
	}
	if statuses[0] != 200 || statuses[1] != 401 {
		t.Errorf("the same token before and after a restart: %v; want 200 then 401", statuses)
	}
}

// TestLogLinesCarryTraceIDs: a record logged inside a span gets its trace
// and span ids.
func TestLogLinesCarryTraceIDs(t *testing.T) {
	var buf bytes.Buffer
	log := slog.New(traceLogHandler{slog.NewJSONHandler(&buf, nil)}).With("ruleset", "r")
	tid, _ := trace.TraceIDFromHex("4bf92f3577b34da6a3ce929d0e0e4736")
	sid, _ := trace.SpanIDFromHex("00f067aa0ba902b7")
	ctx := trace.ContextWithSpanContext(context.Background(), trace.NewSpanContext(trace.SpanContextConfig{TraceID: tid, SpanID: sid}))
	log.InfoContext(ctx, "inside")
	log.Info("outside")
	lines := strings.Split(strings.TrimSpace(buf.String()), "\n")
	if len(lines) != 2 || !strings.Contains(lines[0], `"trace_id":"4bf92f3577b34da6a3ce929d0e0e4736"`) ||
		!strings.Contains(lines[0], `"span_id":"00f067aa0ba902b7"`) || strings.Contains(lines[1], "trace_id") {
		t.Errorf("log lines:\n%s", buf.String())
	}
}

// TestKubernetesConfigIsValid: the configuration the manifests mount is a
// valid production configuration (issuers, no development mode).
func TestKubernetesConfigIsValid(t *testing.T) {
	cfg, err := loadConfig(filepath.Join("..", "..", "deploy", "k8s", "base", "halite.yaml"), func(string) string { return "" })
	if err != nil {
		t.Fatal(err)
	}
	if err := cfg.validate(); err != nil {
		t.Fatal(err)
	}
	if cfg.DevelopmentMode || len(cfg.Issuers) == 0 {
		t.Error("the Kubernetes configuration must trust issuers and leave development mode")
	}
}

// TestHealthcheck: halite healthcheck succeeds against a running serve and
// fails against nothing.
func TestHealthcheck(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	base, _, stop := startServe(t)
	if err := run(context.Background(), []string{"healthcheck", "--url", base + "/healthz"}, io.Discard, io.Discard); err != nil {
		t.Errorf("healthy server: %v", err)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	if err := run(context.Background(), []string{"healthcheck", "--url", base + "/healthz"}, io.Discard, io.Discard); err == nil {
		t.Error("a stopped server passed the health check")
	}
}

// TestLoadCommand: a short signed load against serve, with the baseline,
// prints both rows with no errors.
func TestLoadCommand(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	dir, cfgPath := localIssuer(t)
	base, _, stop := startServe(t, "--config", cfgPath)
	var out bytes.Buffer
	scenario := filepath.Join("..", "..", "testdata", "scenarios", "14-hypona-3pct-overshoot.json")
	if err := run(context.Background(), []string{"load", "--url", base, "--duration", "1s", "--workers", "4", "--key", filepath.Join(dir, "issuer-private.jwk"),
		"--iss", "https://ehr.example.org", "--aud-base", "http://127.0.0.1", "--baseline", scenario}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	// At a fixed rate with tokens signed beforehand: every call made is
	// accepted, so each token was valid and its jti unused. (How many of
	// the 40 scheduled calls a loaded machine starts within the second is
	// not this test's business: speed is measured by benchmarks.)
	var presigned bytes.Buffer
	if err := run(context.Background(), []string{"load", "--url", base, "--rate", "40", "--duration", "1s", "--workers", "4", "--presign",
		"--key", filepath.Join(dir, "issuer-private.jwk"), "--iss", "https://ehr.example.org", "--aud-base", "http://127.0.0.1", scenario},
		&presigned, io.Discard); err != nil {
		t.Fatal(err)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	if f := strings.Fields(strings.Split(strings.TrimSpace(presigned.String()), "\n")[1]); f[1] == "0" || f[len(f)-1] != "0" {
		t.Errorf("presigned run: %s, want requests and no errors", presigned.String())
	}
	lines := strings.Split(strings.TrimSpace(out.String()), "\n")
	if len(lines) != 3 || !strings.Contains(lines[1], "halite") || !strings.Contains(lines[2], "baseline") {
		t.Fatalf("load output:\n%s", out.String())
	}
	for _, l := range lines[1:] {
		f := strings.Fields(l)
		if f[len(f)-1] != "0" || f[1] == "0" {
			t.Errorf("a run with errors or no requests: %s", l)
		}
	}
}

// TestLoadCommandRefusesUnusablePresign: pre-signing is refused at
// saturation (the number of calls is unknown), without a key, and for a
// run longer than a pre-signed token may live.
func TestLoadCommandRefusesUnusablePresign(t *testing.T) {
	for _, args := range [][]string{
		{"--presign", "--key", "k.jwk", "--iss", "https://ehr.example.org"},
		{"--presign", "--rate", "10"},
		{"--presign", "--rate", "10", "--duration", "10m", "--key", "k.jwk", "--iss", "https://ehr.example.org"},
	} {
		err := run(context.Background(), append(append([]string{"load", "--url", "http://127.0.0.1:1"}, args...), "body.json"), io.Discard, io.Discard)
		if err == nil || !strings.Contains(err.Error(), "--presign") {
			t.Errorf("%v: error %v, want one about --presign", args, err)
		}
	}
}

// TestTokensFor: with presign, rate×duration tokens plus a second's worth
// are signed before the run, each to live for the run and a minute, and
// handed out in order before any is signed on demand (for a minute).
func TestTokensFor(t *testing.T) {
	var mu sync.Mutex // tokensFor signs on every core
	var lifetimes []time.Duration
	sign := func(lifetime time.Duration) (string, error) {
		mu.Lock()
		defer mu.Unlock()
		lifetimes = append(lifetimes, lifetime)
		return fmt.Sprintf("t%d", len(lifetimes)), nil
	}
	next, err := tokensFor(sign, true, 5, 2*time.Second)
	if err != nil {
		t.Fatal(err)
	}
	if len(lifetimes) != 15 {
		t.Fatalf("%d tokens signed before the run, want 15", len(lifetimes))
	}
	for _, l := range lifetimes {
		if l != 2*time.Second+time.Minute {
			t.Errorf("pre-signed lifetime %s, want 1m2s", l)
		}
	}
	seen := map[string]bool{}
	for range 15 {
		tok, _ := next()
		if seen[tok] {
			t.Errorf("token %s handed out twice", tok)
		}
		seen[tok] = true
	}
	if len(lifetimes) != 15 {
		t.Errorf("%d tokens signed after handing out the pre-signed ones, want none", len(lifetimes)-15)
	}
	if tok, _ := next(); seen[tok] || len(lifetimes) != 16 || lifetimes[15] != time.Minute {
		t.Errorf("the 16th call got %s; want a fresh token signed on demand for a minute", tok)
	}
}

// localIssuer makes a test issuer with halite keys and a config trusting
// it (http on loopback, audience base http://127.0.0.1), returning the key
// directory and the config path.
func localIssuer(t *testing.T) (dir, cfgPath string) {
	t.Helper()
	dir = t.TempDir()
	if err := run(context.Background(), []string{"keys", "--out", dir}, io.Discard, io.Discard); err != nil {
		t.Fatal(err)
	}
	cfg := "public_base_url: http://127.0.0.1\ndevelopment_mode: true\nissuers:\n  - iss: https://ehr.example.org\n    jwks_file: " +
		filepath.Join(dir, "issuer-jwks.json") + "\n"
	cfgPath = filepath.Join(dir, "halite.yaml")
	if err := os.WriteFile(cfgPath, []byte(cfg), 0o600); err != nil {
		t.Fatal(err)
	}
	return dir, cfgPath
}

// TestAllowedServer: a FHIR server is used only at or below an entry of
// the caller's own issuer, and a URL that could mean something else to
// the server (RFC 3986 §3.2.1 user info, §3.3 path parameters, §5.2.4
// dot segments, percent-encoded path bytes) is refused.
func TestAllowedServer(t *testing.T) {
	cfg := Config{Auth: defaultAuthConfig()}
	cfg.Issuers = []IssuerConfig{
		{Issuer: "https://ehr.example.org", FHIRServers: []FHIRServerCf{{BaseURL: "https://fhir.example.org/r4/"}}},
		{Issuer: "https://other.example.org", FHIRServers: []FHIRServerCf{{BaseURL: "https://fhir.other.example/"}}},
	}
	caller := hooks.Caller{Issuer: "https://ehr.example.org"}
	for server, want := range map[string]bool{
		"https://fhir.example.org/r4":                   true,
		"https://fhir.example.org/r4/":                  true,
		"https://FHIR.example.org/r4/tenant-a":          true,
		"https://fhir.example.org/r4x":                  false, // not below /r4
		"http://fhir.example.org/r4":                    false, // scheme
		"https://fhir.example.org:8443/r4":              false, // port
		"https://fhir.other.example":                    false, // another issuer's server
		"https://fhir.example.org@evil.example/r4":      false, // user info
		"https://user:pw@fhir.example.org/r4":           false,
		"https://fhir.example.org/r4/../admin":          false,
		"https://fhir.example.org/r4/./x":               false,
		"https://fhir.example.org/r4/%2e%2e/admin":      false,
		"https://fhir.example.org/r4%2Fadmin":           false, // escaped slash
		"https://fhir.example.org/r4;jsessionid=1":      false,
		"https://fhir.example.org/r4?x=1":               false,
		"https://fhir.example.org/r4?":                  false,
		"https://fhir.example.org/r4#f":                 false,
		"https:fhir.example.org/r4":                     false, // opaque
		"https://fhir.example.org/r4/Patient/%41":       false, // needless escape
		"https://fhir.example.org/r4/..hidden-but-fine": true,
	} {
		if _, got := allowedServer(cfg, caller, server); got != want {
			t.Errorf("%s: allowed %v, want %v", server, got, want)
		}
	}
}

// postJSON posts body as application/json to url, with an Authorization
// header when authz is not empty, and returns the status and the body.
func postJSON(t *testing.T, url, authz string, body []byte) (int, string) {
	t.Helper()
	r, err := http.NewRequest(http.MethodPost, url, bytes.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	r.Header.Set("Content-Type", "application/json")
	if authz != "" {
		r.Header.Set("Authorization", authz)
	}
	resp, err := http.DefaultClient.Do(r)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}
