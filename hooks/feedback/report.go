package feedback

import (
	"context"
	"fmt"
	"time"
)

// CardGroup counts the cards logged in one UTC hour with the same caller,
// service, rule, indicator, ruleset revision, offer and outcome.
type CardGroup struct {
	Hour                                              time.Time
	Issuer, Tenant, Service, Rule, Indicator, Ruleset string
	// Offered is set for cards with suggestions (something to accept).
	Offered bool
	// Outcome is Accepted (any feedback accepted it), Overridden (feedback
	// overrode it and none accepted it) or "" (no feedback).
	Outcome string
	// Suppressed is the reason the finding was held back, "" for a card
	// returned.
	Suppressed string
	Count      int64
}

// CallGroup counts the hook calls answered in one UTC hour by caller,
// service, hook and ruleset revision.
type CallGroup struct {
	Hour                                   time.Time
	Issuer, Tenant, Service, Hook, Ruleset string
	Calls, WithCards, Cards, Suppressed    int64
}

// ReasonGroup counts the cards of one rule overridden with one reason.
type ReasonGroup struct {
	Service, Rule, System, Code string
	Count                       int64
}

// ResponseTime is how long after a card its first feedback came (by the
// EHR's outcome time).
type ResponseTime struct {
	Service, Rule, Ruleset string
	After                  time.Duration
}

// Report is what the card log holds for a period, grouped for the burden
// report; it names no patient.
type Report struct {
	From, To  time.Time
	Cards     []CardGroup
	Calls     []CallGroup
	Reasons   []ReasonGroup
	Responses []ResponseTime
}

// outcomeOf is a card's outcome: accepted if any feedback accepted it,
// else overridden if any overrode it, else "".
const outcomeOf = `(SELECT CASE WHEN EXISTS (SELECT 1 FROM feedback f WHERE f.card_uuid = c.card_uuid AND f.outcome = 'accepted') THEN 'accepted'
	WHEN EXISTS (SELECT 1 FROM feedback f WHERE f.card_uuid = c.card_uuid) THEN 'overridden' ELSE '' END)`

// Report groups the cards logged and calls counted in [from, to). Call
// counts still in memory are written first.
func (s *DB) Report(ctx context.Context, from, to time.Time) (Report, error) {
	rep := Report{From: from, To: to}
	if err := s.FlushCounts(ctx); err != nil {
		return rep, fmt.Errorf("report: %w", err)
	}
	f, t := from.UTC().Format(tsFormat), to.UTC().Format(tsFormat)
	rows, err := s.db.QueryContext(ctx, s.dialect.bind(`SELECT hour, issuer, tenant, service, rule, indicator, ruleset, offered, outcome, suppressed, count(*)
		FROM (SELECT substr(c.created_at, 1, 13) AS hour, c.issuer, c.tenant, c.service, c.rule, c.indicator, c.ruleset,
			CASE WHEN c.suggestions <> '[]' THEN 1 ELSE 0 END AS offered, `+outcomeOf+` AS outcome, c.suppressed
			FROM card_log c WHERE c.created_at >= ? AND c.created_at < ?) AS x
		GROUP BY hour, issuer, tenant, service, rule, indicator, ruleset, offered, outcome, suppressed`), f, t)
	if err != nil {
		return rep, fmt.Errorf("report cards: %w", err)
	}
	for rows.Next() {
		var g CardGroup
		var hour string
		var offered int
		if err := rows.Scan(&hour, &g.Issuer, &g.Tenant, &g.Service, &g.Rule, &g.Indicator, &g.Ruleset, &offered, &g.Outcome, &g.Suppressed, &g.Count); err != nil {
			rows.Close()
			return rep, fmt.Errorf("report cards: %w", err)
		}
		if g.Hour, err = time.Parse(hourFormat, hour); err != nil {
			rows.Close()
			return rep, fmt.Errorf("report cards: %w", err)
		}
		g.Offered = offered == 1
		rep.Cards = append(rep.Cards, g)
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return rep, fmt.Errorf("report cards: %w", err)
	}
	hf, ht := from.UTC().Format(hourFormat), to.UTC().Format(hourFormat)
	rows, err = s.db.QueryContext(ctx, s.dialect.bind(`SELECT hour, issuer, tenant, service, hook, ruleset, sum(calls), sum(with_cards), sum(cards), sum(suppressed)
		FROM call_counts WHERE hour >= ? AND hour < ? GROUP BY hour, issuer, tenant, service, hook, ruleset`), hf, ht)
	if err != nil {
		return rep, fmt.Errorf("report calls: %w", err)
	}
	for rows.Next() {
		var g CallGroup
		var hour string
		if err := rows.Scan(&hour, &g.Issuer, &g.Tenant, &g.Service, &g.Hook, &g.Ruleset, &g.Calls, &g.WithCards, &g.Cards, &g.Suppressed); err != nil {
			rows.Close()
			return rep, fmt.Errorf("report calls: %w", err)
		}
		if g.Hour, err = time.Parse(hourFormat, hour); err != nil {
			rows.Close()
			return rep, fmt.Errorf("report calls: %w", err)
		}
		rep.Calls = append(rep.Calls, g)
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return rep, fmt.Errorf("report calls: %w", err)
	}
	rows, err = s.db.QueryContext(ctx, s.dialect.bind(`SELECT c.service, c.rule, f.reason_system, f.reason_code, count(DISTINCT c.card_uuid)
		FROM feedback f JOIN card_log c ON c.card_uuid = f.card_uuid
		WHERE c.created_at >= ? AND c.created_at < ? AND f.outcome = 'overridden' AND f.reason_code <> ''
		GROUP BY c.service, c.rule, f.reason_system, f.reason_code`), f, t)
	if err != nil {
		return rep, fmt.Errorf("report reasons: %w", err)
	}
	for rows.Next() {
		var g ReasonGroup
		if err := rows.Scan(&g.Service, &g.Rule, &g.System, &g.Code, &g.Count); err != nil {
			rows.Close()
			return rep, fmt.Errorf("report reasons: %w", err)
		}
		rep.Reasons = append(rep.Reasons, g)
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return rep, fmt.Errorf("report reasons: %w", err)
	}
	rows, err = s.db.QueryContext(ctx, s.dialect.bind(`SELECT c.service, c.rule, c.ruleset, c.created_at, min(f.outcome_at)
		FROM card_log c JOIN feedback f ON f.card_uuid = c.card_uuid
		WHERE c.created_at >= ? AND c.created_at < ? GROUP BY c.card_uuid, c.service, c.rule, c.ruleset, c.created_at`), f, t)
	if err != nil {
		return rep, fmt.Errorf("report response times: %w", err)
	}
	defer rows.Close()
	for rows.Next() {
		var r ResponseTime
		var shown, first string
		if err := rows.Scan(&r.Service, &r.Rule, &r.Ruleset, &shown, &first); err != nil {
			return rep, fmt.Errorf("report response times: %w", err)
		}
		a, err1 := time.Parse(tsFormat, shown)
		b, err2 := time.Parse(tsFormat, first)
		if err1 != nil || err2 != nil {
			return rep, fmt.Errorf("report response times: unreadable time %q or %q", shown, first)
		}
		r.After = b.Sub(a)
		rep.Responses = append(rep.Responses, r)
	}
	return rep, rows.Err()
}
