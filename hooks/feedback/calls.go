package feedback

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"time"
)

// CallRecord is one hook call answered: who called which service, and how
// many cards it returned and held back. It holds no patient data.
type CallRecord struct {
	At                                     time.Time
	Service, Hook, Issuer, Tenant, Ruleset string
	Cards, Suppressed                      int
}

// hourFormat is the call counts' time bucket (UTC).
const hourFormat = "2006-01-02T15"

type callKey struct{ hour, service, hook, issuer, tenant, ruleset string }

type callTally struct{ calls, withCards, cards, suppressed int64 }

// CountCall adds c to the call counts held in memory; they are added to
// the store every Options.CountEvery and at Close, so counting never waits
// for the database. A write that fails keeps them for the next one; a
// process killed outright loses at most one interval of counts.
func (s *DB) CountCall(c CallRecord) {
	k := callKey{c.At.UTC().Format(hourFormat), c.Service, c.Hook, c.Issuer, c.Tenant, c.Ruleset}
	s.countMu.Lock()
	defer s.countMu.Unlock()
	t := s.counts[k]
	t.calls++
	if c.Cards > 0 {
		t.withCards++
	}
	t.cards += int64(c.Cards)
	t.suppressed += int64(c.Suppressed)
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

// FlushCounts adds the call counts held in memory to the store now. On
// failure they are kept for the next write, unless the write stalled (it
// may still commit).
func (s *DB) FlushCounts(ctx context.Context) error {
	s.countMu.Lock()
	pending := s.counts
	s.counts = map[callKey]callTally{}
	s.countMu.Unlock()
	if len(pending) == 0 {
		return nil
	}
	err := s.do(ctx, func(ctx context.Context, tx *sql.Tx) error {
		for k, t := range pending {
			if _, err := tx.ExecContext(ctx, s.dialect.bind(`INSERT INTO call_counts (hour, service, hook, issuer, tenant, ruleset, calls, with_cards, cards, suppressed)
				VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (hour, service, hook, issuer, tenant, ruleset) DO UPDATE SET
				calls = call_counts.calls + excluded.calls, with_cards = call_counts.with_cards + excluded.with_cards,
				cards = call_counts.cards + excluded.cards, suppressed = call_counts.suppressed + excluded.suppressed`),
				k.hour, k.service, k.hook, k.issuer, k.tenant, k.ruleset, t.calls, t.withCards, t.cards, t.suppressed); err != nil {
				return fmt.Errorf("count calls: %w", err)
			}
		}
		return nil
	})
	// A stalled write may still commit: its counts are not kept, so none
	// is counted twice.
	if err != nil && !errors.Is(err, ErrStalled) {
		s.countMu.Lock()
		for k, t := range pending {
			c := s.counts[k]
			c.calls, c.withCards, c.cards, c.suppressed = c.calls+t.calls, c.withCards+t.withCards, c.cards+t.cards, c.suppressed+t.suppressed
			s.counts[k] = c
		}
		s.countMu.Unlock()
	}
	return err
}
