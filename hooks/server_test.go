package hooks

import (
	"bytes"
	"encoding/json"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/gin-gonic/gin"
)

func testServer(t *testing.T, cfg ServerConfig) (*httptest.Server, *Health) {
	t.Helper()
	gin.SetMode(gin.TestMode)
	h := &Health{}
	srv := httptest.NewServer(NewHandler(testEngine(t, nil), cfg, h, slog.New(slog.NewTextHandler(io.Discard, nil))))
	t.Cleanup(srv.Close)
	return srv, h
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
