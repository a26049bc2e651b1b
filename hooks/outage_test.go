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
	"sync/atomic"
	"testing"
	"time"
)

// unavailableAuth is an Authenticator whose check cannot be made: it
// waits for the call's deadline when wait is set (a hung replay store),
// then fails as the store adapter does.
type unavailableAuth struct {
	reason string
	wait   bool
}

func (a unavailableAuth) Authenticate(ctx context.Context, _, _ string) (Caller, error) {
	var cause error = errors.New("store down")
	if a.wait {
		<-ctx.Done()
		cause = ctx.Err()
	}
	return Caller{}, &Error{Kind: KindUnavailable, Reason: a.reason, Message: "the token's replay check could not be made", Err: cause}
}

// TestStoreOutageIsNeverAnAuthFailure: when the caller's token cannot be
// checked because the store is unavailable, the call and the feedback
// call are answered 503 with Retry-After, logged at WARN with the reason —
// never 401. With a hung store, the answer comes at the call's deadline.
func TestStoreOutageIsNeverAnAuthFailure(t *testing.T) {
	body := mustMarshal(t, requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign))
	for _, tc := range []struct {
		name string
		auth unavailableAuth
		path string
	}{
		{"store refuses", unavailableAuth{reason: ReasonStoreBusy}, "/cds-services/sodium-infusion-check"},
		{"store queue full", unavailableAuth{reason: ReasonStoreQueueFull}, "/cds-services/sodium-infusion-check"},
		{"store hangs", unavailableAuth{reason: ReasonStoreTimeout, wait: true}, "/cds-services/sodium-infusion-check"},
		{"store hangs on feedback", unavailableAuth{reason: ReasonStoreTimeout, wait: true}, "/cds-services/sodium-infusion-check/feedback"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			cfg := defaultServerConfig()
			cfg.CallTimeout = 300 * time.Millisecond
			cfg.Authenticator = tc.auth
			srv, _, logs := testServerWith(t, cfg, nil)
			client := &http.Client{Timeout: 5 * time.Second} // a hang fails the test, not the run
			start := time.Now()
			resp, err := client.Post(srv.URL+tc.path, "application/json", strings.NewReader(string(body)))
			if err != nil {
				t.Fatalf("no answer: %v", err)
			}
			resp.Body.Close()
			took := time.Since(start)
			if resp.StatusCode != http.StatusServiceUnavailable || resp.Header.Get("Retry-After") != fmt.Sprint(RetryAfterSeconds) {
				t.Fatalf("status %d Retry-After %q; want 503 with Retry-After", resp.StatusCode, resp.Header.Get("Retry-After"))
			}
			// Answered at the deadline plus a margin for a loaded machine.
			if took > cfg.CallTimeout+2*time.Second {
				t.Errorf("answered after %v with a %v call timeout", took, cfg.CallTimeout)
			}
			var line map[string]any
			if err := json.Unmarshal([]byte(strings.TrimSpace(logs.String())), &line); err != nil {
				t.Fatalf("log line: %v: %s", err, logs.String())
			}
			if line["level"] != "ERROR" || line["error"] != "transient "+tc.auth.reason || line["auth_refused"] != nil {
				t.Errorf("log line %v; want ERROR, error %q and no auth refusal", line, "transient "+tc.auth.reason)
			}
		})
	}
}

