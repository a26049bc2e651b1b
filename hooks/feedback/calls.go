package feedback

import (
	"cmp"
	"context"
	"database/sql"
	"errors"
	"fmt"
	"maps"
	"slices"
	"time"
)

// CallRecord is one hook call to a service, answered or failed: who
// called which service, and whether cards were returned. It holds no
// patient data.
type CallRecord struct {
	At                                     time.Time
	Service, Hook, Issuer, Tenant, Ruleset string
	Cards                                  int
	Failed                                 bool
}

// periodOf is the quarter hour (UTC, "2006-01-02T15:04") t falls in: call
// counts and report groups are kept by quarter hour so that a day in any
// time zone (all offsets are whole quarter hours) is made of whole periods.
func periodOf(t time.Time) string {
	t = t.UTC()
	return t.Truncate(15 * time.Minute).Format(periodFormat)
}

const periodFormat = "2006-01-02T15:04"

type callKey struct{ period, service, hook, issuer, tenant, ruleset string }

type callTally struct{ calls, withCards, failed int64 }

// CountCall adds c to the call counts held in memory; they are added to
// the store every Options.CountEvery and at Close, so counting never waits
// for the database. A write that fails keeps them for the next one, so a
// process killed outright loses what it held: the counts since the last
// write that succeeded. Calls counted after Close are not written.
func (s *DB) CountCall(c CallRecord) {
	k := callKey{periodOf(c.At), c.Service, c.Hook, c.Issuer, c.Tenant, c.Ruleset}
	s.countMu.Lock()
	defer s.countMu.Unlock()
	t := s.counts[k]
	t.calls++
	if c.Cards > 0 {
		t.withCards++
	}
	if c.Failed {
		t.failed++
	}
	s.counts[k] = t
}

// countLoop writes the call counts every interval until stop, then once
// more.
func (s *DB) countLoop() {
	defer close(s.countsDone)
	t := time.NewTicker(s.opt.CountEvery)
	defer t.Stop()
	for {
		select {
		case <-s.stopCounts:
			ctx, cancel := context.WithTimeout(context.Background(), 2*s.opt.CommitTimeout)
			s.logCountFailure(s.FlushCounts(ctx))
			cancel()
			return
		case <-t.C:
			s.logCountFailure(s.FlushCounts(context.Background()))
		}
	}
}

func (s *DB) logCountFailure(err error) {
	if err != nil && s.opt.Log != nil {
		s.opt.Log.Warn("call counts not written; kept for the next write", "error", err.Error())
	}
}

// FlushCounts adds the call counts held in memory to the store now, in
// key order (replicas flushing the same keys lock them in the same order).
// A failed write keeps them for the next one; a stalled one does not (it
// may still commit, and none is counted twice; if its batch never began,
// they are lost).
func (s *DB) FlushCounts(ctx context.Context) error {
	s.countMu.Lock()
	pending := s.counts
	s.counts = map[callKey]callTally{}
	s.countMu.Unlock()
	if len(pending) == 0 {
		return nil
	}
	keys := slices.SortedFunc(maps.Keys(pending), func(a, b callKey) int {
		return cmp.Or(cmp.Compare(a.period, b.period), cmp.Compare(a.service, b.service), cmp.Compare(a.hook, b.hook),
			cmp.Compare(a.issuer, b.issuer), cmp.Compare(a.tenant, b.tenant), cmp.Compare(a.ruleset, b.ruleset))
	})
	err := s.do(ctx, func(ctx context.Context, tx *sql.Tx) error {
		for _, k := range keys {
			t := pending[k]
			if _, err := tx.ExecContext(ctx, s.dialect.bind(`INSERT INTO call_counts (period, service, hook, issuer, tenant, ruleset, calls, with_cards, failed)
				VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (period, service, hook, issuer, tenant, ruleset) DO UPDATE SET
				calls = call_counts.calls + excluded.calls, with_cards = call_counts.with_cards + excluded.with_cards,
				failed = call_counts.failed + excluded.failed`),
				k.period, k.service, k.hook, k.issuer, k.tenant, k.ruleset, t.calls, t.withCards, t.failed); err != nil {
				return fmt.Errorf("count calls: %w", err)
			}
		}
		return nil
	})
	if err != nil && !errors.Is(err, ErrStalled) {
		s.countMu.Lock()
		for k, t := range pending {
			c := s.counts[k]
			c.calls, c.withCards, c.failed = c.calls+t.calls, c.withCards+t.withCards, c.failed+t.failed
			s.counts[k] = c
		}
		s.countMu.Unlock()
	}
	return err
}
