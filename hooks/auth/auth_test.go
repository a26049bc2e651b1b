package auth

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/rsa"
	"crypto/x509"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"os"
	"regexp"
	"slices"
	"strings"
	"sync"
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

// rawHeader is a valid JOSE header as literal JSON, for signRaw.
const rawHeader = `{"alg":"ES384","typ":"JWT","kid":"k1"}`

// rawClaims is goodClaims as literal JSON, with members first put before
// them (each ending in a comma), for signRaw.
func rawClaims(first string) string {
	return fmt.Sprintf(`{%s"iss":%q,"sub":"ehr-client","aud":%q,"iat":%d,"exp":%d,"jti":"jti-1","tenant":"north"}`,
		first, testIss, testAud, testNow.Unix(), testNow.Add(5*time.Minute).Unix())
}

// signRaw makes an ES384 Authorization header from literal header and
// claims JSON, which may say what encoding/json never writes (a member
// twice).
func signRaw(t testing.TB, key *ecdsa.PrivateKey, header, claims string) string {
	t.Helper()
	enc := base64.RawURLEncoding
	signed := enc.EncodeToString([]byte(header)) + "." + enc.EncodeToString([]byte(claims))
	sig, err := jwt.SigningMethodES384.Sign(signed, key)
	if err != nil {
		t.Fatal(err)
	}
	return "Bearer " + signed + "." + enc.EncodeToString(sig)
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
		{"crit naming an extension", es(map[string]any{"kid": "k1", "typ": "JWT", "crit": []string{"exp"}}, goodClaims()), testAud, "crit"},
		{"crit naming b64", es(map[string]any{"kid": "k1", "typ": "JWT", "crit": []string{"b64"}, "b64": true}, goodClaims()), testAud, "crit"},
		{"crit empty", es(map[string]any{"kid": "k1", "typ": "JWT", "crit": []string{}}, goodClaims()), testAud, "crit"},
		{"crit a string", es(map[string]any{"kid": "k1", "typ": "JWT", "crit": "exp"}, goodClaims()), testAud, "crit"},
		{"crit with a number", es(map[string]any{"kid": "k1", "typ": "JWT", "crit": []any{1}}, goodClaims()), testAud, "crit"},
		{"crit null", es(map[string]any{"kid": "k1", "typ": "JWT", "crit": json.RawMessage("null")}, goodClaims()), testAud, "crit"},
		{"header repeats kid", signRaw(t, k.ec, `{"alg":"ES384","typ":"JWT","kid":"nope","kid":"k1"}`, rawClaims("")), testAud, "duplicate-member"},
		{"header repeats alg", signRaw(t, k.ec, `{"alg":"none","typ":"JWT","alg":"ES384","kid":"k1"}`, rawClaims("")), testAud, "duplicate-member"},
		{"claims repeat aud", signRaw(t, k.ec, rawHeader, rawClaims(`"aud":"https://elsewhere.example.org",`)), testAud, "duplicate-member"},
		{"claims repeat aud through an escape", signRaw(t, k.ec, rawHeader, rawClaims(`"\u0061ud":"https://elsewhere.example.org",`)), testAud, "duplicate-member"},
		{"claims repeat jti with the same value", signRaw(t, k.ec, rawHeader, rawClaims(`"jti":"jti-1",`)), testAud, "duplicate-member"},
		{"scheme only starting with Bearer", "Bearerx " + sign(t, jwt.SigningMethodES384, k.ec, hdr, goodClaims()), testAud, "no-bearer-token"},
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
	firstErr, secondErr := make(chan error, 1), make(chan error, 1)
	go func() { firstErr <- key(first) }()
	for hits.Load() < 5 {
		time.Sleep(time.Millisecond)
	}
	go func() { secondErr <- key(ctx) }()
	time.Sleep(20 * time.Millisecond)
	cancel()
	// The first caller stops waiting at once, though the fetch goes on.
	select {
	case err := <-firstErr:
		if !errors.Is(err, context.Canceled) {
			t.Errorf("first caller after its context ended: %v; want context.Canceled", err)
		}
	case <-time.After(10 * time.Second): // a hang guard, not a timing assertion
		t.Error("first caller still waiting on the shared fetch after its context ended")
	}
	close(release)
	if err := <-secondErr; err != nil {
		t.Errorf("second caller of the shared fetch after the first gave up: %v; want the key", err)
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

// TestRFCTolerance: what the RFCs allow is accepted: the auth scheme in
// any case (RFC 7235 §2.1), typ in any case (RFC 7515 §4.1.9), and nested
// values that reuse top-level member names (only top-level names must be
// distinct).
func TestRFCTolerance(t *testing.T) {
	k := newTestKeys(t)
	v := newTestVerifier(t, k, nil)
	hdr := map[string]any{"kid": "k1", "typ": "JWT"}
	tok := func(h map[string]any, jti string) string {
		return sign(t, jwt.SigningMethodES384, k.ec, h, with(goodClaims(), "jti", jti))
	}
	for _, tc := range []struct{ name, header string }{
		{"scheme lower case", "bearer " + tok(hdr, "a")},
		{"scheme upper case", "BEARER " + tok(hdr, "b")},
		{"scheme mixed case", "bEaReR " + tok(hdr, "c")},
		{"typ lower case", "Bearer " + tok(map[string]any{"kid": "k1", "typ": "jwt"}, "d")},
		{"typ mixed case", "Bearer " + tok(map[string]any{"kid": "k1", "typ": "Jwt"}, "e")},
		{"nested claims reusing top-level names", signRaw(t, k.ec, rawHeader,
			strings.Replace(rawClaims(`"cnf":{"jti":"x","aud":{"aud":1}},"list":[{"iss":1},{"iss":2}],"s":"\"jti\":",`), "jti-1", "f", 1))},
		{"nested header value reusing kid", signRaw(t, k.ec, `{"alg":"ES384","x":{"kid":"a","typ":[]},"typ":"JWT","kid":"k1"}`,
			strings.Replace(rawClaims(""), "jti-1", "g", 1))},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if _, err := v.Verify(context.Background(), tc.header, testAud); err != nil {
				t.Errorf("refused: %v", err)
			}
		})
	}
}

