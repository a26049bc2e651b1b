package feedback

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"
)

// backend opens a fresh store and says how to reopen the same data.
type backend struct {
	name string
	open func(t testing.TB) (Store, func() Store)
	// stalled opens a store with opt whose database another session holds
	// locked until release is called.
	stalled func(t testing.TB, opt Options) (s Store, release func())
}

// backends are SQLite always, and PostgreSQL when HALITE_TEST_POSTGRES_DSN
// names a server (.ci/run starts one; without it the PostgreSQL cases skip
// locally, and fail under CI=true, so they never silently skip in CI).
func backends(t testing.TB) []backend {
	out := []backend{{name: "sqlite", open: func(t testing.TB) (Store, func() Store) {
		path := filepath.Join(t.TempDir(), "halite.db")
		s, err := OpenSQLite(path, Options{})
		if err != nil {
			t.Fatal(err)
		}
		return s, func() Store {
			r, err := OpenSQLite(path, Options{})
			if err != nil {
				t.Fatal(err)
			}
			return r
		}
	}, stalled: func(t testing.TB, opt Options) (Store, func()) {
		path := filepath.Join(t.TempDir(), "halite.db")
		s, err := OpenSQLite(path, opt)
		if err != nil {
			t.Fatal(err)
		}
		return s, holdLock(t, "sqlite", "file:"+path, "BEGIN IMMEDIATE")
	}}}
	dsn := os.Getenv("HALITE_TEST_POSTGRES_DSN")
	if dsn == "" {
		if os.Getenv("CI") == "true" {
			t.Fatal("CI must run the PostgreSQL store tests: HALITE_TEST_POSTGRES_DSN is not set")
		}
		t.Log("HALITE_TEST_POSTGRES_DSN not set: PostgreSQL cases skipped")
		return out
	}
	return append(out, backend{name: "postgres", open: func(t testing.TB) (Store, func() Store) {
		schemaDSN := freshSchema(t, dsn)
		s, err := OpenPostgres(schemaDSN, Options{})
		if err != nil {
			t.Fatal(err)
		}
		return s, func() Store {
			r, err := OpenPostgres(schemaDSN, Options{})
			if err != nil {
				t.Fatal(err)
			}
			return r
		}
	}, stalled: func(t testing.TB, opt Options) (Store, func()) {
		schemaDSN := freshSchema(t, dsn)
		s, err := OpenPostgres(schemaDSN, opt)
		if err != nil {
			t.Fatal(err)
		}
		return s, holdLock(t, "pgx", schemaDSN, "BEGIN", "LOCK TABLE card_log IN ACCESS EXCLUSIVE MODE")
	}})
}

// holdLock runs stmts on one connection of a second session and keeps
// it open (holding what they lock) until the returned release is called.
func holdLock(t testing.TB, driver, dsn string, stmts ...string) func() {
	t.Helper()
	db, err := sql.Open(driver, dsn)
	if err != nil {
		t.Fatal(err)
	}
	conn, err := db.Conn(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	for _, q := range stmts {
		if _, err := conn.ExecContext(context.Background(), q); err != nil {
			t.Fatal(err)
		}
	}
	return func() {
		conn.ExecContext(context.Background(), "ROLLBACK")
		conn.Close()
		db.Close()
	}
}

// freshSchema creates an empty schema for one test and returns a DSN that
// uses it.
func freshSchema(t testing.TB, dsn string) string {
	t.Helper()
	db, err := sql.Open("pgx", dsn)
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	schema := fmt.Sprintf("halite_test_%d", time.Now().UnixNano())
	if _, err := db.Exec("CREATE SCHEMA " + schema); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		if db, err := sql.Open("pgx", dsn); err == nil {
			db.Exec("DROP SCHEMA " + schema + " CASCADE")
			db.Close()
		}
	})
	sep := "?"
	if strings.Contains(dsn, "?") {
		sep = "&"
	}
	return dsn + sep + "search_path=" + schema
}

var t0 = time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)

