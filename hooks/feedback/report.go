package feedback

import (
	"context"
	"fmt"
	"time"
)

// CardGroup counts the cards logged in one quarter hour with the same caller,
// service, rule, indicator, ruleset revision, offer and outcome.
type CardGroup struct {
	Period                                            time.Time // its quarter hour's start
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

// CallGroup counts the hook calls in one quarter hour by caller, service,
// hook and ruleset revision: all of them, those that returned cards, and
// those that failed.
type CallGroup struct {
	Period                                 time.Time // its quarter hour's start
	Issuer, Tenant, Service, Hook, Ruleset string
	Calls, WithCards, Failed               int64
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

// Report groups the cards logged and calls counted in [from, to), which
// should fall on quarter hours (calls are counted by quarter hour). Call
// counts this process still holds are written first. Cards never returned
// (NotReturned) are left out.
func (s *DB) Report(ctx context.Context, from, to time.Time) (Report, error) {
	rep := Report{From: from, To: to}
	if err := s.FlushCounts(ctx); err != nil {
		return rep, fmt.Errorf("report: %w", err)
	}
	f, t := from.UTC().Format(tsFormat), to.UTC().Format(tsFormat)
	rows, err := s.db.QueryContext(ctx, s.dialect.bind(`SELECT period, issuer, tenant, service, rule, indicator, ruleset, offered, outcome, suppressed, count(*)
		FROM (SELECT substr(c.created_at, 1, 14) || CASE WHEN substr(c.created_at, 15, 2) < '15' THEN '00'
				WHEN substr(c.created_at, 15, 2) < '30' THEN '15' WHEN substr(c.created_at, 15, 2) < '45' THEN '30' ELSE '45' END AS period, c.issuer, c.tenant, c.service, c.rule, c.indicator, c.ruleset,
			CASE WHEN c.suggestions <> '[]' THEN 1 ELSE 0 END AS offered, `+outcomeOf+` AS outcome, c.suppressed
			FROM card_log c WHERE c.created_at >= ? AND c.created_at < ? AND c.suppressed <> '`+NotReturned+`') AS x
		GROUP BY period, issuer, tenant, service, rule, indicator, ruleset, offered, outcome, suppressed`), f, t)
	if err != nil {
		return rep, fmt.Errorf("report cards: %w", err)
	}
	for rows.Next() {
		var g CardGroup
		var period string
		var offered int
		if err := rows.Scan(&period, &g.Issuer, &g.Tenant, &g.Service, &g.Rule, &g.Indicator, &g.Ruleset, &offered, &g.Outcome, &g.Suppressed, &g.Count); err != nil {
			rows.Close()
			return rep, fmt.Errorf("report cards: %w", err)
		}
		if g.Period, err = time.Parse(periodFormat, period); err != nil {
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
	rows, err = s.db.QueryContext(ctx, s.dialect.bind(`SELECT period, issuer, tenant, service, hook, ruleset, sum(calls), sum(with_cards), sum(failed)
		FROM call_counts WHERE period >= ? AND period < ? GROUP BY period, issuer, tenant, service, hook, ruleset`), periodOf(from), periodOf(to))
	if err != nil {
		return rep, fmt.Errorf("report calls: %w", err)
	}
	for rows.Next() {
		var g CallGroup
		var period string
		if err := rows.Scan(&period, &g.Issuer, &g.Tenant, &g.Service, &g.Hook, &g.Ruleset, &g.Calls, &g.WithCards, &g.Failed); err != nil {
			rows.Close()
			return rep, fmt.Errorf("report calls: %w", err)
		}
		if g.Period, err = time.Parse(periodFormat, period); err != nil {
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
