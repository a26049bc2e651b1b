package auth

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"sync"
	"time"

	"github.com/go-jose/go-jose/v4"
	"golang.org/x/sync/singleflight"
)

// KeySource holds the issuers' public keys: inline sets, and sets fetched
// from JWKS URLs, cached for Refresh and fetched again at most every
// MinRefresh when a kid is unknown (one fetch at a time per URL).
type KeySource struct {
	client     *http.Client
	maxBytes   int64
	refresh    time.Duration
	minRefresh time.Duration
	now        func() time.Time

	mu      sync.Mutex
	inline  map[string]map[string]publicKey // issuer → kid → key
	fetched map[string]*fetchedSet          // URL → set
	group   singleflight.Group
}

type fetchedSet struct {
	keys map[string]publicKey
	at   time.Time
}

// KeySourceConfig bounds the JWKS fetches.
type KeySourceConfig struct {
	Client     *http.Client  // with its timeout; never follows redirects off the URL's origin
	MaxBytes   int64         // largest JWKS document read
	Refresh    time.Duration // how long a fetched set is used
	MinRefresh time.Duration // least time between fetches on an unknown kid
	Now        func() time.Time
}

// NewKeySource returns an empty KeySource.
func NewKeySource(cfg KeySourceConfig) *KeySource {
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	return &KeySource{client: cfg.Client, maxBytes: cfg.MaxBytes, refresh: cfg.Refresh, minRefresh: cfg.MinRefresh, now: cfg.Now,
		inline: map[string]map[string]publicKey{}, fetched: map[string]*fetchedSet{}}
}

// AddInline adds an issuer's inline JWKS.
func (s *KeySource) AddInline(issuer string, jwks []byte) error {
	keys, err := parseJWKS(jwks)
	if err != nil {
		return err
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	s.inline[issuer] = keys
	return nil
}

// Key returns the key kid of issuer: from the URL when one is given
// (the issuer's JWKS URL or an allowlisted jku), else from its inline set.
func (s *KeySource) Key(ctx context.Context, issuer, url, kid string) (publicKey, error) {
	if url == "" {
		s.mu.Lock()
		k, ok := s.inline[issuer][kid]
		s.mu.Unlock()
		if !ok {
			return nil, errors.New("unknown kid")
		}
		return k, nil
	}
	s.mu.Lock()
	set := s.fetched[url]
	s.mu.Unlock()
	now := s.now()
	if set != nil && now.Sub(set.at) < s.refresh {
		if k, ok := set.keys[kid]; ok {
			return k, nil
		}
		if now.Sub(set.at) < s.minRefresh {
			return nil, errors.New("unknown kid")
		}
	}
	v, err, _ := s.group.Do(url, func() (any, error) { return s.fetch(ctx, url) })
	if err != nil {
		return nil, err
	}
	k, ok := v.(*fetchedSet).keys[kid]
	if !ok {
		return nil, errors.New("unknown kid")
	}
	return k, nil
}

func (s *KeySource) fetch(ctx context.Context, url string) (*fetchedSet, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, url, nil)
	if err != nil {
		return nil, fmt.Errorf("jwks %s: %w", url, err)
	}
	req.Header.Set("Accept", "application/json")
	resp, err := s.client.Do(req)
	if err != nil {
		return nil, fmt.Errorf("jwks %s: %w", url, err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		return nil, fmt.Errorf("jwks %s: status %d", url, resp.StatusCode)
	}
	body, err := io.ReadAll(io.LimitReader(resp.Body, s.maxBytes+1))
	if err != nil {
		return nil, fmt.Errorf("jwks %s: %w", url, err)
	}
	if int64(len(body)) > s.maxBytes {
		return nil, fmt.Errorf("jwks %s: larger than %d bytes", url, s.maxBytes)
	}
	keys, err := parseJWKS(body)
	if err != nil {
		return nil, fmt.Errorf("jwks %s: %w", url, err)
	}
	set := &fetchedSet{keys: keys, at: s.now()}
	s.mu.Lock()
	s.fetched[url] = set
	s.mu.Unlock()
	return set, nil
}

// parseJWKS reads the public signing keys of a JWKS by kid; private or
// symmetric keys are refused.
func parseJWKS(data []byte) (map[string]publicKey, error) {
	var set jose.JSONWebKeySet
	if err := json.Unmarshal(data, &set); err != nil {
		return nil, fmt.Errorf("jwks: %w", err)
	}
	keys := map[string]publicKey{}
	for _, k := range set.Keys {
		if k.KeyID == "" || !k.IsPublic() || !k.Valid() {
			return nil, fmt.Errorf("jwks: key %q needs a kid and must be a valid public key", k.KeyID)
		}
		if k.Use != "" && k.Use != "sig" {
			continue
		}
		keys[k.KeyID] = k.Key
	}
	return keys, nil
}