func card(uuid string, at time.Time) CardRecord {
	return CardRecord{UUID: uuid, Service: "sodium-infusion-check", Rule: "sodium-projected-over-limit", Indicator: "warning",
		Ruleset: "rev", PatientHash: "h", At: at, Figures: map[string]float64{"limit24h": 10}, Suggestions: []string{uuid + "-s1", uuid + "-s2"}}
}

// TestStoreContract is the same list of cases for every back end.
func TestStoreContract(t *testing.T) {
	ctx := context.Background()
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			s, reopen := b.open(t)
			if err := s.LogCards(ctx, []CardRecord{card("c1", t0), card("c2", t0.Add(-48*time.Hour))}); err != nil {
				t.Fatal(err)
			}
			fb := FeedbackRecord{Card: "c1", Service: "sodium-infusion-check", Outcome: Accepted, AcceptedSuggestions: []string{"c1-s1"}, OutcomeAt: t0}
			for i := 0; i < 3; i++ { // repeats are stored once
				if err := s.RecordFeedback(ctx, []FeedbackRecord{fb}); err != nil {
					t.Fatal(err)
				}
			}
			over := FeedbackRecord{Card: "c1", Service: "sodium-infusion-check", Outcome: Overridden, ReasonSystem: "sys", ReasonCode: "local-protocol", OutcomeAt: t0.Add(time.Minute)}
			if err := s.RecordFeedback(ctx, []FeedbackRecord{over}); err != nil {
				t.Fatal(err)
			}
			c2 := func(outcome string) FeedbackRecord {
				return FeedbackRecord{Card: "c2", Service: "sodium-infusion-check", Outcome: outcome, OutcomeAt: t0.Add(2 * time.Minute)}
			}
			for name, tc := range map[string]struct {
				f    FeedbackRecord
				want error
			}{
				"unknown card":       {FeedbackRecord{Card: "nope", Service: "sodium-infusion-check", Outcome: Overridden, OutcomeAt: t0}, ErrUnknownCard},
				"other service":      {FeedbackRecord{Card: "c1", Service: "sodium-drug-risk", Outcome: Overridden, OutcomeAt: t0}, ErrUnknownCard},
				"other issuer":       {FeedbackRecord{Card: "c1", Service: "sodium-infusion-check", Issuer: "https://other.example", Outcome: Overridden, OutcomeAt: t0}, ErrUnknownCard},
				"other tenant":       {FeedbackRecord{Card: "c1", Service: "sodium-infusion-check", Tenant: "t2", Outcome: Overridden, OutcomeAt: t0}, ErrUnknownCard},
				"foreign suggestion": {FeedbackRecord{Card: "c1", Service: "sodium-infusion-check", Outcome: Accepted, AcceptedSuggestions: []string{"c2-s1"}, OutcomeAt: t0}, ErrUnknownSuggestion},
			} {
				// A bad entry after a good one: neither is stored.
				err := s.RecordFeedback(ctx, []FeedbackRecord{c2(Overridden), tc.f})
				var ee *EntryError
				if !errors.Is(err, tc.want) || !errors.As(err, &ee) || ee.Index != 1 {
					t.Errorf("%s: %v, want %v at entry 1", name, err, tc.want)
				}
			}
			// A value the schema forbids is an error, not silently ignored.
			if err := s.RecordFeedback(ctx, []FeedbackRecord{c2("dismissed")}); err == nil {
				t.Error("an outcome outside the schema's CHECK was accepted")
			}
			if err := s.LogCards(ctx, []CardRecord{card("c1", t0)}); err == nil {
				t.Error("a duplicate card uuid was accepted")
			}
			if c, f, err := s.Counts(ctx); err != nil || c != 2 || f != 2 {
				t.Errorf("counts %d cards %d feedback %v; want 2 and 2 (no entry of a refused call stored)", c, f, err)
			}
			rep, err := s.Report(ctx, t0.Add(-72*time.Hour), t0.Add(time.Hour))
			if err != nil || len(rep.Cards) != 2 {
				t.Fatalf("report %+v %v", rep, err)
			}
			for _, g := range rep.Cards {
				want := ""
				if g.Period.Equal(t0) {
					want = Accepted // accepted, then overridden: accepted counts
				}
				if g.Count != 1 || !g.Offered || g.Outcome != want || g.Rule != "sodium-projected-over-limit" {
					t.Errorf("card group %+v, want outcome %q", g, want)
				}
			}
			if len(rep.Reasons) != 1 || rep.Reasons[0].Code != "local-protocol" || rep.Reasons[0].Count != 1 {
				t.Errorf("reasons %+v", rep.Reasons)
			}
			if len(rep.Responses) != 1 || rep.Responses[0].After != 0 {
				t.Errorf("response times %+v, want c1's first feedback at its own time", rep.Responses)
			}
			if n, err := s.Purge(ctx, t0.Add(-24*time.Hour)); err != nil || n != 1 {
				t.Errorf("purge removed %d (%v), want 1", n, err)
			}
			// The JWT replay cache shares the store (replicas share it on PostgreSQL).
			rc := s.(interface {
				Remember(ctx context.Context, iss, jti string, until time.Time) (bool, error)
			})
			if seen, err := rc.Remember(ctx, "iss", "j1", time.Now().Add(time.Minute)); err != nil || seen {
				t.Errorf("first jti: seen %v %v", seen, err)
			}
			if seen, err := rc.Remember(ctx, "iss", "j1", time.Now().Add(time.Minute)); err != nil || !seen {
				t.Errorf("replayed jti: seen %v %v", seen, err)
			}
			if seen, err := rc.Remember(ctx, "iss", "old", time.Now().Add(-time.Minute)); err != nil || seen {
				t.Errorf("expired jti recorded: %v %v", seen, err)
			}
			if seen, err := rc.Remember(ctx, "iss", "old", time.Now().Add(time.Minute)); err != nil || seen {
				t.Errorf("a jti whose earlier token expired is not a replay: %v %v", seen, err)
			}
			if seen, err := rc.Remember(ctx, "iss", "gone", time.Now().Add(-time.Minute)); err != nil || seen {
				t.Errorf("expired jti: %v %v", seen, err)
			}
			if n := replayRows(t, s); n != 3 {
				t.Errorf("%d replay entries before the sweep, want 3", n)
			}
			if _, err := s.Purge(ctx, t0.Add(-24*time.Hour)); err != nil {
				t.Fatal(err)
			}
			if n := replayRows(t, s); n != 2 { // j1 and old are live; gone is swept
				t.Errorf("%d replay entries after the purge, want the 2 live ones", n)
			}
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
			r := reopen() // durable across reopening; migrations are not re-applied
			defer r.Close()
			if c, f, err := r.Counts(ctx); err != nil || c != 1 || f != 2 {
				t.Errorf("after reopening: %d cards %d feedback %v; want 1 and 2", c, f, err)
			}
		})
	}
}

