package fhirclient_test

import (
	"bufio"
	"context"
	"errors"
	"net"
	"net/http"
	"net/http/httptest"
	"net/url"
	"path"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/fhirclient"
)

// Client must be usable wherever hooks wants a Fetcher.
var _ hooks.Fetcher = (*fhirclient.Client)(nil)

const (
	secretToken   = "s3cr3t-token"
	secretQuery   = "patient=pat-XYZ"
	secretPatient = "pat-XYZ"

	okBody  = `{"resourceType":"Patient","id":"p1"}`
	maxBody = 1 << 20
)

// assertNoSecrets fails when err mentions the token, the query string or the
// patient id.
func assertNoSecrets(t *testing.T, err error) {
	t.Helper()
	if err == nil {
		return
	}
	msg := err.Error()
	for _, s := range []string{secretToken, secretQuery, secretPatient} {
		if strings.Contains(msg, s) {
			t.Errorf("error %q contains %q", msg, s)
		}
	}
}

// seen is what a test server recorded about one request.
type seen struct {
	Method, Path, RawQuery, Auth, Accept string
}

type server struct {
	*httptest.Server
	mu   sync.Mutex
	reqs []seen
}

// startServer starts a loopback server that records every request and then
// runs h (or answers 200 okBody when h is nil).
func startServer(t *testing.T, useTLS bool, h http.HandlerFunc) *server {
	t.Helper()
	s := &server{}
	wrapped := http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		s.mu.Lock()
		s.reqs = append(s.reqs, seen{
			Method:   r.Method,
			Path:     r.URL.Path,
			RawQuery: r.URL.RawQuery,
			Auth:     r.Header.Get("Authorization"),
			Accept:   r.Header.Get("Accept"),
		})
		s.mu.Unlock()
		if h == nil {
			_, _ = w.Write([]byte(okBody))
			return
		}
		h(w, r)
	})
	if useTLS {
		s.Server = httptest.NewTLSServer(wrapped)
	} else {
		s.Server = httptest.NewServer(wrapped)
	}
	t.Cleanup(s.Close)
	return s
}

func (s *server) requests() []seen {
	s.mu.Lock()
	defer s.mu.Unlock()
	return append([]seen(nil), s.reqs...)
}

func (s *server) port(t *testing.T) string {
	t.Helper()
	u, err := url.Parse(s.URL)
	if err != nil {
		t.Fatal(err)
	}
	return u.Port()
}

// newClient makes a client for s.URL+basePath that trusts s.
func newClient(t *testing.T, s *server, basePath, token string, opt fhirclient.Options) *fhirclient.Client {
	t.Helper()
	opt.AllowHTTPLoopback = true
	if opt.MaxResponseBytes == 0 {
		opt.MaxResponseBytes = maxBody
	}
	if s.TLS != nil && opt.Transport == nil {
		opt.Transport = s.Client().Transport
	}
	c, err := fhirclient.New(s.URL+basePath, token, opt)
	if err != nil {
		t.Fatalf("New(%q): %v", s.URL+basePath, err)
	}
	return c
}

