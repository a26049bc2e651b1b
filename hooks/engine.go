package hooks

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"strings"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/rules"
	"go.opentelemetry.io/otel/attribute"
	"go.opentelemetry.io/otel/metric"
	"go.opentelemetry.io/otel/trace"
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
	tel        *Telemetry
	budget     *ProcessBudget
	callBytes  int64
	appURL     string
	fixedClock bool
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
	// Telemetry reports spans and metrics; nil is no-op.
	Telemetry *Telemetry
	// Budget bounds the outside data all calls in flight hold (nil:
	// unbounded); CallBytes bounds what one call reads from FHIR servers
	// (0: only the process budget).
	Budget    *ProcessBudget
	CallBytes int64
	// AppURL, when set, is the sodium course app's SMART launch URL (an
	// absolute URL): cards about a draft's projection link it, and
	// discovery says so. FixedClock says calls are evaluated at a fixed
	// time (development), which the link then gives the app.
	AppURL     string
	FixedClock bool
}

// NewEngine returns an Engine.
func NewEngine(cfg EngineConfig) *Engine {
	if cfg.Limits.MaxPages < 1 {
		cfg.Limits.MaxPages = 1
	}
	if cfg.Telemetry == nil {
		cfg.Telemetry, _ = NewTelemetry(nil, nil) // no-op instruments cannot fail
	}
	return &Engine{registry: cfg.Registry, ruleset: cfg.Ruleset, newFetcher: cfg.NewFetcher,
		limits: cfg.Limits, log: cfg.Log, recorder: cfg.Recorder, hash: cfg.PatientHash, tel: cfg.Telemetry,
		budget: cfg.Budget, callBytes: cfg.CallBytes, appURL: cfg.AppURL, fixedClock: cfg.FixedClock}
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
	// UnknownPrefetchKeys counts prefetch keys sent that the service did not
	// ask for (ignored).
	UnknownPrefetchKeys int
	// Dropped counts the resources read but not used, by reason category
	// (fhirmap.DropCounts); it names no resource and may be logged.
	Dropped map[string]int
	// Held are the findings held back as repeats of cards already shown.
	Held []Held
}

// Handle answers one call to service id with body, evaluated at time at.
func (e *Engine) Handle(ctx context.Context, id string, body []byte, at time.Time) (*Outcome, error) {
	b := e.newCallBudget()
	defer b.Release()
	return e.handle(ctx, id, body, at, b)
}

// newCallBudget is a call's byte budget, drawn from the engine's process
// budget; the caller releases it once the call has answered.
func (e *Engine) newCallBudget() *CallBudget { return NewCallBudget(e.budget, e.callBytes) }