// TestPriorCards: the cards one replica logged are found by another, for
// the same patient, service and caller only, within the period, the latest
// of each rule, product and moment, with the time of an override that gave
// a reason; a finding held back is counted but never found, and takes no
// feedback.
func TestPriorCards(t *testing.T) {
	ctx := context.Background()
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			a, reopen := b.open(t)
			defer a.Close()
			replica := reopen()
			defer replica.Close()
			at := func(id string, when time.Time, edit func(*CardRecord)) CardRecord {
				c := card(id, when)
				c.Moment, c.Subject, c.Draft = "select", "subj", "draft"
				if edit != nil {
					edit(&c)
				}
				return c
			}
			cards := []CardRecord{
				at("early", t0.Add(-2*time.Hour), nil),
				at("overridden-old", t0.Add(-3*time.Hour), nil),
				at("late", t0.Add(-time.Hour), func(c *CardRecord) { c.Moment, c.Indicator = "sign", "critical" }),
				at("quiet", t0.Add(-time.Hour), func(c *CardRecord) {}),
				at("held", t0.Add(-30*time.Minute), func(c *CardRecord) { c.Suppressed = "select-to-sign" }),
				at("old", t0.Add(-30*time.Hour), nil),
				at("future", t0.Add(time.Hour), func(c *CardRecord) { c.Subject = "later" }),
				at("other-patient", t0.Add(-time.Hour), func(c *CardRecord) { c.PatientHash = "h2" }),
				at("other-tenant", t0.Add(-time.Hour), func(c *CardRecord) { c.Tenant = "t2" }),
				at("other-service", t0.Add(-time.Hour), func(c *CardRecord) { c.Service = "sodium-drug-risk" }),
			}
			if err := a.LogCards(ctx, cards); err != nil {
				t.Fatal(err)
			}
			fb := func(card, outcome, reason string, when time.Time) FeedbackRecord {
				return FeedbackRecord{Card: card, Service: "sodium-infusion-check", Outcome: outcome, ReasonSystem: "sys", ReasonCode: reason, OutcomeAt: when}
			}
			if err := a.RecordFeedback(ctx, []FeedbackRecord{fb("late", Overridden, "local-protocol", t0.Add(-50*time.Minute)),
				fb("late", Overridden, "already-monitored", t0.Add(-40*time.Minute)), fb("quiet", Overridden, "", t0.Add(-50*time.Minute)),
				fb("overridden-old", Overridden, "local-protocol", t0.Add(-170*time.Minute))}); err != nil {
				t.Fatal(err)
			}
			if err := a.RecordFeedback(ctx, []FeedbackRecord{fb("held", Overridden, "local-protocol", t0)}); !errors.Is(err, ErrUnknownCard) {
				t.Errorf("feedback on a held-back finding: %v, want ErrUnknownCard", err)
			}
			got, err := replica.PriorCards(ctx, PriorQuery{Service: "sodium-infusion-check", PatientHash: "h", Since: t0.Add(-24 * time.Hour), Until: t0})
			if err != nil {
				t.Fatal(err)
			}
			var ids []string
			for _, p := range got {
				ids = append(ids, p.Moment+"/"+p.Indicator)
			}
			// "early" is an older select card of the same rule and product
			// as "quiet", not overridden: only the latest counts; the older
			// one overridden with a reason is kept.
			if len(got) != 3 || got[0].At != t0.Add(-time.Hour) || got[1].At != t0.Add(-time.Hour) || got[2].At != t0.Add(-3*time.Hour) ||
				!got[2].OverriddenAt.Equal(t0.Add(-170*time.Minute)) {
				t.Fatalf("prior cards %v, want late and quiet (the latest of each moment), then the overridden one", ids)
			}
			for _, p := range got {
				switch {
				case p.Moment == "sign" && (p.Indicator != "critical" || !p.OverriddenAt.Equal(t0.Add(-40*time.Minute))):
					t.Errorf("overridden card %+v: want the later override with a reason", p)
				case p.Moment == "select" && p.At.Equal(t0.Add(-time.Hour)) && !p.OverriddenAt.IsZero():
					t.Errorf("%+v: an override without a reason (or none) is not an override to remember", p)
				}
				if p.Subject != "subj" || p.Draft != "draft" || p.Figures["limit24h"] != 10 {
					t.Errorf("keys or figures lost: %+v", p)
				}
			}
			rep, err := replica.Report(ctx, t0.Add(-72*time.Hour), t0.Add(2*time.Hour))
			if err != nil {
				t.Fatal(err)
			}
			var shown, held int64
			for _, g := range rep.Cards {
				if g.Suppressed == "" {
					shown += g.Count
				} else {
					held += g.Count
				}
			}
			if shown != 9 || held != 1 {
				t.Errorf("report counts %d shown and %d held back, want 9 and 1", shown, held)
			}
		})
	}
}