// failingReplay is a replay cache whose store is down.
type failingReplay struct{ err error }

func (f failingReplay) Remember(context.Context, string, string, time.Time) (bool, error) {
	return false, f.err
}

// TestReplayUnavailable: a replay cache that cannot answer is not a refused
// token: the error is ErrReplayUnavailable wrapping the cause, never a
// *Failure (which callers answer 401).
func TestReplayUnavailable(t *testing.T) {
	k := newTestKeys(t)
	storeDown := errors.New("store down")
	for _, tc := range []struct {
		name   string
		replay ReplayCache
		cause  string
		wraps  error // the cause itself, when it is a value the test holds
	}{
		{"store error", failingReplay{storeDown}, storeDown.Error(), storeDown},
		{"memory cache full", NewMemoryReplay(0, func() time.Time { return testNow }), "replay cache full", nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ks := NewKeySource(KeySourceConfig{MaxBytes: 1 << 16, Refresh: time.Hour})
			v, err := NewVerifier(Config{Issuers: []Issuer{{ID: testIss, JWKS: jwks(t, map[string]any{"k1": &k.ec.PublicKey})}},
				MaxLifetime: 10 * time.Minute, Keys: ks, Replay: tc.replay, Now: func() time.Time { return testNow }})
			if err != nil {
				t.Fatal(err)
			}
			tok := "Bearer " + sign(t, jwt.SigningMethodES384, k.ec, map[string]any{"kid": "k1", "typ": "JWT"}, goodClaims())
			_, err = v.Verify(context.Background(), tok, testAud)
			var f *Failure
			if !errors.Is(err, ErrReplayUnavailable) || errors.As(err, &f) || !strings.Contains(fmt.Sprint(err), tc.cause) {
				t.Errorf("got %v; want ErrReplayUnavailable wrapping %q, not a Failure", err, tc.cause)
			}
			if tc.wraps != nil && !errors.Is(err, tc.wraps) {
				t.Errorf("%v does not wrap %v", err, tc.wraps)
			}
		})
	}
}

