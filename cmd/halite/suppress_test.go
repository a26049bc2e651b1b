package main

import (
	"bytes"
	"context"
	"crypto/rand"
	"database/sql"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/feedback"
)

// hashKey writes a 32-byte patient-hash key and returns its path.
func hashKey(t *testing.T) string {
	t.Helper()
	key := make([]byte, 32)
	rand.Read(key)
	path := filepath.Join(t.TempDir(), "hash.key")
	if err := os.WriteFile(path, key, 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// TestEvalHoldsBackRepeats: eval with a card log holds back what the
// server would — a warning repeated at the next chart opening, a draft's
// card at signing after its selection — reports each in its data report,
// never holds back a critical card, shows all again after the interval,
// and counts every held-back finding in the card log.
func TestEvalHoldsBackRepeats(t *testing.T) {
	db := filepath.Join(t.TempDir(), "cards.db")
	key := hashKey(t)
	evalAt := func(hook, scenario, at string) (string, error) {
		var out bytes.Buffer
		err := run(context.Background(), []string{"eval", "--hook", hook, "--at", at, "--card-log", "sqlite:" + db,
			"--hash-key-file", key, filepath.Join("..", "..", "testdata", "scenarios", scenario)}, &out, io.Discard)
		return out.String(), err
	}
	const s09, at = "09-rapid-correction-high-risk.json", "2026-11-20T08:00:00Z"
	first, err := evalAt("patient-view", s09, at)
	if code := exitCode(err, os.Stderr); code != exitCritical || strings.Contains(first, "held back") {
		t.Fatalf("first chart opening: exit %d (%v)\n%s", code, err, first)
	}
	second, err := evalAt("patient-view", s09, "2026-11-20T09:00:00Z")
	if code := exitCode(err, os.Stderr); code != exitCritical {
		t.Fatalf("second chart opening: the critical card must still show, exit %d (%v)\n%s", code, err, second)
	}
	for _, want := range []string{"CRITICAL\t", "held back  WARNING sodium-profound-or-falling: chart-unchanged (repeats the card of 2026-11-20T08:00:00Z)",
		"held back  INFO siadh-lab-pattern: chart-unchanged"} {
		if !strings.Contains(strings.Join(strings.Fields(second), " "), strings.Join(strings.Fields(want), " ")) {
			t.Errorf("second chart opening lacks %q:\n%s", want, second)
		}
	}
	if strings.Count(second, "held back") != 2 {
		t.Errorf("want exactly the warning and the info held back:\n%s", second)
	}
	later, _ := evalAt("patient-view", s09, "2026-11-20T21:00:01Z")
	if strings.Contains(later, "held back") {
		t.Errorf("after the 12-h interval every card shows again:\n%s", later)
	}
	const s14, at14 = "14-hypona-3pct-overshoot.json", "2026-11-20T08:00:00Z"
	sel, err := evalAt("order-select", s14, at14)
	if exitCode(err, os.Stderr) != exitWarning || strings.Contains(sel, "held back") {
		t.Fatalf("order-select: %v\n%s", err, sel)
	}
	sign, err := evalAt("order-sign", s14, "2026-11-20T08:03:00Z")
	if exitCode(err, os.Stderr) != exitOK || !strings.Contains(sign, "sodium-projected-over-limit: select-to-sign") {
		t.Errorf("order-sign of the same draft, unchanged: %v\n%s", err, sign)
	}
	st, err := feedback.OpenSQLite(db, feedback.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	rep, err := st.Report(context.Background(), time.Date(2026, 11, 19, 0, 0, 0, 0, time.UTC), time.Date(2026, 11, 22, 0, 0, 0, 0, time.UTC))
	if err != nil {
		t.Fatal(err)
	}
	held := map[string]int64{}
	for _, g := range rep.Cards {
		if g.Suppressed != "" {
			held[g.Rule] += g.Count
		}
	}
	if held["sodium-profound-or-falling"] != 1 || held["siadh-lab-pattern"] != 1 || held["sodium-projected-over-limit"] != 1 || held["hyponatremia-overcorrected"] != 0 {
		t.Errorf("held back in the card log: %v", held)
	}
	for _, args := range [][]string{{"--card-log", "sqlite:" + db}, {"--hash-key-file", key}} {
		err := run(context.Background(), append([]string{"eval", "--hook", "patient-view"}, append(args, filepath.Join("..", "..", "testdata", "scenarios", s09))...), io.Discard, io.Discard)
		if err == nil || !strings.Contains(err.Error(), "go together") {
			t.Errorf("%v alone: %v", args, err)
		}
	}
}

// TestSuppressionAcrossReplicas: a card one replica returned at
// order-select is not repeated by another at order-sign of the same draft;
// after an override with a reason given to one replica, the other holds
// the finding back; each is counted on the replica's metrics. SQLite runs
// it on one server; PostgreSQL on two sharing the store and hash key.
func TestSuppressionAcrossReplicas(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	t.Setenv("HALITE_STORE_HASH_KEY_FILE", hashKey(t))
	type pair struct{ a, b string }
	setups := map[string]func(t *testing.T) pair{
		"sqlite": func(t *testing.T) pair {
			t.Setenv("HALITE_STORE_DSN", "sqlite:"+filepath.Join(t.TempDir(), "halite.db"))
			base, _, stop := startServe(t)
			t.Cleanup(func() { stop() })
			return pair{base, base}
		},
	}
	if dsn := os.Getenv("HALITE_TEST_POSTGRES_DSN"); dsn != "" {
		setups["postgres"] = func(t *testing.T) pair {
			t.Setenv("HALITE_STORE_DSN", pgSchema(t, dsn))
			a, _, stopA := startServe(t)
			t.Cleanup(func() { stopA() })
			b, _, stopB := startServe(t)
			t.Cleanup(func() { stopB() })
			return pair{a, b}
		}
	} else if os.Getenv("CI") == "true" {
		t.Fatal("CI must run the two-replica case: HALITE_TEST_POSTGRES_DSN is not set")
	}
	scenario := filepath.Join("..", "..", "testdata", "scenarios", "14-hypona-3pct-overshoot.json")
	request := func(hook string) []byte {
		var req bytes.Buffer
		if err := run(context.Background(), []string{"request", "--hook", hook, "--service", "sodium-infusion-check", scenario}, &req, io.Discard); err != nil {
			t.Fatal(err)
		}
		return req.Bytes()
	}
	call := func(base string, body []byte) hooks.Response {
		resp, err := http.Post(base+"/cds-services/sodium-infusion-check", "application/json", bytes.NewReader(body))
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		var r hooks.Response
		if err := json.NewDecoder(resp.Body).Decode(&r); err != nil || resp.StatusCode != http.StatusOK {
			t.Fatalf("status %d: %v", resp.StatusCode, err)
		}
		return r
	}
	heldOn := func(base, reason string) string {
		resp, err := http.Get(base + "/metrics")
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		for _, line := range strings.Split(string(b), "\n") {
			if strings.HasPrefix(line, "halite_cards_suppressed_total{") && strings.Contains(line, `reason="`+reason+`"`) {
				return line[strings.LastIndex(line, " ")+1:]
			}
		}
		return "0"
	}
	selectReq, signReq := request("order-select"), request("order-sign")
	for name, setup := range setups {
		t.Run(name, func(t *testing.T) {
			p := setup(t)
			// The server evaluates now: the scenario's sodium is days old,
			// so the card is the warning that no projection can be made.
			shown := call(p.a, selectReq)
			if len(shown.Cards) != 1 || shown.Cards[0].Indicator != "warning" {
				t.Fatalf("order-select: want one warning card, got %+v", shown.Cards)
			}
			if r := call(p.b, signReq); len(r.Cards) != 0 {
				t.Errorf("order-sign of the same draft on the other replica repeated %d cards", len(r.Cards))
			}
			if got := heldOn(p.b, "select-to-sign"); got != "1" {
				t.Errorf("select-to-sign counter on the replica that held it back: %s", got)
			}
			fb := fmt.Sprintf(`{"feedback":[{"card":%q,"outcome":"overridden","overrideReason":{"reason":{"system":%q,"code":"local-protocol"}},"outcomeTimestamp":%q}]}`,
				shown.Cards[0].UUID, hooks.OverrideReasonSystem, time.Now().UTC().Format(time.RFC3339))
			resp, err := http.Post(p.a+"/cds-services/sodium-infusion-check/feedback", "application/json", strings.NewReader(fb))
			if err != nil {
				t.Fatal(err)
			}
			resp.Body.Close()
			if resp.StatusCode != http.StatusOK {
				t.Fatalf("override: %d", resp.StatusCode)
			}
			// Selected again (not a signing): only the override holds it back.
			if r := call(p.b, selectReq); len(r.Cards) != 0 {
				t.Errorf("after an override with a reason the other replica repeated %d cards", len(r.Cards))
			}
			if got := heldOn(p.b, "overridden"); got != "1" {
				t.Errorf("overridden counter: %s", got)
			}
		})
	}
}

// pgSchema makes an empty schema on the PostgreSQL server of dsn, dropped
// after the test, and returns a DSN using it.
func pgSchema(t *testing.T, dsn string) string {
	t.Helper()
	db, err := sql.Open("pgx", dsn)
	if err != nil {
		t.Fatal(err)
	}
	schema := fmt.Sprintf("halite_cmd_%d", time.Now().UnixNano())
	if _, err := db.Exec("CREATE SCHEMA " + schema); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		db.Exec("DROP SCHEMA " + schema + " CASCADE")
		db.Close()
	})
	sep := "?"
	if strings.Contains(dsn, "?") {
		sep = "&"
	}
	return dsn + sep + "search_path=" + schema
}