// TestCallCounts: calls counted by two replicas add up in one row per
// quarter hour and key, failed ones apart; counts still in memory are
// written at Close; the purge removes old quarters.
func TestCallCounts(t *testing.T) {
	ctx := context.Background()
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			a, reopen := b.open(t)
			replica := reopen()
			call := func(at time.Time, cards int, failed bool) CallRecord {
				return CallRecord{At: at, Service: "sodium-infusion-check", Hook: "order-sign", Tenant: "ward", Ruleset: "r1", Cards: cards, Failed: failed}
			}
			a.CountCall(call(t0, 2, false))
			a.CountCall(call(t0.Add(10*time.Minute), 0, true))
			a.CountCall(call(t0.Add(-30*time.Hour), 1, false))
			if err := a.(*DB).FlushCounts(ctx); err != nil {
				t.Fatal(err)
			}
			replica.CountCall(call(t0.Add(5*time.Minute), 0, false))
			replica.CountCall(call(t0.Add(14*time.Minute), 1, false))
			replica.CountCall(call(t0.Add(15*time.Minute), 1, false)) // the next quarter hour
			if err := replica.Close(); err != nil {                   // writes what it holds
				t.Fatal(err)
			}
			rep, err := a.Report(ctx, t0.Add(-48*time.Hour), t0.Add(time.Hour))
			if err != nil {
				t.Fatal(err)
			}
			if len(rep.Calls) != 3 {
				t.Fatalf("call groups %+v, want one per quarter hour", rep.Calls)
			}
			for _, g := range rep.Calls {
				switch {
				case g.Period.Equal(t0) && (g.Calls != 4 || g.WithCards != 2 || g.Failed != 1 || g.Tenant != "ward"):
					t.Errorf("quarter of t0: %+v, want 4 calls, 2 with cards, 1 failed", g)
				case g.Period.Equal(t0.Add(15*time.Minute)) && g.Calls != 1:
					t.Errorf("next quarter: %+v", g)
				case g.Period.Before(t0) && g.Calls != 1:
					t.Errorf("earlier quarter: %+v", g)
				}
			}
			if _, err := a.Purge(ctx, t0.Add(-24*time.Hour)); err != nil {
				t.Fatal(err)
			}
			if rep, err = a.Report(ctx, t0.Add(-48*time.Hour), t0.Add(time.Hour)); err != nil || len(rep.Calls) != 2 {
				t.Errorf("after the purge: %+v %v", rep.Calls, err)
			}
			a.Close()
		})
	}
}