func TestNew(t *testing.T) {
	errAny := errors.New("any error that is not ErrInsecure")
	tests := []struct {
		name   string
		server string
		opt    fhirclient.Options
		want   error // nil: success; errAny: some error other than ErrInsecure
	}{
		{"https with path", "https://fhir.example.org/r4", fhirclient.Options{MaxResponseBytes: 1}, nil},
		{"https without path", "https://fhir.example.org", fhirclient.Options{MaxResponseBytes: 1}, nil},
		{"https trailing slash", "https://fhir.example.org/r4/", fhirclient.Options{MaxResponseBytes: 1}, nil},
		{"https with port", "https://fhir.example.org:8443/r4", fhirclient.Options{MaxResponseBytes: 1}, nil},
		{"https loopback without flag", "https://127.0.0.1:8443", fhirclient.Options{MaxResponseBytes: 1}, nil},

		{"http remote", "http://fhir.example.org/r4", fhirclient.Options{MaxResponseBytes: 1}, fhirclient.ErrInsecure},
		{"http remote with flag", "http://fhir.example.org/r4", fhirclient.Options{MaxResponseBytes: 1, AllowHTTPLoopback: true}, fhirclient.ErrInsecure},
		{"http private ip with flag", "http://10.0.0.1/fhir", fhirclient.Options{MaxResponseBytes: 1, AllowHTTPLoopback: true}, fhirclient.ErrInsecure},
		{"http localhost lookalike with flag", "http://localhost.example.org/fhir", fhirclient.Options{MaxResponseBytes: 1, AllowHTTPLoopback: true}, fhirclient.ErrInsecure},
		{"http 127.0.0.1 without flag", "http://127.0.0.1:8080/fhir", fhirclient.Options{MaxResponseBytes: 1}, fhirclient.ErrInsecure},
		{"http localhost without flag", "http://localhost:8080/fhir", fhirclient.Options{MaxResponseBytes: 1}, fhirclient.ErrInsecure},
		{"http ::1 without flag", "http://[::1]:8080/fhir", fhirclient.Options{MaxResponseBytes: 1}, fhirclient.ErrInsecure},
		{"http 127.0.0.1 with flag", "http://127.0.0.1:8080/fhir", fhirclient.Options{MaxResponseBytes: 1, AllowHTTPLoopback: true}, nil},
		{"http localhost with flag", "http://localhost:8080/fhir", fhirclient.Options{MaxResponseBytes: 1, AllowHTTPLoopback: true}, nil},
		{"http ::1 with flag", "http://[::1]:8080/fhir", fhirclient.Options{MaxResponseBytes: 1, AllowHTTPLoopback: true}, nil},
		{"ftp loopback with flag", "ftp://127.0.0.1/fhir", fhirclient.Options{MaxResponseBytes: 1, AllowHTTPLoopback: true}, fhirclient.ErrInsecure},
		{"scheme-relative", "//fhir.example.org/r4", fhirclient.Options{MaxResponseBytes: 1}, fhirclient.ErrInsecure},

		{"relative path", "/fhir/r4", fhirclient.Options{MaxResponseBytes: 1}, errAny},
		{"relative ref", "Patient/1", fhirclient.Options{MaxResponseBytes: 1}, errAny},
		{"empty", "", fhirclient.Options{MaxResponseBytes: 1}, errAny},
		{"garbage", "::not a url::", fhirclient.Options{MaxResponseBytes: 1}, errAny},
		{"no host", "https://", fhirclient.Options{MaxResponseBytes: 1}, errAny},
		{"bad escape in host", "https://%zz/fhir", fhirclient.Options{MaxResponseBytes: 1}, errAny},
		{"bad port", "https://fhir.example.org:port/fhir", fhirclient.Options{MaxResponseBytes: 1}, errAny},

		{"zero max bytes", "https://fhir.example.org/r4", fhirclient.Options{}, errAny},
		{"negative max bytes", "https://fhir.example.org/r4", fhirclient.Options{MaxResponseBytes: -1}, errAny},
		{"zero max bytes loopback", "http://127.0.0.1/r4", fhirclient.Options{AllowHTTPLoopback: true}, errAny},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			c, err := fhirclient.New(tt.server, secretToken, tt.opt)
			switch tt.want {
			case nil:
				if err != nil || c == nil {
					t.Fatalf("New(%q) = %v, %v; want a client", tt.server, c, err)
				}
				return
			case errAny:
				if err == nil {
					t.Fatalf("New(%q) succeeded; want an error", tt.server)
				}
				if errors.Is(err, fhirclient.ErrInsecure) {
					t.Errorf("New(%q) = %v; want an error other than ErrInsecure", tt.server, err)
				}
			default:
				if !errors.Is(err, tt.want) {
					t.Fatalf("New(%q) error = %v; want %v", tt.server, err, tt.want)
				}
			}
			if c != nil {
				t.Errorf("New(%q) returned a client with error %v", tt.server, err)
			}
			assertNoSecrets(t, err)
		})
	}
}

func TestNewErrorOmitsServerQuery(t *testing.T) {
	for _, server := range []string{
		"http://fhir.example.org/r4?" + secretQuery,
		"Patient?" + secretQuery,
		"https://fhir.example.org/r4?" + secretQuery, // MaxResponseBytes is 0
	} {
		_, err := fhirclient.New(server, secretToken, fhirclient.Options{})
		if err == nil {
			t.Fatalf("New(%q) succeeded; want an error", server)
		}
		assertNoSecrets(t, err)
	}
}

