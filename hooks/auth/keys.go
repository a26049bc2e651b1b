package auth

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"sync"
	"time"

	"github.com/go-jose/go-jose/v4"
	"golang.org/x/sync/singleflight"
)

// KeySource holds the issuers' public keys: inline sets, and sets fetched
// from JWKS URLs. A fetched set is used for Refresh; a URL is fetched at
// most once every MinRefresh, whether the last attempt succeeded or not
// (an unknown kid or a failing server cannot make halite hammer it); when
// a refetch fails, the last good set is still used for StaleGrace past its
// Refresh. One fetch at a time per URL, not tied to any one caller. No
// redirect is followed: a 3xx answer is a failed fetch.
type KeySource struct {
	client     *http.Client
	log        *slog.Logger
	maxBytes   int64
	refresh    time.Duration
	minRefresh time.Duration
	staleGrace time.Duration
	now        func() time.Time

	mu      sync.Mutex
	inline  map[string]map[string]publicKey // issuer → kid → key
	fetched map[string]*urlState            // URL → what was fetched from it
	group   singleflight.Group
}

// urlState is the last good set of a URL and the last attempt to fetch it.
type urlState struct {
	keys      map[string]publicKey // nil until a fetch succeeds
	at        time.Time            // when keys were fetched
	attempted time.Time            // last fetch attempt
	err       error                // the last attempt's error, nil if it succeeded
}

// KeySourceConfig bounds the JWKS fetches.
type KeySourceConfig struct {
	Client     *http.Client  // with its timeout; NewKeySource turns its redirects off
	MaxBytes   int64         // largest JWKS document read
	Refresh    time.Duration // how long a fetched set is used
	MinRefresh time.Duration // least time between fetches of one URL
	// StaleGrace is how long past Refresh the last good set is used while
	// refetching fails (0: not at all).
	StaleGrace time.Duration
	Now        func() time.Time
	// Log receives a WARN per failed fetch, naming the URL (configuration,
	// never a token); nil logs nothing.
	Log *slog.Logger
}

// NewKeySource returns an empty KeySource. It uses a copy of cfg.Client
// that follows no redirect, so a key URL cannot hand halite another
// origin's key set.
func NewKeySource(cfg KeySourceConfig) *KeySource {
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	if cfg.Log == nil {
		cfg.Log = slog.New(slog.DiscardHandler)
	}
	var client http.Client
	if cfg.Client != nil {
		client = *cfg.Client
	}
	client.CheckRedirect = func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
	return &KeySource{client: &client, log: cfg.Log, maxBytes: cfg.MaxBytes, refresh: cfg.Refresh, minRefresh: cfg.MinRefresh,
		staleGrace: cfg.StaleGrace, now: cfg.Now, inline: map[string]map[string]publicKey{}, fetched: map[string]*urlState{}}
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

var errUnknownKid = errors.New("unknown kid")

// Key returns the key kid of issuer: from the URL when one is given
// (the issuer's JWKS URL or an allowlisted jku), else from its inline set.
func (s *KeySource) Key(ctx context.Context, issuer, url, kid string) (publicKey, error) {
	if url == "" {
		s.mu.Lock()
		k, ok := s.inline[issuer][kid]
		s.mu.Unlock()
		if !ok {
			return nil, errUnknownKid
		}
		return k, nil
	}
	now := s.now()
	s.mu.Lock()
	st := s.fetched[url]
	var cur urlState
	if st != nil {
		cur = *st
	}
	s.mu.Unlock()
	fresh := cur.keys != nil && now.Sub(cur.at) < s.refresh
	if fresh {
		if k, ok := cur.keys[kid]; ok {
			return k, nil
		}
	}
	if st != nil && now.Sub(cur.attempted) < s.minRefresh {
		return s.fromLast(cur, now, kid)
	}
	// The fetch is shared by every caller waiting on this URL, so it must
	// not end when the first of them gives up; the client's timeout bounds
	// it, and its result is recorded for later callers. Each caller waits
	// only until its own ctx ends.
	ch := s.group.DoChan(url, func() (any, error) { return s.fetch(context.WithoutCancel(ctx), url), nil })
	select {
	case r := <-ch:
		return s.fromLast(r.Val.(urlState), now, kid)
	case <-ctx.Done():
		return nil, fmt.Errorf("jwks %s: %w", url, ctx.Err())
	}
}

// fromLast answers kid from a URL's state without fetching: the set while
// it is fresh, or within StaleGrace if the last refetch failed.
func (s *KeySource) fromLast(st urlState, now time.Time, kid string) (publicKey, error) {
	usable := st.keys != nil && (now.Sub(st.at) < s.refresh || (st.err != nil && now.Sub(st.at) < s.refresh+s.staleGrace))
	if !usable {
		if st.err != nil {
			return nil, st.err
		}
		return nil, errUnknownKid
	}
	if k, ok := st.keys[kid]; ok {
		return k, nil
	}
	return nil, errUnknownKid
}

// fetch gets url's JWKS and records the attempt, keeping the last good set
// when it fails; it returns the URL's new state.
func (s *KeySource) fetch(ctx context.Context, url string) urlState {
	keys, err := s.get(ctx, url)
	s.mu.Lock()
	defer s.mu.Unlock()
	st := s.fetched[url]
	if st == nil {
		st = &urlState{}
		s.fetched[url] = st
	}
	st.attempted, st.err = s.now(), err
	if err != nil {
		s.log.Warn("jwks fetch failed", "url", url, "error", err.Error())
	} else {
		st.keys, st.at = keys, st.attempted
	}
	return *st
}

func (s *KeySource) get(ctx context.Context, url string) (map[string]publicKey, error) {
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
	if resp.StatusCode/100 == 3 && resp.Header.Get("Location") != "" {
		return nil, fmt.Errorf("jwks %s: redirected (status %d); redirects are not followed", url, resp.StatusCode)
	}
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
	return keys, nil
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
