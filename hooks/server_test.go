package hooks

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/gin-gonic/gin"
)

func testServer(t *testing.T, cfg ServerConfig) (*httptest.Server, *Health) {
	srv, h, _ := testServerWith(t, cfg, nil)
	return srv, h
}

// testServerWith starts a handler whose engine uses f, logging to the
// returned buffer.
func testServerWith(t *testing.T, cfg ServerConfig, f FetcherFactory) (*httptest.Server, *Health, *lockedBuffer) {
	t.Helper()
	gin.SetMode(gin.TestMode)
	h := &Health{}
	logs := &lockedBuffer{}
	srv := httptest.NewServer(NewHandler(testEngine(t, f), cfg, h, slog.New(slog.NewJSONHandler(logs, nil))))
	t.Cleanup(srv.Close)
	return srv, h, logs
}

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

func defaultServerConfig() ServerConfig {
	return ServerConfig{MaxBodyBytes: 1 << 20, CallTimeout: 5 * time.Second, CORSOrigins: []string{"https://ehr.example.org"}}
}

func TestDiscovery(t *testing.T) {
	srv, _ := testServer(t, defaultServerConfig())
	resp, err := http.Get(srv.URL + "/cds-services")
	if err != nil {
		t.Fatal(err)
	}
	body, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != 200 {
		t.Fatalf("status %d", resp.StatusCode)
	}
	if err := CheckNoEmpty(body); err != nil {
		t.Errorf("discovery breaks the no-null/no-empty rule: %v", err)
	}
	var d Discovery
	if err := json.Unmarshal(body, &d); err != nil {
		t.Fatal(err)
	}
	// The service/hook pairs the design fixes (DESIGN §2.2).
	want := map[string]bool{
		"sodium-infusion-check/order-select": true, "sodium-infusion-check/order-sign": true,
		"sodium-drug-risk/order-select": true, "sodium-drug-risk/order-sign": true,
		"sodium-chart-review/patient-view": true,
	}
	for _, s := range d.Services {
		key := s.ID + "/" + s.Hook
		if !want[key] {
			t.Errorf("unexpected service %s", key)
		}
		delete(want, key)
		if s.Title == "" || s.Description == "" || s.UsageRequirements == "" || len(s.Prefetch) == 0 {
			t.Errorf("%s lacks title, description, usageRequirements or prefetch", key)
		}
		if s.Prefetch["patient"] != "Patient/{{context.patientId}}" || s.Prefetch["sodium"] == "" {
			t.Errorf("%s: prefetch lacks patient or sodium: %v", key, s.Prefetch)
		}
	}
	for k := range want {
		t.Errorf("missing service %s", k)
	}
}

