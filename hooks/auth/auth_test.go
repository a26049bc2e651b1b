package auth

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/rsa"
	"crypto/x509"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"net/http/httptest"
	"sync/atomic"
	"testing"
	"time"

	"github.com/go-jose/go-jose/v4"
	"github.com/golang-jwt/jwt/v5"
)

const (
	testIss = "https://ehr.example.org"
	testAud = "https://halite.example.org/cds-services/sodium-infusion-check"
)

var testNow = time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)

type testKeys struct {
	ec, other *ecdsa.PrivateKey
	rsa       *rsa.PrivateKey
}

func newTestKeys(t testing.TB) testKeys {
	t.Helper()
	ec, err := ecdsa.GenerateKey(elliptic.P384(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	other, err := ecdsa.GenerateKey(elliptic.P384(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	rk, err := rsa.GenerateKey(rand.Reader, 2048)
	if err != nil {
		t.Fatal(err)
	}
	return testKeys{ec: ec, other: other, rsa: rk}
}

func jwks(t testing.TB, keys map[string]any) []byte {
	t.Helper()
	var set jose.JSONWebKeySet
	for kid, k := range keys {
		set.Keys = append(set.Keys, jose.JSONWebKey{Key: k, KeyID: kid, Use: "sig"})
	}
	b, err := json.Marshal(set)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// sign makes a token; edit changes header or claims before signing.
func sign(t testing.TB, method jwt.SigningMethod, key any, header map[string]any, claims jwt.MapClaims) string {
	t.Helper()
	tok := jwt.NewWithClaims(method, claims)
	for k, v := range header {
		if v == nil {
			delete(tok.Header, k)
		} else {
			tok.Header[k] = v
		}
	}
	s, err := tok.SignedString(key)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func goodClaims() jwt.MapClaims {
	return jwt.MapClaims{"iss": testIss, "sub": "ehr-client", "aud": testAud, "iat": testNow.Unix(),
		"exp": testNow.Add(5 * time.Minute).Unix(), "jti": "jti-1", "tenant": "north"}
}

func with(c jwt.MapClaims, k string, v any) jwt.MapClaims {
	out := jwt.MapClaims{}
	for a, b := range c {
		out[a] = b
	}
	if v == nil {
		delete(out, k)
	} else {
		out[k] = v
	}
	return out
}

// TestAttacks is the attack list: each case must be refused, with the
// reason named, and an off-allowlist jku must never be contacted.
func TestAttacks(t *testing.T) {
	k := newTestKeys(t)
	var offListHits atomic.Int64
	offList := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		offListHits.Add(1)
		w.Write(jwks(t, map[string]any{"k1": &k.other.PublicKey}))
	}))
	defer offList.Close()
	v := newTestVerifier(t, k, nil)
	hdr := map[string]any{"kid": "k1", "typ": "JWT"}
	es := func(h map[string]any, c jwt.MapClaims) string {
		return "Bearer " + sign(t, jwt.SigningMethodES384, k.ec, h, c)
	}
	pubDER, _ := x509.MarshalPKIXPublicKey(&k.ec.PublicKey)
	for _, tc := range []struct {
		name, header, aud, reason string
	}{
		{"no header", "", testAud, "no-bearer-token"},
		{"not a bearer token", "Basic dXNlcjpwYXNz", testAud, "no-bearer-token"},
		{"malformed token", "Bearer not.a.jwt", testAud, "malformed"},
		{"alg none", "Bearer " + sign(t, jwt.SigningMethodNone, jwt.UnsafeAllowNoneSignatureType, hdr, goodClaims()), testAud, "algorithm"},
		{"HS384 signed with the public key bytes", "Bearer " + sign(t, jwt.SigningMethodHS384, pubDER, hdr, goodClaims()), testAud, "algorithm"},
		{"RS256 when only ES384/RS384 are allowed", "Bearer " + sign(t, jwt.SigningMethodRS256, k.rsa, map[string]any{"kid": "r1", "typ": "JWT"}, goodClaims()), testAud, "algorithm"},
		{"wrong aud", es(hdr, with(goodClaims(), "aud", "https://elsewhere.example.org/")), testAud, "audience"},
		{"aud of another service", es(hdr, with(goodClaims(), "aud", "https://halite.example.org/cds-services/sodium-drug-risk")), testAud, "audience"},
		{"aud with an extra value", es(hdr, with(goodClaims(), "aud", []string{testAud, "https://other.example.org"})), testAud, "audience"},
		{"expired", es(hdr, with(with(goodClaims(), "exp", testNow.Add(-time.Minute).Unix()), "iat", testNow.Add(-4*time.Minute).Unix())), testAud, "expired"},
		{"iat in the future", es(hdr, with(with(goodClaims(), "iat", testNow.Add(2*time.Minute).Unix()), "exp", testNow.Add(6*time.Minute).Unix())), testAud, "issued-in-future"},
		{"lifetime too long", es(hdr, with(goodClaims(), "exp", testNow.Add(2*time.Hour).Unix())), testAud, "lifetime"},
		{"no exp", es(hdr, with(goodClaims(), "exp", nil)), testAud, "invalid"},
		{"no iat", es(hdr, with(goodClaims(), "iat", nil)), testAud, "no-iat"},
		{"no jti", es(hdr, with(goodClaims(), "jti", nil)), testAud, "no-jti"},
		{"unknown iss", es(hdr, with(goodClaims(), "iss", "https://evil.example.org")), testAud, "untrusted-issuer"},
		{"unknown kid", es(map[string]any{"kid": "nope", "typ": "JWT"}, goodClaims()), testAud, "unknown-kid"},
		{"no kid", es(map[string]any{"kid": nil, "typ": "JWT"}, goodClaims()), testAud, "no-kid"},
		{"typ not JWT", es(map[string]any{"kid": "k1", "typ": "at+jwt"}, goodClaims()), testAud, "typ"},
		{"jku off the allowlist", es(map[string]any{"kid": "k1", "typ": "JWT", "jku": offList.URL}, goodClaims()), testAud, "jku-not-allowed"},
		{"signed by another key with the same kid", "Bearer " + sign(t, jwt.SigningMethodES384, k.other, hdr, goodClaims()), testAud, "signature"},
		{"wrong tenant", es(hdr, with(goodClaims(), "tenant", "south")), testAud, "tenant"},
		{"no tenant when the issuer has tenants", es(hdr, with(goodClaims(), "tenant", nil)), testAud, "tenant"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := v.Verify(context.Background(), tc.header, tc.aud)
			var f *Failure
			if !errors.As(err, &f) || f.Reason != tc.reason {
				t.Errorf("got %v, want refusal %q", err, tc.reason)
			}
		})
	}
	if offListHits.Load() != 0 {
		t.Errorf("the off-allowlist jku was contacted %d times", offListHits.Load())
	}
	// Replay: the first use passes, the second is refused.
	tok := es(hdr, with(goodClaims(), "jti", "once"))
	if _, err := v.Verify(context.Background(), tok, testAud); err != nil {
		t.Fatalf("first use refused: %v", err)
	}
	var f *Failure
	if _, err := v.Verify(context.Background(), tok, testAud); !errors.As(err, &f) || f.Reason != "replayed" {
		t.Errorf("replayed jti: %v", err)
	}
}

func newTestVerifier(t testing.TB, k testKeys, ks *KeySource) *Verifier {
	t.Helper()
	if ks == nil {
		ks = NewKeySource(KeySourceConfig{Client: http.DefaultClient, MaxBytes: 1 << 16, Refresh: time.Hour, MinRefresh: time.Minute,
			Now: func() time.Time { return testNow }})
	}
	v, err := NewVerifier(Config{
		Issuers: []Issuer{{ID: testIss, JWKS: jwks(t, map[string]any{"k1": &k.ec.PublicKey, "r1": &k.rsa.PublicKey}),
			Tenants: []string{"north"}}},
		Skew: 30 * time.Second, MaxLifetime: 10 * time.Minute, Keys: ks,
		Replay: NewMemoryReplay(1000, func() time.Time { return testNow }), Now: func() time.Time { return testNow },
	})
	if err != nil {
		t.Fatal(err)
	}
	return v
}

func TestValidTokens(t *testing.T) {
	k := newTestKeys(t)
	v := newTestVerifier(t, k, nil)
	es := "Bearer " + sign(t, jwt.SigningMethodES384, k.ec, map[string]any{"kid": "k1", "typ": "JWT"}, goodClaims())
	c, err := v.Verify(context.Background(), es, testAud)
	if err != nil || c.Issuer != testIss || c.Tenant != "north" || c.JTI != "jti-1" {
		t.Fatalf("ES384: %+v %v", c, err)
	}
	rs := "Bearer " + sign(t, jwt.SigningMethodRS384, k.rsa, map[string]any{"kid": "r1", "typ": "JWT"}, with(goodClaims(), "jti", "jti-2"))
	if _, err := v.Verify(context.Background(), rs, testAud); err != nil {
		t.Fatalf("RS384: %v", err)
	}
}

// TestJWKSURL: keys from a JWKS URL and an allowlisted jku are fetched once,
// cached, and fetched again on an unknown kid only after MinRefresh.
func TestJWKSURL(t *testing.T) {
	k := newTestKeys(t)
	var hits atomic.Int64
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		hits.Add(1)
		w.Write(jwks(t, map[string]any{"k1": &k.ec.PublicKey}))
	}))
	defer srv.Close()
	now := testNow
	ks := NewKeySource(KeySourceConfig{Client: srv.Client(), MaxBytes: 1 << 16, Refresh: time.Hour, MinRefresh: time.Minute,
		Now: func() time.Time { return now }})
	v, err := NewVerifier(Config{Issuers: []Issuer{{ID: testIss, JWKSURL: srv.URL, JKUAllowed: []string{srv.URL + "/alt"}}},
		Skew: time.Second, MaxLifetime: 10 * time.Minute, Keys: ks, Replay: NewMemoryReplay(100, func() time.Time { return testNow }),
		Now: func() time.Time { return testNow }})
	if err != nil {
		t.Fatal(err)
	}
	claims := with(goodClaims(), "tenant", nil)
	for i, kid := range []string{"k1", "k1", "unknown", "unknown"} {
		tok := "Bearer " + sign(t, jwt.SigningMethodES384, k.ec, map[string]any{"kid": kid, "typ": "JWT"}, with(claims, "jti", string(rune('a'+i))))
		v.Verify(context.Background(), tok, testAud)
	}
	if hits.Load() != 1 {
		t.Errorf("JWKS fetched %d times; want once (cached; unknown kid within MinRefresh not refetched)", hits.Load())
	}
	now = now.Add(2 * time.Minute)
	tok := "Bearer " + sign(t, jwt.SigningMethodES384, k.ec, map[string]any{"kid": "unknown", "typ": "JWT"}, with(claims, "jti", "z"))
	v.Verify(context.Background(), tok, testAud)
	if hits.Load() != 2 {
		t.Errorf("after MinRefresh an unknown kid refetches: %d fetches", hits.Load())
	}
	jku := "Bearer " + sign(t, jwt.SigningMethodES384, k.ec, map[string]any{"kid": "k1", "typ": "JWT", "jku": srv.URL + "/alt"}, with(claims, "jti", "j"))
	if _, err := v.Verify(context.Background(), jku, testAud); err != nil || hits.Load() != 3 {
		t.Errorf("allowlisted jku: %v, %d fetches", err, hits.Load())
	}
}