// handle answers a call whose FHIR reads are taken from budget.
func (e *Engine) handle(ctx context.Context, id string, body []byte, at time.Time, budget *CallBudget) (out *Outcome, err error) {
	svc, ok := e.registry.Lookup(id)
	if !ok { // not counted: the id is the caller's, of any length
		return nil, &Error{Kind: KindUnknownService, Message: "no CDS service with id " + quote(id)}
	}
	hook := ""
	defer func() { e.countCall(ctx, svc.ID, hook, at, out, err) }()
	call, err := DecodeCall(svc, body)
	if err != nil {
		return nil, err
	}
	hook = call.Request.Hook
	if span := trace.SpanFromContext(ctx); span.IsRecording() {
		span.SetAttributes(attribute.String("halite.hook", call.Request.Hook), attribute.String("halite.service", svc.ID))
	}
	fetch := e.fetcher(ctx, call, budget)
	if fetch != nil {
		fetch = newTracedFetcher(fetch, e.tel, call.Request.FHIRServer)
	}
	pctx, pspan := e.tel.start(ctx, "prefetch.resolve")
	keys, err := Resolve(pctx, svc, call, fetch, e.limits)
	if failed := keyFailures(keys); len(failed) > 0 {
		pspan.SetAttributes(attribute.StringSlice("halite.prefetch.failures", failed))
	}
	if err != nil {
		fail(pspan, CauseOf(err), err)
		pspan.End()
		return &Outcome{Keys: keys}, err // the keys, for the access log
	}
	in := mapInput(call, keys, at)
	in.Codes = e.registry.Codes()
	in.Entries = fetchMedications(pctx, fetch, in)
	states := map[KeyState]int{}
	for _, k := range keys {
		states[k.State]++
	}
	for st, n := range states {
		pspan.SetAttributes(attribute.Int("halite.prefetch."+string(st), n))
	}
	pspan.End()
	_, mspan := e.tel.start(ctx, "fhir.map")
	facts := fhirmap.Map(in, e.ruleset)
	used := 0
	for _, s := range facts.Labs {
		used += len(s)
	}
	mspan.SetAttributes(attribute.Int("halite.observations.used", used), attribute.Int("halite.observations.rejected", len(facts.Rejected)))
	mspan.End()
	for _, k := range keys {
		if k.State == Failed || k.State == Unavailable || k.Partial {
			facts.Gaps = append(facts.Gaps, rules.DataGap{Source: k.Key.Key, Reason: k.Key.What + ": " + k.Reason})
		}
	}
	_, rspan := e.tel.start(ctx, "rules.evaluate", attribute.String("halite.check", string(svc.Check)))
	findings := e.ruleset.Evaluate(svc.Check, facts)
	rspan.SetAttributes(attribute.Int("halite.findings", len(findings)))
	rspan.End()
	patientHash := ""
	if e.recorder != nil {
		patientHash = e.hash(patientKey(call.Request.FHIRServer, call.Context.PatientID))
	}
	findings, held := e.suppress(ctx, svc.ID, call.Request.Hook, patientHash, findings, at)
	drafts, draftOrder := draftIndex(call.DraftEntries)
	cards, err := renderCards(findings, e.ruleset.Revision(),
		suggestionInput{At: at, PatientID: call.Context.PatientID, EncounterID: call.Context.EncounterID, Drafts: drafts, DraftOrder: draftOrder,
			Service: svc.ID, AppURL: e.appURL, FixedClock: e.fixedClock})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", svc.ID, err)
	}
	resp := Response{Cards: cards}
	if err := ValidateResponse(resp); err != nil {
		return nil, fmt.Errorf("%s: %w", svc.ID, err)
	}
	if e.recorder != nil && len(cards)+len(held) > 0 {
		wctx, wspan := e.tel.start(ctx, "cardlog.write", attribute.Int("halite.cards", len(cards)), attribute.Int("halite.cards.suppressed", len(held)))
		err := e.recorder.LogCards(wctx, e.logged(ctx, svc.ID, call.Request.Hook, patientHash, findings, cards, held, at))
		if err != nil {
			err = storeError(err, "the card log could not be written")
			fail(wspan, CauseOf(err), err)
			e.tel.storeFailure(ctx, StoreOpCardLog, err)
		}
		wspan.End()
		if err != nil {
			// No card leaves without its record: feedback must be able to join.
			return nil, err
		}
	}
	for _, h := range held {
		e.tel.suppressed.Add(ctx, 1, metric.WithAttributes(attribute.String("rule", h.Finding.Rule),
			attribute.String("indicator", h.Finding.Indicator.String()), attribute.String("reason", h.Suppression.Reason)))
	}
	highest := rules.Indicator(0)
	for _, f := range findings {
		e.tel.cards.Add(ctx, 1, metric.WithAttributes(attribute.String("rule", f.Rule), attribute.String("indicator", f.Indicator.String())))
		highest = max(highest, f.Indicator)
	}
	if span := trace.SpanFromContext(ctx); span.IsRecording() {
		span.SetAttributes(attribute.Int("halite.cards", len(cards)), attribute.Int("halite.cards.suppressed", len(held)),
			attribute.String("halite.indicator.highest", highest.String()))
	}
	return &Outcome{Response: resp, Keys: keys, Facts: facts, UnknownPrefetchKeys: call.UnknownPrefetchKeys,
		Dropped: fhirmap.DropCounts(facts), Held: held}, nil
}

// keyFailures names each key not had, or had in part, with its code
// ("sodium=timeout"): no value from the request.
func keyFailures(keys []Resolved) []string {
	var out []string
	for _, k := range keys {
		if k.Code != "" && (k.State == Failed || k.State == Unavailable || k.Partial) {
			out = append(out, k.Key.Key+"="+k.Code)
		}
	}
	return out
}

// countCall counts a call to a service for the burden report: answered
// (with the cards it returned and held back) or failed.
func (e *Engine) countCall(ctx context.Context, service, hook string, at time.Time, out *Outcome, err error) {
	if e.recorder == nil {
		return
	}
	caller := CallerFrom(ctx)
	c := CallCount{At: at, Service: service, Hook: hook, Issuer: caller.Issuer, Tenant: caller.Tenant, Ruleset: e.ruleset.Revision(), Failed: err != nil}
	if out != nil {
		c.Cards, c.Suppressed = len(out.Response.Cards), len(out.Held)
	}
	e.recorder.CountCall(c)
}

