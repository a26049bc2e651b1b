// Package auth verifies the JWT an EHR sends with each CDS Hooks call
// (CDS Hooks 2.0, "Trusting CDS Clients"): only issuers it was told to
// trust, only their keys, only the algorithms allowed, the audience the
// call was made to, a bounded lifetime, and a jti seen only once.
package auth

import (
	"bytes"
	"context"
	"crypto"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"strings"
	"time"

	"github.com/golang-jwt/jwt/v5"
)

// Issuer is one trusted EHR: its iss, where its keys are, and what it
// may claim.
type Issuer struct {
	ID string // the iss claim
	// JWKS is an inline key set; JWKSURL a URL to fetch one from. One of
	// them is needed.
	JWKS    json.RawMessage
	JWKSURL string
	// JKUAllowed lists the jku header values honoured for this issuer; a
	// jku not on it is refused and never contacted.
	JKUAllowed []string
	// Tenants, when set, lists the tenant claims accepted.
	Tenants []string
}

// Config is how a Verifier is built.
type Config struct {
	Issuers []Issuer
	// Algorithms allowed in the header; ES384 and RS384 by default. HMAC
	// and none are never accepted.
	Algorithms  []string
	Skew        time.Duration // clock skew allowed on exp and iat
	MaxLifetime time.Duration // exp − iat at most this
	Keys        *KeySource
	Replay      ReplayCache
	Now         func() time.Time
}

// ReplayCache remembers jti values until their token expires. Remember
// reports whether jti of issuer iss was already seen, recording it if
// not, atomically. One node keeps it in memory; replicas share one through
// the store.
type ReplayCache interface {
	Remember(ctx context.Context, iss, jti string, until time.Time) (seen bool, err error)
}

// Failure is a refused token with the reason, for logs and metrics (never
// the token). Callers answer 401 without the reason.
type Failure struct{ Reason string }

func (f *Failure) Error() string { return "token refused: " + f.Reason }

// Label is the reason, for a log field or metric label.
func (f *Failure) Label() string { return f.Reason }

func fail(reason string) error { return &Failure{Reason: reason} }

// Reasons lists every reason a token is refused with (Failure.Reason), so
// that a metric can count each from zero.
func Reasons() []string {
	return []string{"algorithm", "audience", "crit", "duplicate-member", "expired", "invalid", "issued-in-future",
		"jku-not-allowed", "lifetime", "malformed", "no-bearer-token", "no-iat", "no-jti", "no-kid", "replayed",
		"signature", "tenant", "typ", "unknown-kid", "untrusted-issuer"}
}

// Errors of a token that could not be checked, not a refused one: callers
// answer them as unavailable (503), not 401. Each wraps its cause.
var (
	ErrReplayUnavailable = errors.New("replay cache unavailable")
	ErrKeysUnavailable   = errors.New("issuer keys unavailable")
)

// Claims are the verified claims halite uses.
type Claims struct {
	Issuer, Subject, Tenant, JTI string
	ExpiresAt                    time.Time
}

// Verifier checks tokens. It is safe for concurrent use.
type Verifier struct {
	cfg     Config
	issuers map[string]Issuer
}

var defaultAlgorithms = []string{"ES384", "RS384"}

// NewVerifier validates cfg and returns a Verifier.
func NewVerifier(cfg Config) (*Verifier, error) {
	if len(cfg.Algorithms) == 0 {
		cfg.Algorithms = defaultAlgorithms
	}
	for _, a := range cfg.Algorithms {
		if a != "ES384" && a != "RS384" && a != "ES256" && a != "RS256" && a != "ES512" && a != "RS512" && a != "PS384" {
			return nil, fmt.Errorf("auth: algorithm %q is not an asymmetric JWS algorithm halite accepts", a)
		}
	}
	if cfg.Keys == nil || cfg.Replay == nil || cfg.MaxLifetime <= 0 || cfg.Skew < 0 {
		return nil, errors.New("auth: a key source, a replay cache, a positive max lifetime and a non-negative skew are needed")
	}
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	v := &Verifier{cfg: cfg, issuers: map[string]Issuer{}}
	for i, is := range cfg.Issuers {
		if is.ID == "" || (len(is.JWKS) == 0) == (is.JWKSURL == "") {
			return nil, fmt.Errorf("auth: issuers[%d] needs an id and exactly one of jwks and jwks_url", i)
		}
		if _, dup := v.issuers[is.ID]; dup {
			return nil, fmt.Errorf("auth: issuer %q is listed twice", is.ID)
		}
		if len(is.JWKS) > 0 {
			if err := cfg.Keys.AddInline(is.ID, is.JWKS); err != nil {
				return nil, fmt.Errorf("auth: issuer %q: %w", is.ID, err)
			}
		}
		v.issuers[is.ID] = is
	}
	return v, nil
}

// Issuer returns the trusted issuer with id iss.
func (v *Verifier) Issuer(iss string) (Issuer, bool) {
	is, ok := v.issuers[iss]
	return is, ok
}