func TestNewVerifierRefusesBadConfig(t *testing.T) {
	k := newTestKeys(t)
	ks := NewKeySource(KeySourceConfig{Client: http.DefaultClient, MaxBytes: 1 << 16, Refresh: time.Hour})
	base := Config{Skew: time.Second, MaxLifetime: time.Minute, Keys: ks, Replay: NewMemoryReplay(10, nil)}
	for name, cfg := range map[string]func(Config) Config{
		"HMAC algorithm":      func(c Config) Config { c.Algorithms = []string{"HS384"}; return c },
		"none algorithm":      func(c Config) Config { c.Algorithms = []string{"none"}; return c },
		"issuer without keys": func(c Config) Config { c.Issuers = []Issuer{{ID: testIss}}; return c },
		"issuer with both": func(c Config) Config {
			c.Issuers = []Issuer{{ID: testIss, JWKSURL: "https://x", JWKS: jwks(t, map[string]any{"k": &k.ec.PublicKey})}}
			return c
		},
		"private key inline": func(c Config) Config {
			c.Issuers = []Issuer{{ID: testIss, JWKS: jwks(t, map[string]any{"k": k.ec})}}
			return c
		},
	} {
		if _, err := NewVerifier(cfg(base)); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
}

// BenchmarkVerifyES384 measures one verification with cached keys (after
// 2,000 distinct tokens they repeat and are refused as replays, after the
// same signature check).
func BenchmarkVerifyES384(b *testing.B) {
	k := newTestKeys(b)
	v := newTestVerifier(b, k, nil)
	toks := make([]string, 0, 1<<16)
	for i := 0; i < cap(toks); i++ {
		toks = append(toks, "Bearer "+sign(b, jwt.SigningMethodES384, k.ec, map[string]any{"kid": "k1", "typ": "JWT"}, with(goodClaims(), "jti", fmt.Sprint(i))))
		if i > 2000 {
			break
		}
	}
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		v.Verify(context.Background(), toks[i%len(toks)], testAud)
		i++
	}
}

