package feedback

import (
	"context"
	"database/sql"
	"fmt"
	"sort"
	"time"
)

// RuleStats are the outcomes of one rule of one service over a period.
type RuleStats struct {
	Service, Rule      string
	Shown              int64 // cards returned
	Suppressed         int64 // findings held back as repeats (never returned)
	Accepted           int64 // cards with an accepted outcome
	Overridden         int64 // cards with an overridden outcome (and none accepted)
	TopOverrideReasons []ReasonCount
}

// AcceptanceRate is accepted cards over cards with any outcome; NaN-free:
// 0 when no card had feedback.
func (r RuleStats) AcceptanceRate() float64 {
	if n := r.Accepted + r.Overridden; n > 0 {
		return float64(r.Accepted) / float64(n)
	}
	return 0
}

// ReasonCount is how often an override reason was given.
type ReasonCount struct {
	System, Code string
	Count        int64
}

// DayCounts are the cards shown, accepted and overridden on one UTC day.
type DayCounts struct {
	Day                         string // YYYY-MM-DD
	Shown, Accepted, Overridden int64
}

// Report is what the committee reads for a period.
type Report struct {
	From, To time.Time
	Rules    []RuleStats
	Days     []DayCounts
}

// Report summarises cards logged in [from, to).
func (s *DB) Report(ctx context.Context, from, to time.Time) (Report, error) {
	rep := Report{From: from, To: to}
	f, t := from.UTC().Format(tsFormat), to.UTC().Format(tsFormat)
	// A card's outcome: accepted if any feedback accepted it, else overridden if any overrode it.
	const outcome = `(SELECT CASE WHEN EXISTS (SELECT 1 FROM feedback f WHERE f.card_uuid = c.card_uuid AND f.outcome = 'accepted') THEN 'accepted'
		WHEN EXISTS (SELECT 1 FROM feedback f WHERE f.card_uuid = c.card_uuid) THEN 'overridden' ELSE '' END)`
	rows, err := s.db.QueryContext(ctx, s.dialect.bind(`SELECT c.service, c.rule, sum(CASE WHEN c.suppressed = '' THEN 1 ELSE 0 END),
		sum(CASE WHEN c.suppressed <> '' THEN 1 ELSE 0 END),
		sum(CASE WHEN `+outcome+` = 'accepted' THEN 1 ELSE 0 END),
		sum(CASE WHEN `+outcome+` = 'overridden' THEN 1 ELSE 0 END)
		FROM card_log c WHERE c.created_at >= ? AND c.created_at < ? GROUP BY c.service, c.rule ORDER BY c.service, c.rule`), f, t)
	if err != nil {
		return rep, fmt.Errorf("report: %w", err)
	}
	for rows.Next() {
		var r RuleStats
		if err := rows.Scan(&r.Service, &r.Rule, &r.Shown, &r.Suppressed, &r.Accepted, &r.Overridden); err != nil {
			rows.Close()
			return rep, fmt.Errorf("report: %w", err)
		}
		rep.Rules = append(rep.Rules, r)
	}
	rows.Close()
	for i := range rep.Rules {
		r := &rep.Rules[i]
		reasons, err := s.db.QueryContext(ctx, s.dialect.bind(`SELECT f.reason_system, f.reason_code, count(*) FROM feedback f
			JOIN card_log c ON c.card_uuid = f.card_uuid
			WHERE c.service = ? AND c.rule = ? AND c.created_at >= ? AND c.created_at < ? AND f.outcome = 'overridden' AND f.reason_code <> ''
			GROUP BY f.reason_system, f.reason_code ORDER BY count(*) DESC, f.reason_code LIMIT 3`), r.Service, r.Rule, f, t)
		if err != nil {
			return rep, fmt.Errorf("report reasons: %w", err)
		}
		for reasons.Next() {
			var rc ReasonCount
			if err := reasons.Scan(&rc.System, &rc.Code, &rc.Count); err != nil {
				reasons.Close()
				return rep, fmt.Errorf("report reasons: %w", err)
			}
			r.TopOverrideReasons = append(r.TopOverrideReasons, rc)
		}
		reasons.Close()
	}
	days, err := s.db.QueryContext(ctx, s.dialect.bind(`SELECT substr(c.created_at, 1, 10) AS day, count(*),
		sum(CASE WHEN `+outcome+` = 'accepted' THEN 1 ELSE 0 END),
		sum(CASE WHEN `+outcome+` = 'overridden' THEN 1 ELSE 0 END)
		FROM card_log c WHERE c.created_at >= ? AND c.created_at < ? AND c.suppressed = '' GROUP BY day ORDER BY day`), f, t)
	if err != nil {
		return rep, fmt.Errorf("report days: %w", err)
	}
	defer days.Close()
	for days.Next() {
		var d DayCounts
		var acc, over sql.NullInt64
		if err := days.Scan(&d.Day, &d.Shown, &acc, &over); err != nil {
			return rep, fmt.Errorf("report days: %w", err)
		}
		d.Accepted, d.Overridden = acc.Int64, over.Int64
		rep.Days = append(rep.Days, d)
	}
	sort.Slice(rep.Days, func(i, j int) bool { return rep.Days[i].Day < rep.Days[j].Day })
	return rep, days.Err()
}