func post(t *testing.T, url string, body []byte, header map[string]string) (*http.Response, []byte) {
	t.Helper()
	req, err := http.NewRequest(http.MethodPost, url, bytes.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	req.Header.Set("Content-Type", "application/json")
	for k, v := range header {
		req.Header.Set(k, v)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp, b
}

// TestServiceCallStatus walks every status path of DESIGN §2.1.
func TestServiceCallStatus(t *testing.T) {
	srv, _ := testServer(t, defaultServerConfig())
	valid := requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign)
	noPrefetch := requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign)
	delete(noPrefetch, "prefetch")
	badField := requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign)
	delete(badField["context"].(map[string]any), "patientId")
	big := bytes.Repeat([]byte(" "), 1<<20+1)

	for _, tc := range []struct {
		name, path string
		body       []byte
		status     int
		expression string
	}{
		{"order-sign with prefetch", "/cds-services/sodium-infusion-check", mustMarshal(t, valid), 200, ""},
		{"missing field", "/cds-services/sodium-infusion-check", mustMarshal(t, badField), 400, "context.patientId"},
		{"not JSON", "/cds-services/sodium-infusion-check", []byte("{"), 400, ""},
		{"unknown service", "/cds-services/no-such-service", mustMarshal(t, valid), 404, ""},
		{"unknown path", "/cds-services/sodium-infusion-check/extra/path", mustMarshal(t, valid), 404, ""},
		{"no prefetch and no server", "/cds-services/sodium-infusion-check", mustMarshal(t, noPrefetch), 412, "prefetch"},
		{"body too large", "/cds-services/sodium-infusion-check", big, 413, ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			resp, body := post(t, srv.URL+tc.path, tc.body, nil)
			if resp.StatusCode != tc.status {
				t.Fatalf("status %d, want %d: %s", resp.StatusCode, tc.status, body)
			}
			if ct := resp.Header.Get("Content-Type"); ct != "application/json" {
				t.Errorf("content type %q", ct)
			}
			if tc.status == 200 {
				var r Response
				if err := json.Unmarshal(body, &r); err != nil || r.Cards == nil {
					t.Fatalf("not a CDS Hooks response: %s", body)
				}
				if err := CheckNoEmpty(body, "cards"); err != nil {
					t.Errorf("response breaks the no-null/no-empty rule: %v", err)
				}
				return
			}
			var oo OperationOutcome
			if err := json.Unmarshal(body, &oo); err != nil || oo.ResourceType != "OperationOutcome" || len(oo.Issue) != 1 {
				t.Fatalf("error body is not an OperationOutcome: %s", body)
			}
			if tc.expression != "" && (len(oo.Issue[0].Expression) != 1 || oo.Issue[0].Expression[0] != tc.expression) {
				t.Errorf("expression %v, want [%s]", oo.Issue[0].Expression, tc.expression)
			}
			if err := CheckNoEmpty(body); err != nil {
				t.Errorf("error body breaks the no-null/no-empty rule: %v", err)
			}
		})
	}
}

// TestRequestBodyFraming: a body is read whole whether its length is
// declared (Content-Length) or not (chunked), refused with 413 over the
// limit either way, and refused with 400 when it ends before its declared
// length.
func TestRequestBodyFraming(t *testing.T) {
	cfg := defaultServerConfig()
	srv, _ := testServer(t, cfg)
	url := srv.URL + "/cds-services/sodium-infusion-check"
	valid := mustMarshal(t, requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign))
	big := bytes.Repeat([]byte(" "), int(cfg.MaxBodyBytes)+1)
	for _, tc := range []struct {
		name    string
		body    []byte
		chunked bool
		status  int
	}{
		{"declared length", valid, false, 200},
		{"chunked", valid, true, 200},
		{"declared length at the limit", big[1:], false, 400}, // read whole: all white space is an empty body
		{"chunked at the limit", big[1:], true, 400},
		{"declared length over the limit", big, false, 413},
		{"chunked over the limit", big, true, 413},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var body io.Reader = bytes.NewReader(tc.body)
			if tc.chunked {
				body = io.MultiReader(body) // no length known: sent chunked
			}
			req, err := http.NewRequest(http.MethodPost, url, body)
			if err != nil {
				t.Fatal(err)
			}
			req.Header.Set("Content-Type", "application/json")
			resp, err := http.DefaultClient.Do(req)
			if err != nil {
				t.Fatal(err)
			}
			defer resp.Body.Close()
			got, _ := io.ReadAll(resp.Body)
			if resp.StatusCode != tc.status {
				t.Errorf("status %d, want %d: %s", resp.StatusCode, tc.status, got)
			}
			if (req.ContentLength > 0) == tc.chunked {
				t.Errorf("request content length %d, chunked %v: the case does not test what it says", req.ContentLength, tc.chunked)
			}
		})
	}
	t.Run("shorter than declared", func(t *testing.T) {
		conn, err := net.Dial("tcp", srv.Listener.Addr().String())
		if err != nil {
			t.Fatal(err)
		}
		defer conn.Close()
		fmt.Fprintf(conn, "POST /cds-services/sodium-infusion-check HTTP/1.1\r\nHost: x\r\n"+
			"Content-Type: application/json\r\nContent-Length: %d\r\n\r\n", len(valid))
		conn.Write(valid[:len(valid)/2])
		conn.(*net.TCPConn).CloseWrite()
		resp, err := http.ReadResponse(bufio.NewReader(conn), nil)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		if resp.StatusCode != 400 {
			t.Errorf("status %d, want 400", resp.StatusCode)
		}
	})
}