// TestJWKSFailures: a failing JWKS URL is fetched at most once per
// MinRefresh; while refetching fails the last good set is used for
// StaleGrace past Refresh, then refused; a fetch shared by waiting
// callers is not ended by the first caller giving up.
func TestJWKSFailures(t *testing.T) {
	k := newTestKeys(t)
	var hits atomic.Int64
	var down atomic.Bool
	release := make(chan struct{})
	var slow atomic.Bool
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		hits.Add(1)
		if slow.Load() {
			<-release
		}
		if down.Load() {
			http.Error(w, "down", http.StatusServiceUnavailable)
			return
		}
		w.Write(jwks(t, map[string]any{"k1": &k.ec.PublicKey}))
	}))
	defer srv.Close()
	now := testNow
	ks := NewKeySource(KeySourceConfig{Client: srv.Client(), MaxBytes: 1 << 16, Refresh: time.Hour, MinRefresh: time.Minute,
		StaleGrace: 2 * time.Hour, Now: func() time.Time { return now }})
	key := func(ctx context.Context) error { _, err := ks.Key(ctx, testIss, srv.URL, "k1"); return err }
	ctx := context.Background()

	down.Store(true)
	for i := 0; i < 5; i++ {
		if err := key(ctx); err == nil {
			t.Fatal("a key was returned from a failing JWKS URL")
		}
	}
	if hits.Load() != 1 {
		t.Errorf("failing URL fetched %d times within MinRefresh; want 1", hits.Load())
	}
	now = now.Add(2 * time.Minute)
	down.Store(false)
	if err := key(ctx); err != nil || hits.Load() != 2 {
		t.Fatalf("after MinRefresh the URL is tried again: %v, %d fetches", err, hits.Load())
	}

	down.Store(true)
	now = now.Add(90 * time.Minute) // stale; refetch fails; within grace
	if err := key(ctx); err != nil || hits.Load() != 3 {
		t.Errorf("stale set within grace while the URL fails: %v, %d fetches", err, hits.Load())
	}
	now = now.Add(30 * time.Second)
	if err := key(ctx); err != nil || hits.Load() != 3 {
		t.Errorf("within MinRefresh of the failed refetch: %v, %d fetches; want the stale set and no fetch", err, hits.Load())
	}
	now = now.Add(2 * time.Hour) // past Refresh + StaleGrace
	if err := key(ctx); err == nil {
		t.Error("a set past Refresh+StaleGrace was used while the URL fails")
	}

	// Shared fetch: the first caller's context ends; the second still gets the key.
	down.Store(false)
	slow.Store(true)
	now = now.Add(time.Hour)
	first, cancel := context.WithCancel(ctx)
	errs := make(chan error, 2)
	go func() { errs <- key(first) }()
	for hits.Load() < 5 {
		time.Sleep(time.Millisecond)
	}
	go func() { errs <- key(ctx) }()
	time.Sleep(20 * time.Millisecond)
	cancel()
	time.Sleep(20 * time.Millisecond)
	close(release)
	e1, e2 := <-errs, <-errs
	if e1 != nil || e2 != nil {
		t.Errorf("shared fetch after the first caller gave up: %v, %v; want both keys", e1, e2)
	}
}

