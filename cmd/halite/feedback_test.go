package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/feedback"
)

// TestFeedbackEndToEnd: cards returned by serve are in the card log before
// the response; feedback on them is validated, stored once per outcome,
// and survives the restart; bad feedback is a 400 naming the field.
func TestFeedbackEndToEnd(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	db := filepath.Join(t.TempDir(), "halite.db")
	t.Setenv("HALITE_STORE_DSN", "sqlite:"+db)
	base, _, stop := startServe(t)
	scenario := filepath.Join("..", "..", "testdata", "scenarios", "14-hypona-3pct-overshoot.json")
	var req bytes.Buffer
	if err := run(context.Background(), []string{"request", "--hook", "order-sign", "--service", "sodium-infusion-check", scenario}, &req, io.Discard); err != nil {
		t.Fatal(err)
	}
	// The server evaluates at the current time; the scenario's sodium is from 2026-11-20, so the
	// card is the "cannot project" one, with a re-check suggestion — enough to give feedback on.
	resp, err := http.Post(base+"/cds-services/sodium-infusion-check", "application/json", &req)
	if err != nil {
		t.Fatal(err)
	}
	var r hooks.Response
	json.NewDecoder(resp.Body).Decode(&r)
	resp.Body.Close()
	if len(r.Cards) == 0 || len(r.Cards[0].Suggestions) == 0 {
		t.Fatalf("want a card with suggestions: %+v", r)
	}
	card, sugg := r.Cards[0].UUID, r.Cards[0].Suggestions[0].UUID
	post := func(body string) (int, string) {
		resp, err := http.Post(base+"/cds-services/sodium-infusion-check/feedback", "application/json", strings.NewReader(body))
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		return resp.StatusCode, string(b)
	}
	accepted := fmt.Sprintf(`{"feedback":[{"card":%q,"outcome":"accepted","acceptedSuggestions":[{"id":%q}],"outcomeTimestamp":"2026-12-02T10:00:00Z"}]}`, card, sugg)
	for i := 0; i < 2; i++ { // a repeat is idempotent
		if status, body := post(accepted); status != http.StatusOK || body != "" {
			t.Fatalf("accepted feedback: %d %s", status, body)
		}
	}
	overridden := fmt.Sprintf(`{"feedback":[{"card":%q,"outcome":"overridden","overrideReason":{"reason":{"system":"https://halite-cds.github.io/fhir/CodeSystem/override-reason","code":"local-protocol"},"userComment":"per protocol"},"outcomeTimestamp":"2026-12-02T10:05:00Z"}]}`, card)
	if status, body := post(overridden); status != http.StatusOK {
		t.Fatalf("overridden feedback: %d %s", status, body)
	}
	for want, body := range map[string]string{
		"feedback[0].card":                `{"feedback":[{"card":"no-such-card","outcome":"overridden","outcomeTimestamp":"2026-12-02T10:00:00Z"}]}`,
		"feedback[0].outcome":             fmt.Sprintf(`{"feedback":[{"card":%q,"outcome":"ignored","outcomeTimestamp":"2026-12-02T10:00:00Z"}]}`, card),
		"feedback[0].acceptedSuggestions": fmt.Sprintf(`{"feedback":[{"card":%q,"outcome":"accepted","outcomeTimestamp":"2026-12-02T10:00:00Z"}]}`, card),
		"feedback[0].outcomeTimestamp":    fmt.Sprintf(`{"feedback":[{"card":%q,"outcome":"overridden","outcomeTimestamp":"yesterday"}]}`, card),
		"feedback[0].overrideReason":      fmt.Sprintf(`{"feedback":[{"card":%q,"outcome":"overridden","overrideReason":{},"outcomeTimestamp":"2026-12-02T10:00:00Z"}]}`, card),
		"feedback":                        `{"feedback":[]}`,
	} {
		if status, resp := post(body); status != http.StatusBadRequest || !strings.Contains(resp, want) {
			t.Errorf("%s: %d %s", want, status, resp)
		}
	}
	resp, err = http.Post(base+"/cds-services/sodium-drug-risk/feedback", "application/json", strings.NewReader(accepted))
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusBadRequest {
		t.Errorf("feedback about another service's card: %d", resp.StatusCode)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	for _, f := range []string{db, db + "-wal"} {
		if data, err := os.ReadFile(f); err == nil && bytes.Contains(data, []byte("pt-nyssa")) {
			t.Errorf("%s holds the patient reference in clear", f)
		}
	}
	st, err := feedback.OpenSQLite(db, feedback.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	cards, fb, err := st.Counts(context.Background())
	if err != nil || cards != int64(len(r.Cards)) || fb != 2 {
		t.Errorf("after restart: %d cards, %d feedback (%v); want %d and 2", cards, fb, err, len(r.Cards))
	}
}

// TestFeedbackFromTheCallerShown: with authentication on, feedback is
// taken only from the issuer and tenant that were shown the card; a call
// with one bad entry stores none; an unauthenticated client is refused
// before it learns whether a service exists.
func TestFeedbackFromTheCallerShown(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	db := filepath.Join(t.TempDir(), "halite.db")
	t.Setenv("HALITE_STORE_DSN", "sqlite:"+db)
	dir, cfgPath := localIssuer(t)
	base, _, stop := startServe(t, "--config", cfgPath)
	token := func(path, tenant string) string {
		var out bytes.Buffer
		if err := run(context.Background(), []string{"token", "--key", filepath.Join(dir, "issuer-private.jwk"), "--iss", "https://ehr.example.org",
			"--aud", "http://127.0.0.1" + path, "--tenant", tenant}, &out, io.Discard); err != nil {
			t.Fatal(err)
		}
		return strings.TrimSpace(out.String())
	}
	post := func(path, bearer, body string) (int, string) {
		authz := ""
		if bearer != "" {
			authz = "Bearer " + bearer
		}
		return postJSON(t, base+path, authz, []byte(body))
	}
	const svc = "/cds-services/sodium-infusion-check"
	demo, _ := os.ReadFile(filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json"))
	status, body := post(svc, token(svc, "ward-a"), string(demo))
	var r hooks.Response
	if err := json.Unmarshal([]byte(body), &r); status != http.StatusOK || err != nil || len(r.Cards) == 0 {
		t.Fatalf("service call: %d %s", status, body)
	}
	entry := func(card string) string {
		return fmt.Sprintf(`{"card":%q,"outcome":"overridden","outcomeTimestamp":"2026-12-02T10:00:00Z"}`, card)
	}
	good := `{"feedback":[` + entry(r.Cards[0].UUID) + `]}`
	if status, body := post(svc+"/feedback", token(svc+"/feedback", "ward-b"), good); status != http.StatusBadRequest || !strings.Contains(body, "feedback[0].card") {
		t.Errorf("feedback from another tenant: %d %s; want 400 naming feedback[0].card", status, body)
	}
	mixed := `{"feedback":[` + entry(r.Cards[0].UUID) + "," + entry("no-such-card") + `]}`
	if status, body := post(svc+"/feedback", token(svc+"/feedback", "ward-a"), mixed); status != http.StatusBadRequest || !strings.Contains(body, "feedback[1].card") {
		t.Errorf("feedback with one unknown card: %d %s; want 400 naming feedback[1].card", status, body)
	}
	if status, body := post(svc+"/feedback", token(svc+"/feedback", "ward-a"), good); status != http.StatusOK {
		t.Errorf("feedback from the tenant shown: %d %s", status, body)
	}
	for _, path := range []string{"/cds-services/no-such-service/feedback", svc + "/feedback"} {
		if status, _ := post(path, "", good); status != http.StatusUnauthorized {
			t.Errorf("unauthenticated feedback to %s: %d, want 401", path, status)
		}
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	st, err := feedback.OpenSQLite(db, feedback.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	if _, fb, err := st.Counts(context.Background()); err != nil || fb != 1 {
		t.Errorf("%d feedback records (%v); want 1: the refused calls stored nothing", fb, err)
	}
}
