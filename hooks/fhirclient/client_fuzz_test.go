package fhirclient_test

import (
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"strings"
	"sync"
	"testing"

	"github.com/halite-cds/halite/hooks/fhirclient"
)

type roundTripFunc func(*http.Request) (*http.Response, error)

func (f roundTripFunc) RoundTrip(r *http.Request) (*http.Response, error) { return f(r) }

type failingReader struct{}

func (failingReader) Read([]byte) (int, error) { return 0, errors.New("connection reset") }

// FuzzFetch checks, for any ref and any redirect target, that every request
// that leaves the client goes to the fhirServer's scheme and host, under its
// base path (textually), with the token; that no redirect is followed (one
// request at most, and a redirect with a usable Location is ErrRedirect);
// and that no error carries the token, the query string or (unless the ref
// spells it) the patient id.
func FuzzFetch(f *testing.F) {
	for _, seed := range []struct {
		ref, loc string
		mode     uint8
	}{
		{"Patient/p1", "", 0},
		{"Observation?code=x", "", 1},
		{"Observation", "", 2},
		{"Observation", "", 3},
		{"Observation", "/fhir/r4/Observation?page=2", 4},
		{"Observation", "https://evil.example.org/fhir/r4", 4},
		{"Observation", "//evil.example.org/fhir/r4", 4},
		{"Observation", "http://fhir.example.org/fhir/r4", 4},
		{"Observation", "/other", 4},
		{"Observation", "%zz", 4},
		{"https://fhir.example.org/fhir/r4/Observation", "", 0},
		{"https://fhir.example.org/fhir/r4x", "", 0},
		{"https://evil.example.org/fhir/r4", "", 0},
		{"https://fhir.example.org:443/fhir/r4", "", 0},
		{"https://user@fhir.example.org/fhir/r4", "", 1},
		{"//evil.example.org/fhir/r4", "", 0},
		{"https:evil.example.org", "", 0},
		{"Observation?code=http://loinc.org|2857-1", "", 1},
		{"Observation/x://y", "", 0},
		{"Observation#frag", "", 1},
		{"../../admin", "", 1},
		{"", "", 1},
		{"?", "", 1},
		{"/", "", 1},
	} {
		f.Add(seed.ref, seed.loc, seed.mode)
	}
	f.Fuzz(func(t *testing.T, ref, loc string, mode uint8) {
		for _, basePath := range []string{"/fhir/r4", ""} {
			var (
				mu    sync.Mutex
				calls int
			)
			rt := roundTripFunc(func(r *http.Request) (*http.Response, error) {
				mu.Lock()
				calls++
				n := calls
				mu.Unlock()
				if r.URL.Scheme != "https" || r.URL.Host != "fhir.example.org" {
					t.Errorf("ref %q loc %q: request to %s://%s", ref, loc, r.URL.Scheme, r.URL.Host)
				}
				if !strings.HasPrefix(r.URL.Path, basePath+"/") && r.URL.Path != basePath {
					t.Errorf("ref %q loc %q: request path %q outside %q", ref, loc, r.URL.Path, basePath)
				}
				if got := r.Header.Get("Authorization"); got != "Bearer "+secretToken {
					t.Errorf("ref %q loc %q: Authorization %q", ref, loc, got)
				}
				if n > 1 {
					t.Errorf("ref %q loc %q: %d requests; a redirect was followed", ref, loc, n)
				}
				resp := &http.Response{
					StatusCode: http.StatusOK,
					Header:     http.Header{},
					Body:       io.NopCloser(strings.NewReader("{}")),
					Request:    r,
				}
				switch mode % 5 {
				case 1:
					resp.StatusCode = http.StatusInternalServerError
				case 2:
					return nil, fmt.Errorf("dial %s with %s: refused", r.URL, r.Header.Get("Authorization"))
				case 3:
					resp.Body = io.NopCloser(io.MultiReader(strings.NewReader("{"), failingReader{}))
				case 4:
					if n == 1 {
						resp.StatusCode = http.StatusFound
						resp.Header.Set("Location", loc)
					}
				}
				return resp, nil
			})
			c, err := fhirclient.New("https://fhir.example.org"+basePath, secretToken,
				fhirclient.Options{MaxResponseBytes: 1 << 10, Transport: rt})
			if err != nil {
				t.Fatal(err)
			}
			_, err = c.Fetch(t.Context(), ref+"?"+secretQuery)
			mu.Lock()
			sent := calls
			mu.Unlock()
			if mode%5 == 4 && loc != "" && sent == 1 {
				// The client reads Location before it asks whether to follow
				// it; one it cannot parse fails as a transport error.
				if _, perr := url.Parse(loc); err == nil || (perr == nil && !errors.Is(err, fhirclient.ErrRedirect)) {
					t.Errorf("ref %q loc %q: redirect answered %v; want ErrRedirect", ref, loc, err)
				}
			}
			if err == nil {
				continue
			}
			msg := err.Error()
			if strings.Contains(msg, secretToken) || strings.Contains(msg, secretQuery) {
				t.Errorf("ref %q loc %q: error %q carries a secret", ref, loc, msg)
			}
			if !strings.Contains(ref, secretPatient) && !strings.Contains(ref, "%") &&
				strings.Contains(msg, secretPatient) {
				t.Errorf("ref %q loc %q: error %q carries the patient id", ref, loc, msg)
			}
		}
	})
}
