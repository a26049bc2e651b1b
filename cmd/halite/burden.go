package main

import (
	"cmp"
	"fmt"
	"slices"
	"strings"
	"time"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/feedback"
	"github.com/halite-cds/halite/rules"
)

// burden is the card log read for people: how many cards a site gets per
// 100 calls, by site, service, rule, indicator and ruleset revision; what
// clinicians do with them and how soon; what was held back as repeats;
// and every day of the period. It names no patient.
type burden struct {
	From, To   string // local days, inclusive
	Zone       string
	Total      volume
	Sites      []volume
	Services   []volume
	Indicators []volume
	Rules      []ruleRow
	Revisions  []revisionRow
	Reasons    []countRow
	Held       []countRow
	Days       []dayRow
	// EarlyFeedback counts feedback dated before its card (an EHR clock
	// off), left out of the response times.
	EarlyFeedback int
}

// volume is calls and cards for one site, service, indicator or in all.
type volume struct {
	Name                            string
	Calls, WithCards, Failed, Cards int64
	Held                            int64
	Critical, Warning, Info         int64
	// Overridden counts every card overridden; Offered, Accepted and
	// offeredOverridden only cards with a suggestion (for acceptance).
	Overridden                           int64
	Offered, Accepted, offeredOverridden int64
}

// Per100 is cards per 100 calls, "n/a" without calls.
func (v volume) Per100() string { return per100(v.Cards, v.Calls) }

// HeldPer100 is findings held back per 100 calls.
func (v volume) HeldPer100() string { return per100(v.Held, v.Calls) }

// Acceptance is accepted over accepted and overridden among cards that
// offered a suggestion: "n/a" when none offered one.
func (v volume) Acceptance() string { return acceptance(v.Offered, v.Accepted, v.offeredOverridden) }

// ruleRow is one rule's burden and outcomes.
type ruleRow struct {
	volume
	Service, Rule string
	Median        string // time from card to first feedback
	Reasons       string // top override reasons by label
}

// revisionRow is one ruleset revision's burden, for before/after.
type revisionRow struct {
	volume
	First, Last string // local days it answered calls or showed cards
	Median      string
}

// countRow is a labelled count with its share of the total.
type countRow struct {
	Label string
	Count int64
	Share string
}

// dayRow is one local day.
type dayRow struct {
	Day                                  string
	Calls, Accepted, Overridden, Pending int64
	Held                                 int64
}

// Shown is the cards returned that day.
func (d dayRow) Shown() int64 { return d.Accepted + d.Overridden + d.Pending }

func per100(n, calls int64) string {
	if calls == 0 {
		return "n/a"
	}
	return fmt.Sprintf("%.1f", 100*float64(n)/float64(calls))
}

func acceptance(offered, accepted, overridden int64) string {
	switch {
	case offered == 0:
		return "n/a"
	case accepted+overridden == 0:
		return "no feedback"
	}
	return fmt.Sprintf("%.0f%%", 100*float64(accepted)/float64(accepted+overridden))
}

// heldLabels word the suppression reasons for people.
var heldLabels = map[string]string{
	rules.SuppressedSelectToSign:   "shown at selection, unchanged at signing",
	rules.SuppressedOverridden:     "overridden with a reason, no worse since",
	rules.SuppressedChartUnchanged: "shown at an earlier chart opening, no worse since",
}

// siteOf names a caller: its tenant, else its issuer.
func siteOf(issuer, tenant string) string {
	switch {
	case tenant != "":
		return tenant
	case issuer != "":
		return issuer
	}
	return "(development mode, no caller)"
}