// refuseAll is an Authenticator that trusts nobody.
type refuseAll struct{}

func (refuseAll) Authenticate(context.Context, string, string) (Caller, error) {
	return Caller{}, errors.New("no trusted issuer")
}

// TestUnauthenticatedBodyNotRead: a caller that fails authentication is
// answered 401 before its body is read, however large it says it is.
func TestUnauthenticatedBodyNotRead(t *testing.T) {
	cfg := defaultServerConfig()
	cfg.Authenticator = refuseAll{}
	srv, _ := testServer(t, cfg)
	conn, err := net.Dial("tcp", srv.Listener.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	// Headers only: the declared body never comes, so only an answer given
	// without reading it can arrive.
	fmt.Fprintf(conn, "POST /cds-services/sodium-infusion-check HTTP/1.1\r\nHost: x\r\n"+
		"Content-Type: application/json\r\nContent-Length: %d\r\n\r\n", cfg.MaxBodyBytes)
	conn.SetReadDeadline(time.Now().Add(5 * time.Second))
	resp, err := http.ReadResponse(bufio.NewReader(conn), nil)
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusUnauthorized {
		t.Errorf("status %d, want 401", resp.StatusCode)
	}
}

func TestCORS(t *testing.T) {
	srv, _ := testServer(t, defaultServerConfig())
	for _, tc := range []struct {
		origin     string
		status     int
		allowedHdr string
	}{
		{"https://ehr.example.org", 204, "https://ehr.example.org"},
		{"https://evil.example.net", 403, ""},
	} {
		req, _ := http.NewRequest(http.MethodOptions, srv.URL+"/cds-services/sodium-drug-risk", nil)
		req.Header.Set("Origin", tc.origin)
		req.Header.Set("Access-Control-Request-Method", "POST")
		req.Header.Set("Access-Control-Request-Headers", "authorization,content-type")
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		if resp.StatusCode != tc.status || resp.Header.Get("Access-Control-Allow-Origin") != tc.allowedHdr {
			t.Errorf("%s: status %d allow-origin %q; want %d %q", tc.origin, resp.StatusCode,
				resp.Header.Get("Access-Control-Allow-Origin"), tc.status, tc.allowedHdr)
		}
		if tc.status == 204 && !strings.Contains(resp.Header.Get("Access-Control-Allow-Headers"), "Authorization") {
			t.Errorf("preflight does not allow the Authorization header")
		}
	}
	// A simple GET from an allowed origin carries the header; no wildcard ever.
	req, _ := http.NewRequest(http.MethodGet, srv.URL+"/cds-services", nil)
	req.Header.Set("Origin", "https://ehr.example.org")
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if got := resp.Header.Get("Access-Control-Allow-Origin"); got != "https://ehr.example.org" {
		t.Errorf("GET allow-origin %q", got)
	}
}

func TestHealthAndReadiness(t *testing.T) {
	srv, health := testServer(t, defaultServerConfig())
	get := func(path string) int {
		resp, err := http.Get(srv.URL + path)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		return resp.StatusCode
	}
	if get("/healthz") != 200 || get("/readyz") != 200 {
		t.Fatal("not healthy and ready at start")
	}
	health.Drain()
	if get("/healthz") != 200 || get("/readyz") != 503 {
		t.Error("while draining: want healthz 200 and readyz 503")
	}
}

// blockingFetcher blocks until the call's context ends.
type blockingFetcher struct{}

func (blockingFetcher) Fetch(ctx context.Context, _ string) ([]byte, error) {
	<-ctx.Done()
	return nil, ctx.Err()
}

// TestServiceCallFailures covers the status paths that need a FHIR server,
// a fault, a wrong method, media type or origin (DESIGN §2.1).
func TestServiceCallFailures(t *testing.T) {
	fetchCall := requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign)
	delete(fetchCall, "prefetch")
	fetchCall["fhirServer"] = "https://ehr.example.org/fhir"
	fetchCall["fhirAuthorization"] = map[string]any{"access_token": "secret-token", "token_type": "Bearer",
		"expires_in": 60, "scope": "patient/*.read", "subject": "halite"}
	body := mustMarshal(t, fetchCall)
	const path = "/cds-services/sodium-infusion-check"
	cfg := defaultServerConfig()
	cfg.CallTimeout = 200 * time.Millisecond
	for _, tc := range []struct {
		name    string
		factory FetcherFactory
		method  string
		header  map[string]string
		status  int
	}{
		{"FHIR server fails", func(string, *FHIRAuthorization, Caller, *CallBudget) (Fetcher, error) { return &mapFetcher{}, nil },
			http.MethodPost, nil, 412},
		{"time budget runs out", func(string, *FHIRAuthorization, Caller, *CallBudget) (Fetcher, error) { return blockingFetcher{}, nil },
			http.MethodPost, nil, 503},
		{"panic is a 500", func(string, *FHIRAuthorization, Caller, *CallBudget) (Fetcher, error) { panic("test fault") },
			http.MethodPost, nil, 500},
		{"text/plain is refused", nil, http.MethodPost, map[string]string{"Content-Type": "text/plain"}, 415},
		{"POST from a foreign origin", nil, http.MethodPost, map[string]string{"Origin": "https://evil.example.net"}, 403},
		{"wrong method", nil, http.MethodPut, nil, 405},
	} {
		t.Run(tc.name, func(t *testing.T) {
			srv, _, logs := testServerWith(t, cfg, tc.factory)
			req, _ := http.NewRequest(tc.method, srv.URL+path, bytes.NewReader(body))
			req.Header.Set("Content-Type", "application/json")
			for k, v := range tc.header {
				req.Header.Set(k, v)
			}
			resp, err := http.DefaultClient.Do(req)
			if err != nil {
				t.Fatal(err)
			}
			b, _ := io.ReadAll(resp.Body)
			resp.Body.Close()
			if resp.StatusCode != tc.status {
				t.Fatalf("status %d, want %d: %s", resp.StatusCode, tc.status, b)
			}
			var oo OperationOutcome
			if err := json.Unmarshal(b, &oo); err != nil || oo.ResourceType != "OperationOutcome" {
				t.Errorf("error body is not an OperationOutcome: %s", b)
			}
			for _, secret := range []string{"secret-token", "pt-alder", "test fault"} {
				if strings.Contains(string(b), secret) {
					t.Errorf("response leaks %q: %s", secret, b)
				}
			}
			if strings.Contains(logs.String(), "secret-token") || strings.Contains(logs.String(), "pt-alder") {
				t.Errorf("log leaks the token or patient id: %s", logs.String())
			}
		})
	}
}

// TestErrorLogsCarryNoRequestValues: a 400 about a selection logs the
// field, not the reference the EHR sent.
func TestErrorLogsCarryNoRequestValues(t *testing.T) {
	srv, _, logs := testServerWith(t, defaultServerConfig(), nil)
	m := requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSelect)
	m["context"].(map[string]any)["selections"] = []any{"MedicationRequest/secret-order-id"}
	resp, _ := post(t, srv.URL+"/cds-services/sodium-infusion-check", mustMarshal(t, m), nil)
	if resp.StatusCode != 400 {
		t.Fatalf("status %d", resp.StatusCode)
	}
	if l := logs.String(); strings.Contains(l, "secret-order-id") || !strings.Contains(l, "context.selections[0]") {
		t.Errorf("log should name the field and not the value: %s", l)
	}
}
