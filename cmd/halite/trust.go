package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"net/url"
	"os"
	"strings"
	"time"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/auth"
	"github.com/halite-cds/halite/hooks/fhirclient"
)

// AuthConfig bounds token verification.
type AuthConfig struct {
	Algorithms     []string `yaml:"algorithms"`
	ClockSkew      Duration `yaml:"clock_skew"`
	MaxLifetime    Duration `yaml:"max_token_lifetime"`
	JWKSTimeout    Duration `yaml:"jwks_timeout"`
	JWKSRefresh    Duration `yaml:"jwks_refresh"`
	JWKSMinRefresh Duration `yaml:"jwks_min_refresh"`
	JWKSStaleGrace Duration `yaml:"jwks_stale_grace"`
	JWKSMaxBytes   int64    `yaml:"jwks_max_bytes"`
}

// IssuerConfig is one trusted EHR.
type IssuerConfig struct {
	Issuer      string         `yaml:"iss"`
	JWKSURL     string         `yaml:"jwks_url"`
	JWKSFile    string         `yaml:"jwks_file"` // a JWKS document on disk (e.g. a mounted Secret)
	JKUAllowed  []string       `yaml:"jku_allowed"`
	Tenants     []string       `yaml:"tenants"`
	FHIRServers []FHIRServerCf `yaml:"fhir_servers"`
}

// FHIRServerCf is one FHIR base URL an issuer's calls may name.
type FHIRServerCf struct {
	BaseURL string `yaml:"base_url"`
	// AllowPrivate permits the server's addresses to be in private ranges
	// (a hospital network); loopback and link-local stay refused.
	AllowPrivate bool `yaml:"allow_private"`
}

func defaultAuthConfig() AuthConfig {
	return AuthConfig{
		Algorithms:     []string{"ES384", "RS384"},
		ClockSkew:      Duration(30 * time.Second),
		MaxLifetime:    Duration(5 * time.Minute),
		JWKSTimeout:    Duration(3 * time.Second),
		JWKSRefresh:    Duration(time.Hour),
		JWKSMinRefresh: Duration(time.Minute),
		JWKSStaleGrace: Duration(6 * time.Hour),
		JWKSMaxBytes:   64 << 10,
	}
}

// validateTrust checks the issuer list, naming the first key at fault.
func (c Config) validateTrust() error {
	a := c.Auth
	if a.ClockSkew < 0 || a.ClockSkew > Duration(5*time.Minute) {
		return errors.New("config: auth.clock_skew: must be between 0s and 5m")
	}
	if a.MaxLifetime <= 0 || a.MaxLifetime > Duration(time.Hour) {
		return errors.New("config: auth.max_token_lifetime: must be positive and at most 1h")
	}
	if a.JWKSTimeout <= 0 || a.JWKSRefresh <= 0 || a.JWKSMinRefresh <= 0 || a.JWKSMaxBytes <= 0 {
		return errors.New("config: auth: jwks_timeout, jwks_refresh, jwks_min_refresh and jwks_max_bytes must be positive")
	}
	if a.JWKSMinRefresh > a.JWKSRefresh {
		return errors.New("config: auth.jwks_min_refresh: must not exceed jwks_refresh (an expired set could not be refetched)")
	}
	if a.JWKSStaleGrace < 0 {
		return errors.New("config: auth.jwks_stale_grace: must not be negative")
	}
	for i, alg := range a.Algorithms {
		if strings.HasPrefix(alg, "HS") || strings.EqualFold(alg, "none") {
			return fmt.Errorf("config: auth.algorithms[%d]: %q is never accepted (symmetric or unsigned)", i, alg)
		}
	}
	if len(c.Issuers) > 0 {
		u, err := url.Parse(c.PublicBaseURL)
		if c.PublicBaseURL == "" || err != nil || !secureURL(u, c.DevelopmentMode) {
			return errors.New("config: public_base_url: trusted issuers need the https URL the EHR calls (it is each token's audience)")
		}
	}
	seen := map[string]bool{}
	for i, is := range c.Issuers {
		key := fmt.Sprintf("config: issuers[%d]", i)
		if is.Issuer == "" || seen[is.Issuer] {
			return fmt.Errorf("%s.iss: must be set and unique", key)
		}
		seen[is.Issuer] = true
		if (is.JWKSURL == "") == (is.JWKSFile == "") {
			return fmt.Errorf("%s: exactly one of jwks_url and jwks_file is needed", key)
		}
		for j, raw := range append([]string{is.JWKSURL}, is.JKUAllowed...) {
			if raw == "" && j == 0 {
				continue
			}
			if u, err := url.Parse(raw); err != nil || !secureURL(u, c.DevelopmentMode) {
				return fmt.Errorf("%s: %q is not an https URL", key, raw)
			}
		}
		for j, s := range is.FHIRServers {
			if u, err := url.Parse(s.BaseURL); err != nil || !secureURL(u, c.DevelopmentMode) || u.RawQuery != "" {
				return fmt.Errorf("%s.fhir_servers[%d].base_url: %q is not an https base URL", key, j, s.BaseURL)
			}
		}
	}
	return nil
}