// readBurden reads rep for days from..to (local days in loc, inclusive).
func readBurden(rep feedback.Report, from, to time.Time, loc *time.Location) burden {
	b := burden{From: from.Format("2006-01-02"), To: to.Format("2006-01-02"), Zone: loc.String(), Total: volume{Name: "all"}}
	sites, services, indicators := map[string]*volume{}, map[string]*volume{}, map[string]*volume{}
	ruleRows, revisions := map[[2]string]*ruleRow{}, map[string]*revisionRow{}
	days := map[string]*dayRow{}
	for d := from; !d.After(to); d = d.AddDate(0, 0, 1) {
		day := d.Format("2006-01-02")
		days[day] = &dayRow{Day: day}
		b.Days = append(b.Days, dayRow{Day: day})
	}
	get := func(m map[string]*volume, name string) *volume {
		if m[name] == nil {
			m[name] = &volume{Name: name}
		}
		return m[name]
	}
	revision := func(name, day string) *revisionRow {
		r := revisions[name]
		if r == nil {
			r = &revisionRow{volume: volume{Name: name}, First: day, Last: day}
			revisions[name] = r
		}
		r.First, r.Last = min(r.First, day), max(r.Last, day)
		return r
	}
	for _, c := range rep.Calls {
		day := c.Period.In(loc).Format("2006-01-02")
		for _, v := range []*volume{&b.Total, get(sites, siteOf(c.Issuer, c.Tenant)), get(services, c.Service), &revision(c.Ruleset, day).volume} {
			v.Calls += c.Calls
			v.WithCards += c.WithCards
			v.Failed += c.Failed
		}
		if d := days[day]; d != nil {
			d.Calls += c.Calls
		}
	}
	heldBy := map[string]int64{}
	for _, g := range rep.Cards {
		day := g.Period.In(loc).Format("2006-01-02")
		key := [2]string{g.Service, g.Rule}
		if ruleRows[key] == nil {
			ruleRows[key] = &ruleRow{volume: volume{Name: g.Rule}, Service: g.Service, Rule: g.Rule}
		}
		vs := []*volume{&b.Total, get(sites, siteOf(g.Issuer, g.Tenant)), get(services, g.Service), get(indicators, g.Indicator),
			&ruleRows[key].volume, &revision(g.Ruleset, day).volume}
		d := days[day]
		if g.Suppressed != "" {
			heldBy[g.Suppressed] += g.Count
			for _, v := range vs {
				v.Held += g.Count
			}
			if d != nil {
				d.Held += g.Count
			}
			continue
		}
		for _, v := range vs {
			v.Cards += g.Count
			switch g.Indicator {
			case "critical":
				v.Critical += g.Count
			case "warning":
				v.Warning += g.Count
			default:
				v.Info += g.Count
			}
			if g.Outcome == feedback.Overridden {
				v.Overridden += g.Count
			}
			if g.Offered {
				v.Offered += g.Count
				switch g.Outcome {
				case feedback.Accepted:
					v.Accepted += g.Count
				case feedback.Overridden:
					v.offeredOverridden += g.Count
				}
			}
		}
		if d != nil {
			switch g.Outcome {
			case feedback.Accepted:
				d.Accepted += g.Count
			case feedback.Overridden:
				d.Overridden += g.Count
			default:
				d.Pending += g.Count
			}
		}
	}
	for i := range b.Days {
		b.Days[i] = *days[b.Days[i].Day]
	}
	// A rule's and an indicator's cards are per 100 calls to the service
	// that shows them (an indicator: to all services).
	for _, r := range ruleRows {
		r.Calls = services[r.Service].callsOrZero()
	}
	for _, v := range indicators {
		v.Calls = b.Total.Calls
	}
	responses := map[string][]time.Duration{}
	for _, r := range rep.Responses {
		if r.After < 0 {
			b.EarlyFeedback++
			continue
		}
		responses["rule "+r.Service+" "+r.Rule] = append(responses["rule "+r.Service+" "+r.Rule], r.After)
		responses["revision "+r.Ruleset] = append(responses["revision "+r.Ruleset], r.After)
	}
	reasonsBy := map[[2]string][]feedback.ReasonGroup{}
	byLabel := map[string]int64{}
	var overridesWithReason int64
	for _, g := range rep.Reasons {
		key := [2]string{g.Service, g.Rule}
		reasonsBy[key] = append(reasonsBy[key], g)
		byLabel[hooks.OverrideReasonLabel(g.System, g.Code)] += g.Count
		overridesWithReason += g.Count
	}
	for key, r := range ruleRows {
		r.Median = median(responses["rule "+key[0]+" "+key[1]])
		gs := reasonsBy[key]
		slices.SortFunc(gs, func(a, b feedback.ReasonGroup) int {
			return cmp.Or(cmp.Compare(b.Count, a.Count), cmp.Compare(a.Code, b.Code))
		})
		var top []string
		for _, g := range gs[:min(3, len(gs))] {
			top = append(top, fmt.Sprintf("%s (%d)", hooks.OverrideReasonLabel(g.System, g.Code), g.Count))
		}
		r.Reasons = strings.Join(top, "; ")
		b.Rules = append(b.Rules, *r)
	}
	for name, r := range revisions {
		r.Median = median(responses["revision "+name])
		b.Revisions = append(b.Revisions, *r)
	}
	b.Sites, b.Services, b.Indicators = byVolume(sites), byVolume(services), byVolume(indicators)
	slices.SortFunc(b.Rules, func(x, y ruleRow) int {
		return cmp.Or(cmp.Compare(y.Cards+y.Held, x.Cards+x.Held), cmp.Compare(x.Service, y.Service), cmp.Compare(x.Rule, y.Rule))
	})
	slices.SortFunc(b.Revisions, func(x, y revisionRow) int { return cmp.Or(cmp.Compare(x.First, y.First), cmp.Compare(x.Name, y.Name)) })
	b.Reasons = counted(byLabel, overridesWithReason, func(k string) string { return k })
	var held int64
	for _, n := range heldBy {
		held += n
	}
	b.Held = counted(heldBy, held, func(k string) string { return cmp.Or(heldLabels[k], k) })
	return b
}