// lockedBuffer is a log sink a test may read while a fetch writes to it.
type lockedBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// TestJWKSRedirectNotFollowed: a key URL that redirects to another
// server's key set does not make tokens signed by that set verify, even
// with a caller's client that follows redirects; the failed fetch is
// logged once per attempt, and once the URL serves its own set again the
// genuine key works and the forged token stays refused.
func TestJWKSRedirectNotFollowed(t *testing.T) {
	k := newTestKeys(t)
	var attackerHits atomic.Int64
	attacker := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		attackerHits.Add(1)
		w.Write(jwks(t, map[string]any{"k1": &k.other.PublicKey}))
	}))
	defer attacker.Close()
	hdr := map[string]any{"kid": "k1", "typ": "JWT"}
	claims := with(goodClaims(), "tenant", nil)
	for _, code := range []int{http.StatusMovedPermanently, http.StatusFound, http.StatusSeeOther,
		http.StatusTemporaryRedirect, http.StatusPermanentRedirect} {
		t.Run(fmt.Sprint(code), func(t *testing.T) {
			var redirecting atomic.Bool
			redirecting.Store(true)
			var hits atomic.Int64
			keys := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
				hits.Add(1)
				if redirecting.Load() {
					http.Redirect(w, r, attacker.URL+"/jwks", code)
					return
				}
				w.Write(jwks(t, map[string]any{"k1": &k.ec.PublicKey}))
			}))
			defer keys.Close()
			var logs lockedBuffer
			now := testNow
			ks := NewKeySource(KeySourceConfig{Client: http.DefaultClient, MaxBytes: 1 << 16, Refresh: time.Hour,
				MinRefresh: time.Minute, Now: func() time.Time { return now }, Log: slog.New(slog.NewTextHandler(&logs, nil))})
			v, err := NewVerifier(Config{Issuers: []Issuer{{ID: testIss, JWKSURL: keys.URL}}, MaxLifetime: 10 * time.Minute,
				Keys: ks, Replay: NewMemoryReplay(100, func() time.Time { return testNow }), Now: func() time.Time { return testNow }})
			if err != nil {
				t.Fatal(err)
			}
			forged := sign(t, jwt.SigningMethodES384, k.other, hdr, with(claims, "jti", "forged"))
			for i := 0; i < 2; i++ { // the second within MinRefresh: no new attempt
				var f *Failure
				if _, err := v.Verify(context.Background(), "Bearer "+forged, testAud); !errors.As(err, &f) || f.Reason != "unknown-kid" {
					t.Fatalf("token signed by the redirect target's key: %v; want refusal unknown-kid", err)
				}
			}
			if attackerHits.Load() != 0 || hits.Load() != 1 {
				t.Errorf("redirect target fetched %d times, key URL %d; want 0 and 1", attackerHits.Load(), hits.Load())
			}
			logged := logs.String()
			if strings.Count(logged, "level=WARN") != 1 || !strings.Contains(logged, keys.URL) ||
				!strings.Contains(logged, fmt.Sprintf("redirected (status %d); redirects are not followed", code)) {
				t.Errorf("log %q; want one WARN naming the URL and the redirect", logged)
			}
			if strings.Contains(logged, forged) {
				t.Error("the token was logged")
			}

			redirecting.Store(false)
			now = now.Add(2 * time.Minute)
			genuine := "Bearer " + sign(t, jwt.SigningMethodES384, k.ec, hdr, with(claims, "jti", "genuine"))
			if _, err := v.Verify(context.Background(), genuine, testAud); err != nil {
				t.Fatalf("genuine token after the URL recovered: %v", err)
			}
			var f *Failure
			if _, err := v.Verify(context.Background(), "Bearer "+forged, testAud); !errors.As(err, &f) || f.Reason != "signature" {
				t.Errorf("forged token after the URL recovered: %v; want refusal signature", err)
			}
			if attackerHits.Load() != 0 {
				t.Errorf("redirect target fetched %d times", attackerHits.Load())
			}
		})
	}
}