func TestIsLoopback(t *testing.T) {
	tests := []struct {
		host string
		want bool
	}{
		{"localhost", true},
		{"127.0.0.1", true},
		{"127.1.2.3", true},
		{"::1", true},
		{"", false},
		{"[::1]", false}, // a Hostname never has brackets
		{"10.0.0.1", false},
		{"::", false},
		{"0.0.0.0", false},
		{"localhost.example.org", false},
		{"example.org", false},
	}
	for _, tt := range tests {
		if got := fhirclient.IsLoopback(tt.host); got != tt.want {
			t.Errorf("IsLoopback(%q) = %v; want %v", tt.host, got, tt.want)
		}
	}
}

func TestFetchRelativeRefs(t *testing.T) {
	refs := []struct {
		ref       string
		wantPath  string // under the base path
		wantQuery string
	}{
		{"Patient/p1", "/Patient/p1", ""},
		{"/Patient/p1", "/Patient/p1", ""},
		{"Observation?patient=p1&code=x", "/Observation", "patient=p1&code=x"},
		{"Observation?patient=p1&code=a%7Cb&_count=50", "/Observation", "patient=p1&code=a%7Cb&_count=50"},
		{"Patient/p1/Observation?category=vital-signs", "/Patient/p1/Observation", "category=vital-signs"},
		// A token's system URL in the query does not make the ref absolute.
		{"Observation?patient=p1&code=http://loinc.org|2857-1", "/Observation", "patient=p1&code=http://loinc.org|2857-1"},
	}
	servers := []struct {
		name     string
		useTLS   bool
		basePath string // appended to the server URL to make the base
		wantBase string // the path prefix the server should see
	}{
		{"http with path", false, "/fhir/r4", "/fhir/r4"},
		{"http with path and slash", false, "/fhir/r4/", "/fhir/r4"},
		{"http without path", false, "", ""},
		{"http root slash", false, "/", ""},
		{"https with path", true, "/fhir/r4", "/fhir/r4"},
		{"https without path", true, "", ""},
	}
	for _, sv := range servers {
		for _, rf := range refs {
			t.Run(sv.name+"/"+rf.ref, func(t *testing.T) {
				s := startServer(t, sv.useTLS, nil)
				c := newClient(t, s, sv.basePath, "tok-123", fhirclient.Options{})
				body, err := c.Fetch(t.Context(), rf.ref)
				if err != nil {
					t.Fatalf("Fetch(%q): %v", rf.ref, err)
				}
				if string(body) != okBody {
					t.Errorf("body = %q; want %q", body, okBody)
				}
				want := []seen{{
					Method:   http.MethodGet,
					Path:     sv.wantBase + rf.wantPath,
					RawQuery: rf.wantQuery,
					Auth:     "Bearer tok-123",
					Accept:   "application/fhir+json",
				}}
				if got := s.requests(); !equalSeen(got, want) {
					t.Errorf("server saw %+v; want %+v", got, want)
				}
			})
		}
	}
}

func equalSeen(a, b []seen) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

func TestFetchWithoutTokenSendsNoAuthorization(t *testing.T) {
	s := startServer(t, false, nil)
	c := newClient(t, s, "/fhir", "", fhirclient.Options{})
	if _, err := c.Fetch(t.Context(), "Patient/p1"); err != nil {
		t.Fatal(err)
	}
	got := s.requests()
	if len(got) != 1 || got[0].Auth != "" {
		t.Errorf("server saw %+v; want one request without Authorization", got)
	}
}