// TestPurgeInChunks: a backlog larger than one purge chunk is deleted in
// full, in several commits.
func TestPurgeInChunks(t *testing.T) {
	ctx := context.Background()
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			s, _ := b.open(t)
			defer s.Close()
			const n = 2*purgeChunk + 7
			cards := make([]CardRecord, n)
			for i := range cards {
				cards[i] = card(fmt.Sprint("old-", i), t0.Add(-48*time.Hour))
			}
			cards = append(cards, card("recent", t0))
			for len(cards) > 0 { // in responses' worth, as calls log them
				k := min(len(cards), 500)
				if err := s.LogCards(ctx, cards[:k]); err != nil {
					t.Fatal(err)
				}
				cards = cards[k:]
			}
			if got, err := s.Purge(ctx, t0.Add(-24*time.Hour)); err != nil || got != n {
				t.Errorf("purged %d (%v), want %d", got, err, n)
			}
			if c, _, err := s.Counts(ctx); err != nil || c != 1 {
				t.Errorf("%d cards left (%v), want the recent one", c, err)
			}
		})
	}
}

func replayRows(t *testing.T, s Store) int {
	t.Helper()
	var n int
	if err := s.(*DB).db.QueryRow(`SELECT count(*) FROM jwt_replay`).Scan(&n); err != nil {
		t.Fatal(err)
	}
	return n
}

