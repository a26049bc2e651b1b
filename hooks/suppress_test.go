package hooks

import (
	"context"
	"errors"
	"testing"
	"time"

	"github.com/halite-cds/halite/rules"
)

// priorRecorder answers PriorCards with its cards or its error, and counts
// the lookups.
type priorRecorder struct {
	memRecorder
	prior   []rules.ShownCard
	err     error
	lookups int
}

func (p *priorRecorder) PriorCards(context.Context, PriorQuery) ([]rules.ShownCard, error) {
	p.lookups++
	return p.prior, p.err
}

// TestSuppressFailsOpen: a card log that cannot be read holds nothing
// back; a prior card the policy matches holds the finding back; a site
// that sets every period to zero is not looked up at all.
func TestSuppressFailsOpen(t *testing.T) {
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	f := rules.Finding{Rule: rules.RuleProfoundOrFalling, Indicator: rules.Warning, Figures: map[string]float64{"sodiumLatest": 123}}
	prior := []rules.ShownCard{{Rule: f.Rule, Moment: rules.MomentChart, Indicator: rules.Warning, Figures: f.Figures, At: at.Add(-time.Hour)}}
	off, err := rules.LoadWithOverride([]byte(`{"suppression": {"selectToSignMinutes": 0, "overrideHours": 0, "chartIntervalHours": 0}}`))
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name    string
		rec     *priorRecorder
		rs      *rules.Ruleset
		held    int
		lookups int
	}{
		{"lookup fails", &priorRecorder{err: errors.New("database is locked")}, nil, 0, 1},
		{"a repeat", &priorRecorder{prior: prior}, nil, 1, 1},
		{"suppression off", &priorRecorder{prior: prior}, off, 0, 0},
	} {
		t.Run(c.name, func(t *testing.T) {
			e := testEngine(t, nil)
			e.recorder, e.hash = c.rec, func(string) string { return "h" }
			if c.rs != nil {
				e.ruleset = c.rs
			}
			shown, held := e.suppress(context.Background(), "sodium-chart-review", HookPatientView, "h", []rules.Finding{f}, at)
			if len(held) != c.held || len(shown)+len(held) != 1 || c.rec.lookups != c.lookups {
				t.Errorf("shown %d, held %d, lookups %d; want held %d, lookups %d", len(shown), len(held), c.rec.lookups, c.held, c.lookups)
			}
		})
	}
}

// countingRecorder keeps the calls counted.
type countingRecorder struct {
	memRecorder
	counts []CallCount
}

func (c *countingRecorder) CountCall(n CallCount) { c.counts = append(c.counts, n) }

// TestCallsCounted: an answered call is counted with its cards, a failed
// one as failed, a call to an unknown service not at all.
func TestCallsCounted(t *testing.T) {
	e := testEngine(t, nil)
	rec := &countingRecorder{}
	e.recorder, e.hash = rec, func(string) string { return "h" }
	req, err := BuildRequest(loadScenario(t, "09-rapid-correction-high-risk.json"), mustService(t, "sodium-chart-review"), RequestOptions{Hook: HookPatientView, UserID: "Practitioner/test-user"})
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	out, err := e.Handle(context.Background(), "sodium-chart-review", mustMarshal(t, req), at)
	if err != nil || len(out.Response.Cards) == 0 {
		t.Fatalf("%v", err)
	}
	if _, err := e.Handle(context.Background(), "sodium-chart-review", []byte(`{"hook":"patient-view"}`), at); err == nil {
		t.Fatal("a bad request was answered")
	}
	if _, err := e.Handle(context.Background(), "no-such-service", []byte(`{}`), at); err == nil {
		t.Fatal("an unknown service was answered")
	}
	if len(rec.counts) != 2 {
		t.Fatalf("counted %+v, want two calls", rec.counts)
	}
	ok, bad := rec.counts[0], rec.counts[1]
	if ok.Failed || ok.Cards != len(out.Response.Cards) || ok.Hook != HookPatientView || ok.Service != "sodium-chart-review" || ok.Ruleset == "" {
		t.Errorf("answered call counted as %+v", ok)
	}
	if !bad.Failed || bad.Cards != 0 || bad.Hook != "" {
		t.Errorf("failed call counted as %+v", bad)
	}
}