func TestFetchAbsoluteNextPage(t *testing.T) {
	for _, useTLS := range []bool{false, true} {
		name := "http"
		if useTLS {
			name = "https"
		}
		t.Run(name, func(t *testing.T) {
			tests := []struct {
				name      string
				ref       func(s, other *server) string
				wantErr   error
				wantPath  string
				wantQuery string
			}{
				{
					name:      "same origin under base",
					ref:       func(s, _ *server) string { return s.URL + "/fhir/r4/Observation?" + secretQuery + "&_page=2" },
					wantPath:  "/fhir/r4/Observation",
					wantQuery: secretQuery + "&_page=2",
				},
				{
					name:      "same origin at base",
					ref:       func(s, _ *server) string { return s.URL + "/fhir/r4?_getpages=abc&_getpagesoffset=50" },
					wantPath:  "/fhir/r4",
					wantQuery: "_getpages=abc&_getpagesoffset=50",
				},
				{
					name: "different host same port",
					ref: func(s, _ *server) string {
						u, _ := url.Parse(s.URL)
						return u.Scheme + "://localhost:" + u.Port() + "/fhir/r4/Observation?" + secretQuery
					},
					wantErr: fhirclient.ErrOffOrigin,
				},
				{
					name:    "different remote host",
					ref:     func(_, _ *server) string { return "https://evil.example.org/fhir/r4/Observation?" + secretQuery },
					wantErr: fhirclient.ErrOffOrigin,
				},
				{
					name: "different scheme",
					ref: func(s, _ *server) string {
						scheme := "https"
						if s.TLS != nil {
							scheme = "http"
						}
						return scheme + "://127.0.0.1:" + s.port(t) + "/fhir/r4/Observation?" + secretQuery
					},
					wantErr: fhirclient.ErrOffOrigin,
				},
				{
					name:    "different port",
					ref:     func(_, other *server) string { return other.URL + "/fhir/r4/Observation?" + secretQuery },
					wantErr: fhirclient.ErrOffOrigin,
				},
				{
					name:    "path outside base",
					ref:     func(s, _ *server) string { return s.URL + "/other/Observation?" + secretQuery },
					wantErr: fhirclient.ErrOffOrigin,
				},
				{
					name:    "parent of base",
					ref:     func(s, _ *server) string { return s.URL + "/fhir/Observation?" + secretQuery },
					wantErr: fhirclient.ErrOffOrigin,
				},
				{
					name:    "sibling sharing a prefix",
					ref:     func(s, _ *server) string { return s.URL + "/fhir/r4x/Observation?" + secretQuery },
					wantErr: fhirclient.ErrOffOrigin,
				},
				{
					name:    "server root",
					ref:     func(s, _ *server) string { return s.URL + "/?" + secretQuery },
					wantErr: fhirclient.ErrOffOrigin,
				},
				{
					name:    "unparseable absolute",
					ref:     func(s, _ *server) string { return s.URL + "/fhir/r4/%zz?" + secretQuery },
					wantErr: fhirclient.ErrBadRef,
				},
			}
			for _, tt := range tests {
				t.Run(tt.name, func(t *testing.T) {
					s := startServer(t, useTLS, nil)
					other := startServer(t, useTLS, nil)
					c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{})
					ref := tt.ref(s, other)
					body, err := c.Fetch(t.Context(), ref)
					if tt.wantErr != nil {
						if !errors.Is(err, tt.wantErr) {
							t.Fatalf("Fetch(%q) error = %v; want %v", ref, err, tt.wantErr)
						}
						if body != nil {
							t.Errorf("Fetch(%q) returned a body with its error", ref)
						}
						assertNoSecrets(t, err)
						if n := len(s.requests()); n != 0 {
							t.Errorf("fhirServer received %d requests; want 0", n)
						}
						if n := len(other.requests()); n != 0 {
							t.Errorf("other server received %d requests; want 0", n)
						}
						return
					}
					if err != nil {
						t.Fatalf("Fetch(%q): %v", ref, err)
					}
					if string(body) != okBody {
						t.Errorf("body = %q; want %q", body, okBody)
					}
					want := []seen{{
						Method: http.MethodGet, Path: tt.wantPath, RawQuery: tt.wantQuery,
						Auth: "Bearer " + secretToken, Accept: "application/fhir+json",
					}}
					if got := s.requests(); !equalSeen(got, want) {
						t.Errorf("server saw %+v; want %+v", got, want)
					}
				})
			}
		})
	}
}

func TestFetchAbsoluteNextPageWithoutBasePath(t *testing.T) {
	s := startServer(t, false, nil)
	c := newClient(t, s, "", secretToken, fhirclient.Options{})
	ref := s.URL + "/any/where?_page=3"
	if _, err := c.Fetch(t.Context(), ref); err != nil {
		t.Fatalf("Fetch(%q): %v", ref, err)
	}
	got := s.requests()
	if len(got) != 1 || got[0].Path != "/any/where" || got[0].RawQuery != "_page=3" {
		t.Errorf("server saw %+v; want one request for /any/where?_page=3", got)
	}
}