// TestStoreStalled: while another session holds the database locked, a
// write fails within the store's bound instead of hanging the call, and
// the store works again once the lock is gone.
func TestStoreStalled(t *testing.T) {
	ctx := context.Background()
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			const bound = 300 * time.Millisecond
			s, release := b.stalled(t, Options{CommitTimeout: bound})
			start := time.Now()
			err := s.LogCards(ctx, []CardRecord{card("stalled", t0)})
			if took := time.Since(start); !errors.Is(err, ErrStalled) || took > 10*bound {
				t.Errorf("write under a held lock: %v after %v; want ErrStalled (the bound is %v; allowed up to %v on a slow machine)", err, took, 2*bound, 10*bound)
			}
			release()
			if err := s.LogCards(ctx, []CardRecord{card("after", t0)}); err != nil {
				t.Errorf("write after the lock was released: %v", err)
			}
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
		})
	}
}

// TestStalledCardsAreNotReturned: a write whose caller stopped waiting
// (the call is answered 503) but which commits afterwards is marked not
// returned: the repeat lookup never sees it, the report does not count it,
// and it takes no feedback.
func TestStalledCardsAreNotReturned(t *testing.T) {
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			s, release := b.stalled(t, Options{CommitTimeout: 3 * time.Second})
			defer s.Close()
			c := card("late-commit", t0)
			c.Moment, c.Subject = "select", "subj"
			ctx, cancel := context.WithTimeout(context.Background(), 150*time.Millisecond)
			err := s.LogCards(ctx, []CardRecord{c})
			cancel()
			if !errors.Is(err, ErrStalled) {
				t.Fatalf("write under a held lock: %v, want ErrStalled", err)
			}
			release()
			// The writer is FIFO: once a later write is acknowledged, the
			// marking queued behind the stalled one has run.
			time.Sleep(50 * time.Millisecond)
			if err := s.LogCards(context.Background(), []CardRecord{card("after", t0.Add(-48*time.Hour))}); err != nil {
				t.Fatal(err)
			}
			db := s.(*DB)
			var state string
			// The stalled write either never ran (its caller left before its
			// batch began: SQLite here) or committed and was marked.
			switch err := db.db.QueryRow(db.dialect.bind(`SELECT suppressed FROM card_log WHERE card_uuid = ?`), c.UUID).Scan(&state); {
			case errors.Is(err, sql.ErrNoRows):
				t.Logf("%s: the stalled write never ran", b.name)
			case err != nil:
				t.Fatal(err)
			case state != NotReturned:
				t.Fatalf("the late-committed card is %q, want %q", state, NotReturned)
			}
			prior, err := s.PriorCards(context.Background(), PriorQuery{Service: c.Service, PatientHash: c.PatientHash, Since: t0.Add(-time.Hour), Until: t0.Add(time.Hour)})
			if err != nil || len(prior) != 0 {
				t.Errorf("prior cards %+v %v, want none", prior, err)
			}
			rep, err := s.Report(context.Background(), t0.Add(-time.Hour), t0.Add(time.Hour))
			if err != nil || len(rep.Cards) != 0 {
				t.Errorf("report cards %+v %v, want none", rep.Cards, err)
			}
			err = s.RecordFeedback(context.Background(), []FeedbackRecord{{Card: c.UUID, Service: c.Service, Outcome: Overridden, OutcomeAt: t0}})
			if !errors.Is(err, ErrUnknownCard) {
				t.Errorf("feedback on a card never returned: %v", err)
			}
		})
	}
}

// TestStoreConcurrent: many goroutines write cards and feedback at once
// (group commit); every acknowledged record is there.
func TestStoreConcurrent(t *testing.T) {
	ctx := context.Background()
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			s, _ := b.open(t)
			defer s.Close()
			const workers, each = 32, 25
			var wg sync.WaitGroup
			errs := make(chan error, workers*each*2)
			for w := 0; w < workers; w++ {
				wg.Add(1)
				go func() {
					defer wg.Done()
					for i := 0; i < each; i++ {
						id := fmt.Sprintf("w%d-%d", w, i)
						if err := s.LogCards(ctx, []CardRecord{card(id, t0)}); err != nil {
							errs <- err
							continue
						}
						errs <- s.RecordFeedback(ctx, []FeedbackRecord{{Card: id, Service: "sodium-infusion-check", Outcome: Overridden, OutcomeAt: t0}})
						if _, _, err := s.Counts(ctx); err != nil {
							errs <- err
						}
					}
				}()
			}
			wg.Wait()
			close(errs)
			for err := range errs {
				if err != nil {
					t.Fatal(err)
				}
			}
			if c, f, err := s.Counts(ctx); err != nil || c != workers*each || f != workers*each {
				t.Errorf("%d cards, %d feedback (%v); want %d each", c, f, err, workers*each)
			}
		})
	}
}