// TestMemoryReplay: a live jti is a replay; once its token expires it is
// forgotten, which frees room; a full cache of live entries refuses new
// tokens rather than forget one.
func TestMemoryReplay(t *testing.T) {
	now := testNow
	m := NewMemoryReplay(2, func() time.Time { return now })
	ctx := context.Background()
	steps := []struct {
		advance  time.Duration
		jti      string
		life     time.Duration
		seen     bool
		refusing bool
	}{
		{0, "a", time.Minute, false, false},
		{0, "a", time.Minute, true, false},
		{0, "b", 2 * time.Minute, false, false},
		{0, "c", time.Minute, false, true},                 // full: a and b are live
		{61 * time.Second, "c", time.Minute, false, false}, // a expired and was dropped
		{0, "a", time.Minute, false, true},                 // b and c live again: full
		{0, "b", time.Minute, true, false},
		{2 * time.Minute, "b", time.Minute, false, false}, // everything expired
	}
	for i, s := range steps {
		now = now.Add(s.advance)
		seen, err := m.Remember(ctx, testIss, s.jti, now.Add(s.life))
		if seen != s.seen || (err != nil) != s.refusing {
			t.Errorf("step %d (%s): seen %v err %v; want seen %v refusing %v", i, s.jti, seen, err, s.seen, s.refusing)
		}
	}
}