// TestFetchFollowsNoRedirect: a 3xx with a Location is a failed fetch,
// wherever it points (the same path, under the base, another origin):
// only the first request is made, so the token reaches no redirect target.
func TestFetchFollowsNoRedirect(t *testing.T) {
	tests := []struct {
		name     string
		code     int
		location func(s, other *server) string
	}{
		{"302 same origin relative", http.StatusFound, func(_, _ *server) string { return "/fhir/r4/Patient/p2?_format=json" }},
		{"301 same origin absolute", http.StatusMovedPermanently, func(s, _ *server) string { return s.URL + "/fhir/r4/Patient/p2" }},
		{"303 same origin", http.StatusSeeOther, func(_, _ *server) string { return "/fhir/r4/Patient/p2" }},
		{"307 relative to the path", http.StatusTemporaryRedirect, func(_, _ *server) string { return "p2?_format=json" }},
		{"308 same origin", http.StatusPermanentRedirect, func(_, _ *server) string { return "/fhir/r4/Patient/p2" }},
		{"302 to itself", http.StatusFound, func(_, _ *server) string { return "/fhir/r4/Patient?" + secretQuery }},
		{"302 other server", http.StatusFound, func(_, o *server) string { return o.URL + "/fhir/r4/Patient/p1?" + secretQuery }},
		{"307 other server", http.StatusTemporaryRedirect, func(_, o *server) string { return o.URL + "/fhir/r4/Patient/p1?" + secretQuery }},
		{"308 other server", http.StatusPermanentRedirect, func(_, o *server) string { return o.URL + "/fhir/r4/Patient/p1?" + secretQuery }},
		{"other host name same port", http.StatusFound, func(s, _ *server) string {
			return "http://localhost:" + s.port(t) + "/fhir/r4/Patient/p1?" + secretQuery
		}},
		{"other scheme same port", http.StatusFound, func(s, _ *server) string {
			return "https://127.0.0.1:" + s.port(t) + "/fhir/r4/Patient/p1?" + secretQuery
		}},
		{"outside base path", http.StatusFound, func(_, _ *server) string { return "/admin/Patient?" + secretQuery }},
		{"remote host", http.StatusFound, func(_, _ *server) string { return "https://evil.example.org/fhir/r4?" + secretQuery }},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			other := startServer(t, false, nil)
			var s *server
			s = startServer(t, false, func(w http.ResponseWriter, r *http.Request) {
				w.Header().Set("Location", tt.location(s, other))
				w.WriteHeader(tt.code)
				_, _ = w.Write([]byte(okBody))
			})
			c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{})
			body, err := c.Fetch(t.Context(), "Patient?"+secretQuery)
			var fe *fhirclient.Error
			if !errors.Is(err, fhirclient.ErrRedirect) || !errors.As(err, &fe) ||
				fe.Public() != "the FHIR server answered with a redirect, which halite does not follow" {
				t.Fatalf("Fetch error = %v; want ErrRedirect with its public reason", err)
			}
			var st interface{ HTTPStatus() int }
			if !errors.As(err, &st) || st.HTTPStatus() != tt.code {
				t.Errorf("no HTTPStatus %d in %v", tt.code, err)
			}
			if body != nil {
				t.Errorf("Fetch returned a body with its error")
			}
			assertNoSecrets(t, err)
			if n := len(s.requests()); n != 1 {
				t.Errorf("fhirServer received %d requests; want only the first", n)
			}
			if got := other.requests(); len(got) != 0 {
				t.Errorf("other server received %+v; want nothing (and never the token)", got)
			}
		})
	}
}

func TestFetchHTTPStatus(t *testing.T) {
	codes := []int{
		http.StatusCreated, http.StatusNoContent, http.StatusMultipleChoices,
		http.StatusMovedPermanently, // without Location: a status, not a redirect
		http.StatusNotModified,
		http.StatusBadRequest, http.StatusUnauthorized, http.StatusForbidden,
		http.StatusNotFound, http.StatusGone, http.StatusTooManyRequests,
		http.StatusInternalServerError, http.StatusBadGateway, http.StatusServiceUnavailable,
	}
	for _, code := range codes {
		for _, ref := range []string{"Observation?" + secretQuery, "Patient/" + secretPatient} {
			t.Run(strconv.Itoa(code)+"/"+ref, func(t *testing.T) {
				s := startServer(t, false, func(w http.ResponseWriter, r *http.Request) {
					w.WriteHeader(code)
					// A server echoing what it got must not reach the error.
					_, _ = w.Write([]byte("Bearer " + secretToken + " " + r.URL.RequestURI()))
				})
				c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{})
				body, err := c.Fetch(t.Context(), ref)
				if !errors.Is(err, fhirclient.ErrHTTPStatus) {
					t.Fatalf("Fetch error = %v; want ErrHTTPStatus", err)
				}
				if body != nil {
					t.Errorf("Fetch returned a body with its error")
				}
				if !strings.Contains(err.Error(), strconv.Itoa(code)) {
					t.Errorf("error %q does not contain the status %d", err, code)
				}
				if errors.Is(err, fhirclient.ErrRedirect) {
					t.Errorf("Fetch error = %v; a %d without Location is no redirect", err, code)
				}
				assertNoSecrets(t, err)
			})
		}
	}
}