// BenchmarkLogCards measures the card-log write of one call (two cards),
// with calls from several goroutines sharing commits.
func BenchmarkLogCards(b *testing.B) {
	for _, be := range backends(b) {
		b.Run(be.name, func(b *testing.B) {
			s, _ := be.open(b)
			defer s.Close()
			benchLogCards(b, s)
		})
	}
}

func benchLogCards(b *testing.B, s Store) {
	var n int64
	var mu sync.Mutex
	var lat []time.Duration
	b.SetParallelism(8)
	b.ReportAllocs()
	start := time.Now()
	b.RunParallel(func(pb *testing.PB) {
		for pb.Next() {
			mu.Lock()
			n++
			id := fmt.Sprint(n)
			mu.Unlock()
			t := time.Now()
			if err := s.LogCards(context.Background(), []CardRecord{card(id+"a", t0), card(id+"b", t0)}); err != nil {
				b.Error(err)
				return
			}
			d := time.Since(t)
			mu.Lock()
			lat = append(lat, d)
			mu.Unlock()
		}
	})
	elapsed := time.Since(start)
	if len(lat) == 0 {
		return
	}
	slices.Sort(lat)
	b.ReportMetric(float64(lat[len(lat)*99/100].Microseconds()), "p99-us/call")
	b.ReportMetric(float64(2*len(lat))/elapsed.Seconds(), "records/s")
}

// TestSQLiteSynchronous: the store's synchronous setting reaches SQLite
// (PRAGMA synchronous reads 2 for FULL, 1 for NORMAL; sqlite.org/pragma.html)
// and an unknown one is refused.
func TestSQLiteSynchronous(t *testing.T) {
	for _, tc := range []struct {
		setting string
		want    int
	}{{"", 2}, {SyncFull, 2}, {SyncNormal, 1}} {
		s, err := OpenSQLite(filepath.Join(t.TempDir(), "s.db"), Options{SQLiteSynchronous: tc.setting})
		if err != nil {
			t.Fatal(err)
		}
		var got int
		if err := s.db.QueryRow(`PRAGMA synchronous`).Scan(&got); err != nil || got != tc.want {
			t.Errorf("%q: synchronous %d (%v), want %d", tc.setting, got, err, tc.want)
		}
		s.Close()
	}
	if _, err := OpenSQLite(filepath.Join(t.TempDir(), "s.db"), Options{SQLiteSynchronous: "off"}); err == nil {
		t.Error("synchronous off was accepted")
	}
}

// TestSQLiteWALStaysBounded: SQLite's own checkpoint is off (it would run
// inside a commit), so the checkpointer alone keeps the WAL from growing:
// 3,000 cards logged as fast as one writer goes, each in its own commit,
// write ~4 KiB pages several to a commit (tens of MB of WAL if nothing
// copied it back), yet the WAL file stays within a few times its restart
// bound (256 pages, 1 MiB) and every card is in the database.
func TestSQLiteWALStaysBounded(t *testing.T) {
	path := filepath.Join(t.TempDir(), "s.db")
	s, err := OpenSQLite(path, Options{CheckpointEvery: 10 * time.Millisecond, WALRestartFrames: 256})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	ctx := context.Background()
	t0 := time.Now().UTC()
	var autockpt int
	if err := s.db.QueryRow(`PRAGMA wal_autocheckpoint`).Scan(&autockpt); err != nil || autockpt != 0 {
		t.Errorf("wal_autocheckpoint %d (%v), want 0", autockpt, err)
	}
	largest := int64(0)
	for i := range 3000 {
		if err := s.LogCards(ctx, []CardRecord{card(fmt.Sprintf("c%05d", i), t0)}); err != nil {
			t.Fatal(err)
		}
		if fi, err := os.Stat(path + "-wal"); err == nil {
			largest = max(largest, fi.Size())
		}
	}
	if largest > 8<<20 {
		t.Errorf("the WAL reached %d bytes; want it kept near its 1 MiB restart bound", largest)
	}
	if cards, _, err := s.Counts(ctx); err != nil || cards != 3000 {
		t.Errorf("%d cards (%v), want 3000", cards, err)
	}
	t.Logf("largest WAL %d bytes over 3,000 commits", largest)
}