// TestSlowUploadIs408: a body still arriving at the call's deadline is
// answered 408, not a closed connection.
func TestSlowUploadIs408(t *testing.T) {
	cfg := defaultServerConfig()
	cfg.CallTimeout = 300 * time.Millisecond
	srv, _ := testServer(t, cfg)
	conn, err := net.Dial("tcp", srv.Listener.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	fmt.Fprintf(conn, "POST /cds-services/sodium-infusion-check HTTP/1.1\r\nHost: x\r\n"+
		"Content-Type: application/json\r\nContent-Length: 1000\r\n\r\n{\"hook\":")
	conn.SetReadDeadline(time.Now().Add(5 * time.Second))
	resp, err := http.ReadResponse(bufio.NewReader(conn), nil)
	if err != nil {
		t.Fatalf("no answer to a slow upload: %v", err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusRequestTimeout {
		t.Errorf("status %d, want 408", resp.StatusCode)
	}
}

// TestReadinessFollowsTheStore: /readyz answers 503 while the store does
// not answer, and 200 again once it does, with no restart.
func TestReadinessFollowsTheStore(t *testing.T) {
	var down atomic.Bool
	cfg := defaultServerConfig()
	cfg.StoreReady = func(ctx context.Context) error {
		if down.Load() {
			<-ctx.Done() // a hung database: the probe's own bound ends it
			return ctx.Err()
		}
		return nil
	}
	srv, _ := testServer(t, cfg)
	get := func() int {
		resp, err := http.Get(srv.URL + "/readyz")
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		return resp.StatusCode
	}
	for _, step := range []struct {
		down bool
		want int
	}{{false, 200}, {true, 503}, {false, 200}} {
		down.Store(step.down)
		if got := get(); got != step.want {
			t.Errorf("store down=%v: readyz %d, want %d", step.down, got, step.want)
		}
	}
}

// TestUnknownPrefetchKeysNotLogged: a prefetch key the service did not ask
// for is ignored and counted; its name (the EHR's text, here 100 KB) never
// reaches the log.
func TestUnknownPrefetchKeysNotLogged(t *testing.T) {
	srv, _, logs := testServerWith(t, defaultServerConfig(), nil)
	m := requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign)
	key := "k" + strings.Repeat("x", 100<<10)
	m["prefetch"].(map[string]any)[key] = "not a resource"
	resp, b := post(t, srv.URL+"/cds-services/sodium-infusion-check", mustMarshal(t, m), nil)
	if resp.StatusCode != 200 {
		t.Fatalf("status %d: %.200s", resp.StatusCode, b)
	}
	l := logs.String()
	if len(l) > 4<<10 || strings.Contains(l, "xxxxxxxx") {
		t.Errorf("the log holds the EHR's key name (%d bytes)", len(l))
	}
	if !strings.Contains(l, `"prefetch_unknown_keys":1`) {
		t.Errorf("the unknown key is not counted: %.500s", l)
	}
}

// TestBodyHeldInProcessBudget: a request body is held in the process's
// byte budget, declared or chunked; one that does not fit is a 503
// (budget-exhausted) with Retry-After, and every call gives back what it
// held.
func TestBodyHeldInProcessBudget(t *testing.T) {
	body := mustMarshal(t, requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign))
	for _, tc := range []struct {
		name    string
		limit   int64
		chunked bool
		want    int
	}{
		{"declared, fits", int64(len(body)), false, 200},
		{"chunked, fits", int64(len(body)), true, 200},
		{"declared, does not fit", int64(len(body)) - 1, false, 503},
		{"chunked, does not fit", int64(len(body)) - 1, true, 503},
	} {
		t.Run(tc.name, func(t *testing.T) {
			e := testEngine(t, nil)
			e.budget = NewProcessBudget(tc.limit)
			srv := httptest.NewServer(NewHandler(e, defaultServerConfig(), &Health{}, slog.New(slog.DiscardHandler)))
			defer srv.Close()
			var r io.Reader = bytes.NewReader(body)
			if tc.chunked {
				r = io.MultiReader(r) // no length known: sent chunked
			}
			resp, err := http.Post(srv.URL+"/cds-services/sodium-infusion-check", "application/json", r)
			if err != nil {
				t.Fatal(err)
			}
			resp.Body.Close()
			if resp.StatusCode != tc.want || (tc.want == 503 && resp.Header.Get("Retry-After") == "") {
				t.Errorf("status %d Retry-After %q; want %d", resp.StatusCode, resp.Header.Get("Retry-After"), tc.want)
			}
			if n := e.budget.InUse(); n != 0 {
				t.Errorf("%d bytes still held after the call", n)
			}
		})
	}
}

// TestDroppedResourcesCounted: the request line counts the resources not
// used by reason, never naming them.
func TestDroppedResourcesCounted(t *testing.T) {
	srv, _, logs := testServerWith(t, defaultServerConfig(), nil)
	m := requestMap(t, "01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign)
	sodium := m["prefetch"].(map[string]any)["sodium"].(map[string]any)
	sodium["entry"] = append(sodium["entry"].([]any), map[string]any{"resource": map[string]any{
		"resourceType": "Observation", "id": "someone-elses", "status": "final",
		"code":    map[string]any{"coding": []any{map[string]any{"system": "http://loinc.org", "code": "2951-2"}}},
		"subject": map[string]any{"reference": "Patient/another-patient"}, "effectiveDateTime": "2026-11-20T06:00:00Z",
		"valueQuantity": map[string]any{"value": 120, "unit": "mmol/L", "system": "http://unitsofmeasure.org", "code": "mmol/L"}}})
	resp, b := post(t, srv.URL+"/cds-services/sodium-infusion-check", mustMarshal(t, m), nil)
	if resp.StatusCode != 200 {
		t.Fatalf("status %d: %.200s", resp.StatusCode, b)
	}
	l := logs.String()
	if !strings.Contains(l, `"dropped":"`) || !strings.Contains(l, "not-this-patient=1") {
		t.Errorf("the request line does not count the other patient's result: %s", l)
	}
	if strings.Contains(l, "someone-elses") || strings.Contains(l, "another-patient") {
		t.Errorf("the request line names a resource: %s", l)
	}
}
