package hooks

import (
	"context"
	"encoding/json"
	"fmt"
	"log/slog"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/rules"
)

// Engine runs hook calls: decode, resolve prefetch, map, evaluate, render.
// The HTTP handlers and the eval command both call it, so a bundle answered
// on the command line is answered exactly as the server would.
type Engine struct {
	registry   *Registry
	ruleset    *rules.Ruleset
	newFetcher FetcherFactory
	limits     Limits
	log        *slog.Logger
	recorder   Recorder
	hash       func(string) string
}

// EngineConfig is what an Engine is built from.
type EngineConfig struct {
	Registry *Registry
	Ruleset  *rules.Ruleset
	// NewFetcher makes the outbound FHIR client; nil disables fetching, so
	// only prefetched data is used.
	NewFetcher FetcherFactory
	Limits     Limits
	Log        *slog.Logger
	// Recorder, when set, logs every card before the response is sent;
	// PatientHash keys the patient reference for it (required with it).
	Recorder    Recorder
	PatientHash func(reference string) string
}

// NewEngine returns an Engine.
func NewEngine(cfg EngineConfig) *Engine {
	if cfg.Limits.MaxPages < 1 {
		cfg.Limits.MaxPages = 1
	}
	return &Engine{registry: cfg.Registry, ruleset: cfg.Ruleset, newFetcher: cfg.NewFetcher,
		limits: cfg.Limits, log: cfg.Log, recorder: cfg.Recorder, hash: cfg.PatientHash}
}

// Registry returns the engine's services.
func (e *Engine) Registry() *Registry { return e.registry }

// Ruleset returns the engine's ruleset.
func (e *Engine) Ruleset() *rules.Ruleset { return e.ruleset }

// Outcome is the answer to one call with what was learnt on the way, for the
// eval command's report and for logs. It holds PHI (facts) and must never be
// logged whole.
type Outcome struct {
	Response Response
	Keys     []Resolved
	Facts    rules.Facts
}

// Handle answers one call to service id with body, evaluated at time at.
func (e *Engine) Handle(ctx context.Context, id string, body []byte, at time.Time) (*Outcome, error) {
	svc, ok := e.registry.Lookup(id)
	if !ok {
		return nil, &Error{Kind: KindUnknownService, Message: "no CDS service with id " + quote(id)}
	}
	call, err := DecodeCall(svc, body)
	if err != nil {
		return nil, err
	}
	fetch := e.fetcher(ctx, call)
	keys, err := Resolve(ctx, svc, call, fetch, e.limits)
	if err != nil {
		return nil, err
	}
	in := mapInput(call, keys, at)
	in.Resources = append(in.Resources,
		fetchMedications(ctx, fetch, append(append([]json.RawMessage(nil), in.Resources...), in.DraftOrders...))...)
	facts := fhirmap.Map(in, e.ruleset)
	for _, k := range keys {
		if k.State == Failed || k.State == Unavailable || k.Partial {
			facts.Gaps = append(facts.Gaps, rules.DataGap{Source: k.Key.Key, Reason: k.Key.What + ": " + k.Reason})
		}
	}
	findings := e.ruleset.Evaluate(svc.Check, facts)
	cards, err := renderCards(findings, e.ruleset.Revision(),
		suggestionInput{At: at, PatientID: call.Context.PatientID, Drafts: draftIndex(call.DraftOrders)})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", svc.ID, err)
	}
	resp := Response{Cards: cards}
	if err := ValidateResponse(resp); err != nil {
		return nil, fmt.Errorf("%s: %w", svc.ID, err)
	}
	if e.recorder != nil && len(cards) > 0 {
		if err := e.recorder.LogCards(ctx, e.logged(ctx, svc.ID, call.Context.PatientID, findings, cards, at)); err != nil {
			// No card leaves without its record: feedback must be able to join.
			return nil, &Error{Kind: KindUnavailable, Message: "the card log could not be written", Err: err}
		}
	}
	return &Outcome{Response: resp, Keys: keys, Facts: facts}, nil
}

// logged is the card-log form of the cards of one response.
func (e *Engine) logged(ctx context.Context, service, patientID string, fs []rules.Finding, cards []Card, at time.Time) []LoggedCard {
	out := make([]LoggedCard, len(cards))
	hash := e.hash("Patient/" + patientID)
	for i, c := range cards {
		var sugg []string
		for _, s := range c.Suggestions {
			sugg = append(sugg, s.UUID)
		}
		out[i] = LoggedCard{UUID: c.UUID, Service: service, Rule: fs[i].Rule, Indicator: c.Indicator, Ruleset: e.ruleset.Revision(),
			Tenant: CallerFrom(ctx).Tenant, PatientHash: hash, At: at, Figures: fs[i].Figures, Suggestions: sugg}
	}
	return out
}

// fetcher returns the outbound client for the call, or nil when the call
// gave no server and token, or the server may not be used by this caller
// (it is then answered as if no server were given).
func (e *Engine) fetcher(ctx context.Context, c *Call) Fetcher {
	r := c.Request
	if e.newFetcher == nil || r.FHIRServer == "" || r.FHIRAuthorization == nil {
		return nil
	}
	f, err := e.newFetcher(r.FHIRServer, r.FHIRAuthorization, CallerFrom(ctx))
	if err != nil {
		if e.log != nil {
			e.log.Warn("fhirServer not used", "reason", err.Error(), "hookInstance", r.HookInstance)
		}
		return nil
	}
	return f
}

func mapInput(c *Call, keys []Resolved, at time.Time) fhirmap.Input {
	in := fhirmap.Input{At: at, PatientID: c.Context.PatientID, DraftOrders: c.DraftOrders}
	if c.Request.Hook == HookOrderSelect {
		in.Selections = c.Context.Selections
	}
	for _, k := range keys {
		if k.Key.Key == "patient" {
			if len(k.Resources) > 0 {
				in.Patient = k.Resources[0]
			}
			continue
		}
		in.Resources = append(in.Resources, k.Resources...)
	}
	return in
}

func quote(s string) string {
	if len(s) > 64 {
		s = s[:64] + "…"
	}
	return "\"" + s + "\""
}