func TestFetchResponseSize(t *testing.T) {
	const limit = 16
	tests := []struct {
		name    string
		size    int
		chunked bool // no Content-Length
		tooBig  bool
	}{
		{"empty", 0, false, false},
		{"one under", limit - 1, false, false},
		{"exactly", limit, false, false},
		{"exactly chunked", limit, true, false},
		{"one over", limit + 1, false, true},
		{"one over chunked", limit + 1, true, true},
		{"far over", 1 << 20, false, true},
		{"far over chunked", 1 << 20, true, true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			payload := strings.Repeat("a", tt.size)
			s := startServer(t, false, func(w http.ResponseWriter, r *http.Request) {
				if tt.chunked {
					w.WriteHeader(http.StatusOK)
					w.(http.Flusher).Flush()
				} else {
					w.Header().Set("Content-Length", strconv.Itoa(tt.size))
				}
				_, _ = w.Write([]byte(payload))
			})
			c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{MaxResponseBytes: limit})
			body, err := c.Fetch(t.Context(), "Observation?"+secretQuery)
			if tt.tooBig {
				if !errors.Is(err, fhirclient.ErrTooLarge) {
					t.Fatalf("Fetch of %d bytes: error = %v; want ErrTooLarge", tt.size, err)
				}
				if body != nil {
					t.Errorf("Fetch returned a body with its error")
				}
				assertNoSecrets(t, err)
				return
			}
			if err != nil {
				t.Fatalf("Fetch of %d bytes: %v", tt.size, err)
			}
			if string(body) != payload {
				t.Errorf("body has %d bytes; want %d", len(body), tt.size)
			}
		})
	}
}

// countingBudget gives up to left bytes and records what was asked.
type countingBudget struct {
	mu         sync.Mutex
	left, took int64
}

var errSpent = errors.New("spent")

func (b *countingBudget) Take(n int64) error {
	b.mu.Lock()
	defer b.mu.Unlock()
	if n > b.left {
		return errSpent
	}
	b.left -= n
	b.took += n
	return nil
}

// TestFetchTakesFromBudget: every byte of an answer is taken from the
// budget before it is read — a declared length at once, an undeclared one
// a chunk at a time — and a budget that refuses ends the read with its
// error; an endless answer is never read past the budget.
func TestFetchTakesFromBudget(t *testing.T) {
	const size = 200 << 10
	for _, tt := range []struct {
		name     string
		chunked  bool
		endless  bool
		budget   int64
		wantErr  bool
		maxTaken int64
	}{
		{"declared, within", false, false, size, false, size},
		{"declared, over the budget: nothing read", false, false, size - 1, true, 0},
		{"chunked, within", true, false, size + 128<<10, false, size + 128<<10},
		{"chunked, over the budget", true, false, 100 << 10, true, 100 << 10},
		{"endless, stopped by the budget", true, true, 1 << 20, true, 1 << 20},
	} {
		t.Run(tt.name, func(t *testing.T) {
			payload := []byte(strings.Repeat("a", size))
			s := startServer(t, false, func(w http.ResponseWriter, r *http.Request) {
				if !tt.chunked {
					w.Header().Set("Content-Length", strconv.Itoa(size))
				}
				for {
					if _, err := w.Write(payload); err != nil || !tt.endless {
						return
					}
				}
			})
			b := &countingBudget{left: tt.budget}
			c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{MaxResponseBytes: 64 << 20, Budget: b})
			body, err := c.Fetch(t.Context(), "Observation?"+secretQuery)
			if tt.wantErr {
				if !errors.Is(err, fhirclient.ErrBudget) || !errors.Is(err, errSpent) {
					t.Fatalf("error %v; want ErrBudget wrapping the budget's error", err)
				}
				assertNoSecrets(t, err)
			} else if err != nil || len(body) != size {
				t.Fatalf("read %d bytes, error %v", len(body), err)
			}
			if b.took > tt.maxTaken {
				t.Errorf("took %d bytes from the budget; at most %d expected", b.took, tt.maxTaken)
			}
		})
	}
}