// Verify checks the Authorization header value of a call made to
// audience (the exact URL called) and returns the verified claims, a
// *Failure for a refused token, or an error wrapping ErrReplayUnavailable
// or ErrKeysUnavailable (ctx ended while keys were fetched) when the token
// could not be checked.
func (v *Verifier) Verify(ctx context.Context, authorization, audience string) (*Claims, error) {
	scheme, raw, _ := strings.Cut(authorization, " ")
	if !strings.EqualFold(scheme, "Bearer") || raw == "" {
		return nil, fail("no-bearer-token")
	}
	// Read the header and iss without trusting them, to find the issuer
	// and its key; nothing is fetched before the issuer is known.
	unverified, parts, err := jwt.NewParser().ParseUnverified(raw, jwt.MapClaims{})
	if err != nil {
		return nil, fail("malformed")
	}
	// A repeated member would be read last-wins here and perhaps
	// first-wins elsewhere: refuse it rather than pick.
	if !distinctMembers(parts[0]) || !distinctMembers(parts[1]) {
		return nil, fail("duplicate-member")
	}
	h := unverified.Header
	iss, _ := unverified.Claims.(jwt.MapClaims)["iss"].(string)
	is, trusted := v.issuers[iss]
	if !trusted {
		return nil, fail("untrusted-issuer")
	}
	alg, _ := h["alg"].(string)
	if !slices.Contains(v.cfg.Algorithms, alg) {
		return nil, fail("algorithm")
	}
	if typ, _ := h["typ"].(string); !strings.EqualFold(typ, "JWT") {
		return nil, fail("typ")
	}
	// RFC 7515 §4.1.11: crit lists extensions the recipient must
	// understand; halite understands none, so any crit is refused, well
	// formed (a non-empty array of names) or not.
	if _, present := h["crit"]; present {
		return nil, fail("crit")
	}
	kid, _ := h["kid"].(string)
	if kid == "" {
		return nil, fail("no-kid")
	}
	source := is.JWKSURL
	if jku, present := h["jku"]; present {
		u, _ := jku.(string)
		if !slices.Contains(is.JKUAllowed, u) {
			return nil, fail("jku-not-allowed")
		}
		source = u
	}
	key, err := v.cfg.Keys.Key(ctx, is.ID, source, kid)
	if err != nil {
		if ctx.Err() != nil && errors.Is(err, ctx.Err()) {
			return nil, fmt.Errorf("%w: %w", ErrKeysUnavailable, err)
		}
		return nil, fail("unknown-kid")
	}
	tok, err := jwt.NewParser(jwt.WithValidMethods(v.cfg.Algorithms), jwt.WithExpirationRequired(), jwt.WithIssuedAt(),
		jwt.WithLeeway(v.cfg.Skew), jwt.WithTimeFunc(v.cfg.Now), jwt.WithIssuer(is.ID)).
		ParseWithClaims(raw, &tokenClaims{}, func(*jwt.Token) (any, error) { return key, nil })
	switch {
	case errors.Is(err, jwt.ErrTokenExpired):
		return nil, fail("expired")
	case errors.Is(err, jwt.ErrTokenUsedBeforeIssued):
		return nil, fail("issued-in-future")
	case errors.Is(err, jwt.ErrTokenSignatureInvalid):
		return nil, fail("signature")
	case err != nil:
		return nil, fail("invalid")
	}
	c := tok.Claims.(*tokenClaims)
	if len(c.Audience) != 1 || c.Audience[0] != audience {
		return nil, fail("audience")
	}
	if c.IssuedAt == nil {
		return nil, fail("no-iat")
	}
	if c.ExpiresAt.Sub(c.IssuedAt.Time) > v.cfg.MaxLifetime {
		return nil, fail("lifetime")
	}
	if c.ID == "" {
		return nil, fail("no-jti")
	}
	if len(is.Tenants) > 0 && !slices.Contains(is.Tenants, c.Tenant) {
		return nil, fail("tenant")
	}
	seen, err := v.cfg.Replay.Remember(ctx, is.ID, c.ID, c.ExpiresAt.Add(v.cfg.Skew))
	if err != nil {
		return nil, fmt.Errorf("%w: %w", ErrReplayUnavailable, err)
	}
	if seen {
		return nil, fail("replayed")
	}
	return &Claims{Issuer: is.ID, Subject: c.Subject, Tenant: c.Tenant, JTI: c.ID, ExpiresAt: c.ExpiresAt.Time}, nil
}

// distinctMembers reports whether base64url segment seg is a JSON object
// whose top-level member names (unescaped) are all distinct. The parser
// has already read seg, so only a repeated name makes it false in practice.
func distinctMembers(seg string) bool {
	data, err := base64.RawURLEncoding.DecodeString(seg)
	if err != nil {
		return false
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	if t, err := dec.Token(); err != nil || t != json.Delim('{') {
		return false
	}
	seen := map[string]bool{}
	var value json.RawMessage
	for dec.More() {
		t, err := dec.Token()
		name, ok := t.(string) // inside an object, Token returns names as strings
		if err != nil || !ok || seen[name] {
			return false
		}
		seen[name] = true
		// Decoding the value whole skips nested objects and arrays.
		if err := dec.Decode(&value); err != nil {
			return false
		}
	}
	return true
}

// tokenClaims are the registered claims plus CDS Hooks' tenant.
type tokenClaims struct {
	jwt.RegisteredClaims
	Tenant string `json:"tenant,omitempty"`
}

// publicKey is what a key set holds per kid.
type publicKey = crypto.PublicKey