// secureURL: https, or http to loopback in development mode.
func secureURL(u *url.URL, dev bool) bool {
	return u.Host != "" && (u.Scheme == "https" || (dev && u.Scheme == "http" && fhirclient.IsLoopback(u.Hostname())))
}

// authenticator builds the caller check from the configuration; nil when no
// issuer is trusted (development mode). replay is the store's replay cache
// (durable across restarts; shared by replicas on PostgreSQL).
func authenticator(c Config, replay auth.ReplayCache, log *slog.Logger) (hooks.Authenticator, error) {
	if len(c.Issuers) == 0 {
		return nil, nil
	}
	a := c.Auth
	keys := auth.NewKeySource(auth.KeySourceConfig{
		Client:     &http.Client{Timeout: time.Duration(a.JWKSTimeout), Transport: fhirclient.NewTransport(c.DevelopmentMode, false)},
		MaxBytes:   a.JWKSMaxBytes,
		Refresh:    time.Duration(a.JWKSRefresh),
		MinRefresh: time.Duration(a.JWKSMinRefresh),
		StaleGrace: time.Duration(a.JWKSStaleGrace),
		Log:        log,
	})
	var issuers []auth.Issuer
	for i, is := range c.Issuers {
		ai := auth.Issuer{ID: is.Issuer, JWKSURL: is.JWKSURL, JKUAllowed: is.JKUAllowed, Tenants: is.Tenants}
		if is.JWKSFile != "" {
			data, err := os.ReadFile(is.JWKSFile)
			if err != nil {
				return nil, fmt.Errorf("config: issuers[%d].jwks_file: %w", i, err)
			}
			ai.JWKS = data
		}
		issuers = append(issuers, ai)
	}
	v, err := auth.NewVerifier(auth.Config{Issuers: issuers, Algorithms: a.Algorithms, Skew: time.Duration(a.ClockSkew),
		MaxLifetime: time.Duration(a.MaxLifetime), Keys: keys, Replay: replay})
	if err != nil {
		return nil, fmt.Errorf("config: %w", err)
	}
	return verifierAdapter{v}, nil
}

// verifierAdapter presents the JWT verifier as the hooks Authenticator.
type verifierAdapter struct{ v *auth.Verifier }

func (a verifierAdapter) Authenticate(ctx context.Context, authorization, audience string) (hooks.Caller, error) {
	c, err := a.v.Verify(ctx, authorization, audience)
	switch {
	case errors.Is(err, auth.ErrReplayUnavailable):
		// The store is down or slow: never the caller's fault, never a 401.
		return hooks.Caller{}, storeUnavailable(err, "the token's replay check could not be made")
	case errors.Is(err, auth.ErrKeysUnavailable):
		return hooks.Caller{}, &hooks.Error{Kind: hooks.KindUnavailable, Reason: hooks.ReasonKeysTimeout,
			Message: "the caller's key set could not be read in time", Err: err}
	case err != nil:
		return hooks.Caller{}, err
	}
	return hooks.Caller{Issuer: c.Issuer, Tenant: c.Tenant}, nil
}

// allowedServer finds the caller's allowlist entry that fhirServer falls
// under (same scheme, host and port, path at or below the entry's). A URL
// whose meaning could differ between halite and the server is refused:
// user info, a query or fragment, escaped path bytes, "." or ".."
// segments, or ";" parameters.
func allowedServer(c Config, caller hooks.Caller, fhirServer string) (FHIRServerCf, bool) {
	u, err := url.Parse(strings.TrimRight(fhirServer, "/"))
	if err != nil || u.User != nil || u.Opaque != "" || u.RawQuery != "" || u.ForceQuery || u.Fragment != "" ||
		u.RawPath != "" || strings.Contains(u.Path, ";") || fhirclient.HasDotSegment(u.Path) {
		return FHIRServerCf{}, false
	}
	for _, is := range c.Issuers {
		if is.Issuer != caller.Issuer {
			continue
		}
		for _, s := range is.FHIRServers {
			b, err := url.Parse(strings.TrimRight(s.BaseURL, "/"))
			if err != nil {
				continue
			}
			if strings.EqualFold(u.Scheme, b.Scheme) && strings.EqualFold(u.Host, b.Host) &&
				(u.Path == b.Path || strings.HasPrefix(u.Path, b.Path+"/")) {
				return s, true
			}
		}
	}
	return FHIRServerCf{}, false
}