func (v *volume) callsOrZero() int64 {
	if v == nil {
		return 0
	}
	return v.Calls
}

// byVolume lists m's volumes, the most cards (then calls) first.
func byVolume(m map[string]*volume) []volume {
	out := make([]volume, 0, len(m))
	for _, v := range m {
		out = append(out, *v)
	}
	slices.SortFunc(out, func(x, y volume) int {
		return cmp.Or(cmp.Compare(y.Cards+y.Held, x.Cards+x.Held), cmp.Compare(y.Calls, x.Calls), cmp.Compare(x.Name, y.Name))
	})
	return out
}

// counted lists m's counts by label, largest first, with shares of total.
func counted(m map[string]int64, total int64, label func(string) string) []countRow {
	var out []countRow
	for k, n := range m {
		out = append(out, countRow{Label: label(k), Count: n, Share: fmt.Sprintf("%.0f%%", 100*float64(n)/float64(max(total, 1)))})
	}
	slices.SortFunc(out, func(x, y countRow) int { return cmp.Or(cmp.Compare(y.Count, x.Count), cmp.Compare(x.Label, y.Label)) })
	return out
}

// median is the median of ds, written for people, or "-" without any.
func median(ds []time.Duration) string {
	if len(ds) == 0 {
		return "-"
	}
	s := slices.Clone(ds)
	slices.Sort(s)
	m := s[len(s)/2]
	if len(s)%2 == 0 {
		m = (s[len(s)/2-1] + s[len(s)/2]) / 2
	}
	switch {
	case m < time.Minute:
		return fmt.Sprintf("%.0f s", m.Seconds())
	case m < time.Hour:
		return fmt.Sprintf("%.1f min", m.Minutes())
	case m < 48*time.Hour:
		return fmt.Sprintf("%.1f h", m.Hours())
	}
	return fmt.Sprintf("%.1f d", m.Hours()/24)
}