// patientKey names the patient for the card log's keyed hash: its FHIR
// server (normalised) with its id, so that two patients of one caller with
// the same id on different servers are never taken for one another; the
// id alone when the call named no server.
func patientKey(server, id string) string {
	server = strings.TrimRight(strings.ToLower(strings.TrimSpace(server)), "/")
	if server == "" {
		return "Patient/" + id
	}
	return server + "/Patient/" + id
}

// storeError is the answer to a store failure: the store adapter's own
// *Error (it knows the reason) or a 503 for a fault it did not classify.
func storeError(err error, message string) error {
	var e *Error
	if errors.As(err, &e) {
		return err
	}
	return &Error{Kind: KindUnavailable, Reason: ReasonStoreFault, Message: message, Err: err}
}

// logged is the card-log form of the cards of one response and of the
// findings held back.
func (e *Engine) logged(ctx context.Context, service, hook, patientHash string, fs []rules.Finding, cards []Card, held []Held, at time.Time) []LoggedCard {
	out := make([]LoggedCard, 0, len(cards)+len(held))
	caller := CallerFrom(ctx)
	m := momentOf(hook)
	record := func(id string, f rules.Finding, indicator string, sugg []string, subject, draft string) LoggedCard {
		return LoggedCard{UUID: id, Service: service, Rule: f.Rule, Indicator: indicator, Ruleset: e.ruleset.Revision(),
			Issuer: caller.Issuer, Tenant: caller.Tenant, PatientHash: patientHash, At: at, Figures: f.Figures, Suggestions: sugg,
			Moment: m, Subject: subject, Draft: draft}
	}
	for i, c := range cards {
		var sugg []string
		for _, s := range c.Suggestions {
			sugg = append(sugg, s.UUID)
		}
		subject, draft := e.findingKeys(fs[i])
		out = append(out, record(c.UUID, fs[i], c.Indicator, sugg, subject, draft))
	}
	for _, h := range held {
		r := record(h.ID, h.Finding, h.Finding.Indicator.String(), nil, h.Subject, h.Draft)
		r.Suppressed = h.Suppression.Reason
		out = append(out, r)
	}
	return out
}

// fetcher returns the outbound client for the call, or nil when the call
// gave no server and token, or the server may not be used by this caller
// (it is then answered as if no server were given).
func (e *Engine) fetcher(ctx context.Context, c *Call, budget *CallBudget) Fetcher {
	r := c.Request
	if e.newFetcher == nil || r.FHIRServer == "" || r.FHIRAuthorization == nil {
		return nil
	}
	f, err := e.newFetcher(r.FHIRServer, r.FHIRAuthorization, CallerFrom(ctx), budget)
	if err != nil {
		// A refusal is this deployment's choice (an allowlist) unless the
		// factory names another code (an insecure URL is the caller's).
		c.fetchRefused = CodeServerNotUsed
		var named interface{ Code() string }
		if errors.As(err, &named) && CodeCause(named.Code()) != "" {
			c.fetchRefused = named.Code()
		}
		if e.log != nil {
			e.log.WarnContext(ctx, "fhirServer not used", "reason", err.Error(), "code", c.fetchRefused,
				"cause", CodeCause(c.fetchRefused), "hookInstance", r.HookInstance)
		}
		return nil
	}
	return f
}

func mapInput(c *Call, keys []Resolved, at time.Time) fhirmap.Input {
	in := fhirmap.Input{At: at, PatientID: c.Context.PatientID, Server: c.Request.FHIRServer}
	in.DraftEntries = c.DraftEntries // with their fullUrls
	if c.Request.Hook == HookOrderSelect {
		in.Selections = c.Context.Selections
	}
	for _, k := range keys {
		if k.Key.Key == "patient" {
			if len(k.Resources) > 0 {
				in.Patient, in.PatientFullURL = k.Resources[0].Resource, k.Resources[0].FullURL
			}
			continue
		}
		in.Entries = append(in.Entries, k.Resources...)
	}
	return in
}

func quote(s string) string {
	if len(s) > 64 {
		s = s[:64] + "…"
	}
	return "\"" + s + "\""
}