// blockingServer answers nothing until the request's context ends; sawDone is
// closed when the handler observed that.
func blockingServer(t *testing.T) (s *server, entered, sawDone chan struct{}) {
	t.Helper()
	entered = make(chan struct{}, 1)
	sawDone = make(chan struct{})
	release := make(chan struct{})
	var once sync.Once
	s = startServer(t, false, func(w http.ResponseWriter, r *http.Request) {
		select {
		case entered <- struct{}{}:
		default:
		}
		select {
		case <-r.Context().Done():
			once.Do(func() { close(sawDone) })
		case <-release:
		}
	})
	t.Cleanup(func() { close(release) }) // runs before s.Close
	return s, entered, sawDone
}

func waitClosed(t *testing.T, ch <-chan struct{}, what string) {
	t.Helper()
	select {
	case <-ch:
	case <-time.After(30 * time.Second): // a hang guard, not a timing assertion
		t.Fatalf("%s never happened", what)
	}
}

func TestFetchHonoursContext(t *testing.T) {
	tests := []struct {
		name    string
		timeout time.Duration // Options.Timeout
		ctx     func(t *testing.T, entered <-chan struct{}) context.Context
	}{
		{
			name: "caller deadline",
			ctx: func(t *testing.T, _ <-chan struct{}) context.Context {
				ctx, cancel := context.WithTimeout(t.Context(), 50*time.Millisecond)
				t.Cleanup(cancel)
				return ctx
			},
		},
		{
			name: "caller cancel",
			ctx: func(t *testing.T, entered <-chan struct{}) context.Context {
				ctx, cancel := context.WithCancel(t.Context())
				t.Cleanup(cancel)
				go func() {
					<-entered
					cancel()
				}()
				return ctx
			},
		},
		{
			name:    "options timeout",
			timeout: 50 * time.Millisecond,
			ctx:     func(t *testing.T, _ <-chan struct{}) context.Context { return t.Context() },
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			s, entered, sawDone := blockingServer(t)
			c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{Timeout: tt.timeout})
			body, err := c.Fetch(tt.ctx(t, entered), "Observation?"+secretQuery)
			if err == nil {
				t.Fatalf("Fetch returned %q from a server that never answers", body)
			}
			assertNoSecrets(t, err)
			waitClosed(t, sawDone, "the handler seeing its request context end")
		})
	}
}

func TestFetchAlreadyCancelledContext(t *testing.T) {
	s, _, _ := blockingServer(t)
	c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{})
	ctx, cancel := context.WithCancel(t.Context())
	cancel()
	body, err := c.Fetch(ctx, "Observation?"+secretQuery)
	if err == nil {
		t.Fatalf("Fetch with a cancelled context returned %q", body)
	}
	assertNoSecrets(t, err)
}

func TestFetchTransportFailures(t *testing.T) {
	t.Run("connection refused", func(t *testing.T) {
		s := startServer(t, false, nil)
		c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{})
		s.Close()
		body, err := c.Fetch(t.Context(), "Observation?"+secretQuery)
		if err == nil {
			t.Fatalf("Fetch from a closed server returned %q", body)
		}
		assertNoSecrets(t, err)
	})
	t.Run("untrusted certificate", func(t *testing.T) {
		s := startServer(t, true, nil)
		c, err := fhirclient.New(s.URL+"/fhir/r4", secretToken, fhirclient.Options{MaxResponseBytes: maxBody})
		if err != nil {
			t.Fatal(err)
		}
		body, err := c.Fetch(t.Context(), "Observation?"+secretQuery)
		if err == nil {
			t.Fatalf("Fetch over an untrusted certificate returned %q", body)
		}
		assertNoSecrets(t, err)
		if n := len(s.requests()); n != 0 {
			t.Errorf("server handled %d requests; want 0", n)
		}
	})
	t.Run("plain http to a TLS server", func(t *testing.T) {
		s := startServer(t, true, nil)
		c, err := fhirclient.New(strings.Replace(s.URL, "https://", "http://", 1)+"/fhir/r4", secretToken,
			fhirclient.Options{MaxResponseBytes: maxBody, AllowHTTPLoopback: true})
		if err != nil {
			t.Fatal(err)
		}
		body, err := c.Fetch(t.Context(), "Observation?"+secretQuery)
		if err == nil {
			t.Fatalf("Fetch of plain http from a TLS server returned %q", body)
		}
		assertNoSecrets(t, err)
	})
	t.Run("body cut short", func(t *testing.T) {
		s := startServer(t, false, func(w http.ResponseWriter, r *http.Request) {
			conn, buf, err := w.(http.Hijacker).Hijack()
			if err != nil {
				t.Error(err)
				return
			}
			defer conn.Close()
			_, _ = buf.WriteString("HTTP/1.1 200 OK\r\nContent-Length: 100\r\n\r\n" + secretQuery)
			_ = buf.Flush()
		})
		c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{})
		body, err := c.Fetch(t.Context(), "Observation?"+secretQuery)
		if err == nil {
			t.Fatalf("Fetch of a truncated body returned %q", body)
		}
		if errors.Is(err, fhirclient.ErrTooLarge) {
			t.Errorf("Fetch error = %v; the body was short, not large", err)
		}
		assertNoSecrets(t, err)
	})
	t.Run("garbage response", func(t *testing.T) {
		ln, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { ln.Close() })
		go func() {
			conn, err := ln.Accept()
			if err != nil {
				return
			}
			defer conn.Close()
			_, _ = bufio.NewReader(conn).ReadString('\n')
			_, _ = conn.Write([]byte("NOT HTTP " + secretQuery + " " + secretToken + "\r\n\r\n"))
		}()
		c, err := fhirclient.New("http://"+ln.Addr().String()+"/fhir/r4", secretToken,
			fhirclient.Options{MaxResponseBytes: maxBody, AllowHTTPLoopback: true})
		if err != nil {
			t.Fatal(err)
		}
		body, err := c.Fetch(t.Context(), "Observation?"+secretQuery)
		if err == nil {
			t.Fatalf("Fetch of a non-HTTP reply returned %q", body)
		}
		assertNoSecrets(t, err)
	})
}