// TestSQLiteRestartWithAReader: a reader holding a snapshot (halite report
// beside the server) keeps a WAL restart from finishing; the restart must
// give up quickly rather than hold the writer, so every commit still
// lands within its bound (1 s here; the busy timeout of a plain connection
// is 5 s) and none fails.
func TestSQLiteRestartWithAReader(t *testing.T) {
	path := filepath.Join(t.TempDir(), "s.db")
	s, err := OpenSQLite(path, Options{CheckpointEvery: 5 * time.Millisecond, WALRestartFrames: 64, CommitTimeout: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	ctx := context.Background()
	t0 := time.Now().UTC()
	if err := s.LogCards(ctx, []CardRecord{card("first", t0)}); err != nil {
		t.Fatal(err)
	}
	reader, err := s.db.BeginTx(ctx, &sql.TxOptions{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer reader.Rollback()
	var n int
	if err := reader.QueryRow(`SELECT count(*) FROM card_log`).Scan(&n); err != nil {
		t.Fatal(err)
	}
	failed := 0
	for i := range 300 {
		if err := s.LogCards(ctx, []CardRecord{card(fmt.Sprintf("c%04d", i), t0)}); err != nil {
			failed++
		}
	}
	if failed > 0 {
		t.Errorf("%d of 300 commits failed while a reader held its snapshot", failed)
	}
}

// BenchmarkPriorCards measures the suppression lookup on a call's path:
// a card log of 20,000 cards over 1,000 patients, the patient looked up
// holding `held` cards of the last day (a patient seen all day; 5,000 is
// a load test's single patient).
func BenchmarkPriorCards(b *testing.B) {
	for _, be := range backends(b) {
		for _, held := range []int{5, 300, 5000} {
			b.Run(fmt.Sprintf("%s/%d-cards", be.name, held), func(b *testing.B) {
				s, _ := be.open(b)
				defer s.Close()
				ctx := context.Background()
				var batch []CardRecord
				flush := func() {
					if err := s.LogCards(ctx, batch); err != nil {
						b.Fatal(err)
					}
					batch = batch[:0]
				}
				for i := range 20000 {
					c := card(fmt.Sprintf("bg-%d", i), t0.Add(-time.Duration(i%2880)*time.Minute))
					c.PatientHash, c.Moment, c.Subject = fmt.Sprintf("p%d", i%1000), "sign", "s"
					if batch = append(batch, c); len(batch) == 500 {
						flush()
					}
				}
				for i := range held {
					c := card(fmt.Sprintf("me-%d", i), t0.Add(-time.Duration(i)*17*time.Second))
					c.PatientHash, c.Moment, c.Subject = "me", "sign", "s"
					if batch = append(batch, c); len(batch) == 500 {
						flush()
					}
				}
				flush()
				q := PriorQuery{Service: "sodium-infusion-check", PatientHash: "me", Since: t0.Add(-24 * time.Hour), Until: t0}
				b.ReportAllocs()
				b.ResetTimer()
				for b.Loop() {
					if _, err := s.PriorCards(ctx, q); err != nil {
						b.Fatal(err)
					}
				}
			})
		}
	}
}