// TestKeyGivesUpAtDeadline: a caller waiting on a JWKS fetch that hangs
// returns when its own context ends, with an error wrapping ctx.Err();
// Verify reports that as ErrKeysUnavailable, not a refused token. The
// shared fetch goes on and its result serves later callers.
func TestKeyGivesUpAtDeadline(t *testing.T) {
	k := newTestKeys(t)
	var hits atomic.Int64
	release := make(chan struct{})
	var releaseOnce sync.Once
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		hits.Add(1)
		<-release
		w.Write(jwks(t, map[string]any{"k1": &k.ec.PublicKey}))
	}))
	t.Cleanup(srv.Close)
	t.Cleanup(func() { releaseOnce.Do(func() { close(release) }) }) // before srv.Close, which waits for handlers
	ks := NewKeySource(KeySourceConfig{Client: srv.Client(), MaxBytes: 1 << 16, Refresh: time.Hour, MinRefresh: time.Minute,
		Now: func() time.Time { return testNow }})
	v, err := NewVerifier(Config{Issuers: []Issuer{{ID: testIss, JWKSURL: srv.URL}}, MaxLifetime: 10 * time.Minute,
		Keys: ks, Replay: NewMemoryReplay(100, func() time.Time { return testNow }), Now: func() time.Time { return testNow }})
	if err != nil {
		t.Fatal(err)
	}
	tok := "Bearer " + sign(t, jwt.SigningMethodES384, k.ec, map[string]any{"kid": "k1", "typ": "JWT"}, with(goodClaims(), "tenant", nil))
	for _, tc := range []struct {
		name  string
		call  func(context.Context) error
		other error // besides context.DeadlineExceeded, the error wraps this
	}{
		{"Key", func(ctx context.Context) error { _, err := ks.Key(ctx, testIss, srv.URL, "k1"); return err }, nil},
		{"Verify", func(ctx context.Context) error { _, err := v.Verify(ctx, tok, testAud); return err }, ErrKeysUnavailable},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ctx, cancel := context.WithTimeout(context.Background(), 50*time.Millisecond)
			defer cancel()
			done := make(chan error, 1)
			go func() { done <- tc.call(ctx) }()
			var err error
			select {
			case err = <-done:
			case <-time.After(10 * time.Second): // a hang guard, not a timing assertion
				t.Fatal("still waiting on the fetch after its context ended")
			}
			var f *Failure
			if !errors.Is(err, context.DeadlineExceeded) || errors.As(err, &f) || (tc.other != nil && !errors.Is(err, tc.other)) {
				t.Errorf("got %v; want an error wrapping context.DeadlineExceeded and %v, not a Failure", err, tc.other)
			}
		})
	}
	releaseOnce.Do(func() { close(release) })
	if _, err := v.Verify(context.Background(), tok, testAud); err != nil || hits.Load() != 1 {
		t.Errorf("after the shared fetch ended: %v, %d fetches; want the token verified from that one fetch", err, hits.Load())
	}
}

// TestReasonsListsEveryRefusal: Reasons names exactly the reasons the
// verifier's source refuses with, so every auth-failure series starts at
// zero and none is listed that cannot happen.
func TestReasonsListsEveryRefusal(t *testing.T) {
	src, err := os.ReadFile("auth.go")
	if err != nil {
		t.Fatal(err)
	}
	var inSource []string
	for _, m := range regexp.MustCompile(`fail\("([a-z-]+)"\)`).FindAllStringSubmatch(string(src), -1) {
		inSource = append(inSource, m[1])
	}
	slices.Sort(inSource)
	inSource = slices.Compact(inSource)
	listed := slices.Sorted(slices.Values(Reasons()))
	if len(inSource) < 15 || !slices.Equal(inSource, listed) {
		t.Errorf("refusals in auth.go %v\nReasons() %v", inSource, listed)
	}
}