// The patient id may sit in the path rather than the query.
func TestFetchErrorsOmitPatientIDInPath(t *testing.T) {
	s := startServer(t, false, func(w http.ResponseWriter, r *http.Request) {
		http.Error(w, "gone", http.StatusGone)
	})
	c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{})
	for _, ref := range []string{
		"Patient/" + secretPatient,
		"Patient/" + secretPatient + "/Observation?code=x",
		s.URL + "/fhir/r4/Patient/" + secretPatient + "?" + secretQuery,
	} {
		_, err := c.Fetch(t.Context(), ref)
		if !errors.Is(err, fhirclient.ErrHTTPStatus) {
			t.Fatalf("Fetch(%q) error = %v; want ErrHTTPStatus", ref, err)
		}
		assertNoSecrets(t, err)
	}
}

// Regression: when http.NewRequestWithContext rejected the URL built from a
// relative ref (a control character in the query), Fetch once wrapped the
// *url.Error as is, whose message quotes the whole URL, query included.
func TestFetchErrorOmitsQueryWithControlCharacter(t *testing.T) {
	s := startServer(t, false, nil)
	c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{})
	for _, ref := range []string{
		"Observation?" + secretQuery + "&code=\x7f",
		"Observation?" + secretQuery + "&note=a\nb",
	} {
		_, err := c.Fetch(t.Context(), ref)
		if err == nil {
			t.Fatalf("Fetch(%q) succeeded; want an error", ref)
		}
		assertNoSecrets(t, err)
	}
	if n := len(s.requests()); n != 0 {
		t.Errorf("server received %d requests; want 0", n)
	}
}

// Regression: dot segments were once compared textually, so
// "/fhir/r4/../../admin" counted as under the base path "/fhir/r4" and was
// sent, with the token, as is; a server that normalises the path serves
// /admin. Either refusing the ref or sending a cleaned path under the base
// would do.
func TestFetchDotSegmentsStayUnderBase(t *testing.T) {
	s := startServer(t, false, nil)
	refs := []string{
		"../../admin/x?" + secretQuery,
		"Patient/../../../admin?" + secretQuery,
		s.URL + "/fhir/r4/../../admin?" + secretQuery,
		s.URL + "/fhir/r4/%2e%2e/%2e%2e/admin?" + secretQuery,
	}
	for _, ref := range refs {
		c := newClient(t, s, "/fhir/r4", secretToken, fhirclient.Options{})
		_, err := c.Fetch(t.Context(), ref)
		assertNoSecrets(t, err)
	}
	for _, r := range s.requests() {
		if p := path.Clean(r.Path); p != "/fhir/r4" && !strings.HasPrefix(p, "/fhir/r4/") {
			t.Errorf("server saw a request for %q, which resolves to %q outside /fhir/r4", r.Path, p)
		}
	}
}
