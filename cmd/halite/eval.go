package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"sort"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/rules"
)

// Exit statuses of eval, so CI pipelines can gate on the highest indicator.
const (
	exitOK       = 0 // no card, or info cards only
	exitFailure  = 1 // bad input or failure
	exitWarning  = 2
	exitCritical = 3
	exitFailOn   = 4 // with --fail-on: a card at the level or above
)

// eval runs a bundle, or a captured CDS Hooks request, through the same
// pipeline as the server and prints the response: a readable report, or
// with --json the exact CDS Hooks response.
func eval(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("eval", "eval [--hook HOOK] [--service ID] [--at RFC3339] [--json] [--policy-override FILE] [--lab-codes FILE] [--display-timezone ZONE] [--display-units LIST] [--card-log sqlite:PATH --hash-key-file FILE] BUNDLE|REQUEST", stderr)
	var bf bundleFlags
	bf.register(fs)
	at := fs.String("at", "", "evaluation `time` (RFC 3339), so results are reproducible (default: now)")
	asJSON := fs.Bool("json", false, "print the exact CDS Hooks response (keyed by service id without --service)")
	policy := fs.String("policy-override", "", "apply a site policy override `file` (JSON shaped like the embedded policy)")
	zone := fs.String("display-timezone", "", "write the cards' times in this IANA `zone` (as display_timezone does for the server; default UTC)")
	unitList := fs.String("display-units", "", "write the cards' concentrations in these units (`list` such as electrolytes=mEq/L,glucose=mg/dL,urea=mg/dL,creatinine=mg/dL; as display_units does for the server)")
	cardLog := fs.String("card-log", "", "log the cards to this local card log (`DSN` sqlite:PATH) and hold back repeats of cards it holds, as the server does")
	hashKey := fs.String("hash-key-file", "", "the `file` keying patient hashes in --card-log (at least 32 bytes; the same key joins runs)")
	failOn := fs.String("fail-on", "", "exit 4 when any card is at this `level` or above (info, warning or critical), so that an info card is told from none; the default statuses are unchanged")
	path, err := parseBundleArgs(fs, args)
	if err != nil {
		return err
	}
	if _, ok := indicatorRank[*failOn]; *failOn != "" && !ok {
		return fmt.Errorf("--fail-on: %q is not info, warning or critical", *failOn)
	}
	if (*cardLog == "") != (*hashKey == "") {
		return errors.New("eval: --card-log and --hash-key-file go together: repeats are matched by the keyed patient hash")
	}
	when := time.Now()
	if *at != "" {
		if when, err = time.Parse(time.RFC3339, *at); err != nil {
			return fmt.Errorf("--at: %q is not an RFC 3339 time such as 2026-11-20T08:00:00Z", *at)
		}
	}
	rs, err := loadRuleset(*policy)
	if err != nil {
		return err
	}
	units, err := parseDisplayUnits(*unitList)
	if err != nil {
		return fmt.Errorf("--display-units: %w", err)
	}
	if rs, err = displayRuleset(rs, *zone, units); err != nil {
		return fmt.Errorf("--display-timezone: %w", err)
	}
	reg, err := bf.registry(rs)
	if err != nil {
		return err
	}
	in, err := readCase(path)
	if err != nil {
		return err
	}
	if in.hook != "" {
		if bf.hook != "" && bf.hook != in.hook {
			return fmt.Errorf("--hook %s: the captured request in %s is for hook %q", bf.hook, path, in.hook)
		}
		if len(bf.selections) > 0 || bf.encounter != "" || bf.user != "Practitioner/cli-user" {
			return fmt.Errorf("--select, --encounter and --user build a request from a Bundle; %s is a captured request, sent as it is", path)
		}
		bf.hook = in.hook
	}
	svcs, err := bf.services(reg)
	if err != nil {
		return err
	}
	log := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: slog.LevelWarn}))
	// No fetcher: everything comes from the bundle, through prefetch.
	ec := hooks.EngineConfig{Registry: reg, Ruleset: rs, Limits: hooks.Limits{MaxPages: 1}, Log: log}
	if *cardLog != "" {
		sc := defaultStoreConfig()
		sc.DSN, sc.HashKeyFile = *cardLog, *hashKey
		if sc.postgres() {
			return errors.New("eval --card-log: a sqlite:PATH card log only (eval's cards come from no caller; keep them out of a service's store)")
		}
		if err := sc.validate(false); err != nil {
			return fmt.Errorf("eval --card-log: %w", err)
		}
		st, hash, err := openStore(sc, log, false)
		if err != nil {
			return fmt.Errorf("eval --card-log: %w", err)
		}
		defer st.Close()
		ec.Recorder, ec.PatientHash = recorder{st}, hash
	}
	outcomes, unasked, warning, err := in.run(ctx, hooks.NewEngine(ec), svcs, bf.options(), when)
	if err != nil {
		return err
	}
	if warning != "" && *asJSON {
		// stdout stays the exact CDS Hooks response.
		fmt.Fprintln(stderr, warning)
	}
	switch {
	case *asJSON && bf.service != "":
		err = writeJSON(stdout, outcomes[bf.service].Response)
	case *asJSON:
		all := map[string]hooks.Response{}
		for id, o := range outcomes {
			all[id] = o.Response
		}
		err = writeJSON(stdout, all)
	default:
		err = writeReport(stdout, bf.hook, when, rs.Revision(), warning, svcs, outcomes, unasked)
	}
	if err != nil {
		return err
	}
	if *failOn != "" {
		for _, o := range outcomes {
			for _, c := range o.Response.Cards {
				if indicatorRank[c.Indicator] >= indicatorRank[*failOn] {
					return &exitError{code: exitFailOn}
				}
			}
		}
		return nil
	}
	if code := exitStatus(outcomes); code != exitOK {
		return &exitError{code: code}
	}
	return nil
}

// caseInput is one input eval reads: a FHIR Bundle, or a captured CDS
// Hooks request (data, sent as it is) with its hook.
type caseInput struct {
	data   []byte
	bundle *fhirmap.Bundle
	hook   string
}

// readCase reads path as a Bundle or a captured request.
func readCase(path string) (caseInput, error) {
	data, err := readInput(path)
	if err != nil {
		return caseInput{}, fmt.Errorf("eval: read %s: %w", path, err)
	}
	hook, err := capturedRequest(path, data)
	if err != nil {
		return caseInput{}, err
	}
	in := caseInput{data: bytes.TrimPrefix(data, []byte("\xef\xbb\xbf")), hook: hook}
	if hook == "" {
		if in.bundle, err = parseBundle(path, data); err != nil {
			return caseInput{}, err
		}
	}
	return in, nil
}

// run sends the input to each service at when: a Bundle as the request
// opt builds from it, a captured request as it was sent. It returns the
// outcomes by service, the Bundle's resources each request does not carry,
// and the warning for a Bundle whose data name another patient.
func (in caseInput) run(ctx context.Context, engine *hooks.Engine, svcs []hooks.Service, opt hooks.RequestOptions,
	when time.Time) (map[string]*hooks.Outcome, map[string]string, string, error) {
	outcomes := map[string]*hooks.Outcome{}
	unasked := map[string]string{}
	warning := ""
	for _, svc := range svcs {
		body := in.data
		if in.bundle != nil {
			req, err := hooks.BuildRequest(in.bundle, svc, opt)
			if err != nil {
				return nil, nil, "", err
			}
			if warning == "" {
				warning = unlinkedWarning(in.bundle, req)
			}
			unasked[svc.ID] = notAskedFor(in.bundle, req)
			if body, err = json.Marshal(req); err != nil {
				return nil, nil, "", fmt.Errorf("eval: %w", err)
			}
		}
		out, err := engine.Handle(ctx, svc.ID, body, when)
		if err != nil {
			return nil, nil, "", fmt.Errorf("eval %s: %w", svc.ID, err)
		}
		outcomes[svc.ID] = out
	}
	return outcomes, unasked, warning, nil
}

// capturedRequest tells a captured CDS Hooks request from a FHIR Bundle by
// its content: a JSON object with a "hook" member is a request (its hook is
// returned), one with "resourceType" a Bundle (""); a document that is not
// a JSON object, or an object with neither or both, is an error naming what
// was found. Malformed JSON is left to the Bundle reader, which says where.
func capturedRequest(path string, data []byte) (string, error) {
	data, err := fhirmap.ReadDocument(data)
	if err != nil {
		return "", fmt.Errorf("%s: %w: a FHIR R4 Bundle or a CDS Hooks request is a JSON object", path, err)
	}
	var head struct {
		ResourceType *string         `json:"resourceType"`
		Hook         json.RawMessage `json:"hook"`
	}
	if json.Unmarshal(data, &head) != nil {
		return "", nil
	}
	switch {
	case head.Hook != nil && head.ResourceType != nil:
		return "", fmt.Errorf("%s: has both \"hook\" and \"resourceType\": neither a CDS Hooks request nor a FHIR Bundle", path)
	case head.Hook != nil:
		var hook string
		if err := json.Unmarshal(head.Hook, &hook); err != nil || hook == "" {
			return "", fmt.Errorf("%s: a CDS Hooks request's \"hook\" must be a non-empty string", path)
		}
		return hook, nil
	case head.ResourceType == nil:
		return "", fmt.Errorf("%s: neither a FHIR Bundle (no \"resourceType\") nor a CDS Hooks request (no \"hook\")", path)
	}
	return "", nil
}

// exitStatus maps the highest indicator over all responses to eval's status.
func exitStatus(outcomes map[string]*hooks.Outcome) int {
	code := exitOK
	for _, o := range outcomes {
		for _, c := range o.Response.Cards {
			switch c.Indicator {
			case "critical":
				code = max(code, exitCritical)
			case "warning":
				code = max(code, exitWarning)
			}
		}
	}
	return code
}

// unlinkedWarning is the warning eval gives when b holds resources that
// name a patient but none names the patient in context of req, or "".
func unlinkedWarning(b *fhirmap.Bundle, req *hooks.Request) string {
	var ctx struct {
		PatientID string `json:"patientId"`
	}
	if json.Unmarshal(req.Context, &ctx) != nil {
		return ""
	}
	linked, other := hooks.PatientLinks(b, ctx.PatientID)
	if linked > 0 || other == 0 {
		return ""
	}
	return fmt.Sprintf("WARNING: none of the %d resources that name a patient is linked to the patient in context "+
		"(Patient/%s): no data from this bundle was used. References are read as Type/id, [base]/Type/id or a "+
		"urn:uuid:/urn:oid: fullUrl of an entry.", other, ctx.PatientID)
}

// notAskedFor counts by type the bundle's resources that req carries
// neither in its prefetch nor in its draft orders ("2 × Encounter, 1 ×
// Provenance"): no query of the service asks for them, so they are
// reported here rather than dropped without a word. The Patient is carried.
func notAskedFor(b *fhirmap.Bundle, req *hooks.Request) string {
	carried := map[string]bool{}
	add := func(raw []byte) {
		if pb, err := fhirmap.ParseBundle(raw); err == nil {
			for _, e := range pb.Entries {
				if r, err := fhirmap.ReadEntry(e); err == nil {
					carried[r.Ref()] = true
				}
			}
			return
		}
		if r, err := fhirmap.ReadResource(raw); err == nil {
			carried[r.Ref()] = true
		}
	}
	for _, v := range req.Prefetch {
		add(v)
	}
	var ctx struct {
		DraftOrders json.RawMessage `json:"draftOrders"`
	}
	if json.Unmarshal(req.Context, &ctx) == nil && len(ctx.DraftOrders) > 0 {
		add(ctx.DraftOrders)
	}
	counts := map[string]int{}
	for _, e := range b.Entries {
		if r, err := fhirmap.ReadEntry(e); err == nil && !carried[r.Ref()] {
			counts[r.Type]++
		}
	}
	types := make([]string, 0, len(counts))
	for t := range counts {
		types = append(types, t)
	}
	sort.Strings(types)
	parts := make([]string, len(types))
	for i, t := range types {
		parts[i] = fmt.Sprintf("%d × %s", counts[t], t)
	}
	return strings.Join(parts, ", ")
}

// writeReport prints, per service, the cards and what the data held,
// after warning when there is one.
func writeReport(w io.Writer, hook string, at time.Time, revision, warning string, svcs []hooks.Service,
	outcomes map[string]*hooks.Outcome, unasked map[string]string) error {
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	if warning != "" {
		fmt.Fprintf(tw, "%s\n\n", warning)
	}
	fmt.Fprintf(tw, "hook %s at %s, ruleset %s\n", hook, at.Format(time.RFC3339), revision)
	for _, svc := range svcs {
		o := outcomes[svc.ID]
		fmt.Fprintf(tw, "\n== %s\n", svc.ID)
		if len(o.Response.Cards) == 0 && len(o.Held) == 0 {
			fmt.Fprintln(tw, "no cards: nothing actionable")
		}
		for _, h := range o.Held {
			fmt.Fprintf(tw, "held back\t%s %s: %s (repeats the card of %s)\n", strings.ToUpper(h.Finding.Indicator.String()), h.Finding.Rule,
				h.Suppression.Reason, h.Suppression.Prior.At.UTC().Format(time.RFC3339))
		}
		for _, c := range o.Response.Cards {
			fmt.Fprintf(tw, "%s\t%s\n", strings.ToUpper(c.Indicator), c.Summary)
			for _, s := range c.Suggestions {
				mark := ""
				if s.IsRecommended {
					mark = " (recommended)"
				}
				fmt.Fprintf(tw, "  suggests\t%s%s\n", s.Label, mark)
			}
		}
		fmt.Fprintln(tw, "-- data")
		for _, k := range o.Keys {
			state := string(k.State)
			if k.Reason != "" {
				state += " (" + k.Reason + ")"
			}
			fmt.Fprintf(tw, "prefetch\t%s: %s, %d resources\n", k.Key.Key, state, len(k.Resources))
		}
		if u := unasked[svc.ID]; u != "" {
			fmt.Fprintf(tw, "not read\t%s: no prefetch query of this service asks for them\n", u)
		}
		writeFacts(tw, o.Facts)
	}
	return tw.Flush()
}

func writeFacts(w io.Writer, f rules.Facts) {
	p := f.Patient
	age, sex := "unknown", string(p.Sex)
	if y, ok := p.AgeYears(f.At); ok {
		age = fmt.Sprintf("%d y", y)
	}
	if sex == "" {
		sex = "not recorded"
	}
	fmt.Fprintf(w, "patient\tage %s, sex %s\n", age, sex)
	for _, a := range rules.Analytes() {
		s := f.Labs[a]
		if len(s) == 0 {
			continue
		}
		last := s[len(s)-1]
		fmt.Fprintf(w, "%s\t%d results, latest %g %s at %s\n", a, len(s), rules.Round(last.Value, 2),
			rules.CanonicalUnit(a), last.At.UTC().Format(time.RFC3339))
	}
	fmt.Fprintf(w, "medications\t%d active, %d draft\n", len(f.Medications), len(f.DraftOrders))
	fmt.Fprintf(w, "conditions\t%d active\n", len(f.Conditions))
	rejected := append([]rules.Rejection(nil), f.Rejected...)
	sort.SliceStable(rejected, func(i, j int) bool { return rejected[i].Source < rejected[j].Source })
	for _, r := range rejected {
		fmt.Fprintf(w, "rejected\t%s: %s\n", r.Source, r.Reason)
	}
	for _, g := range f.Gaps {
		fmt.Fprintf(w, "missing\t%s: %s\n", g.Source, g.Reason)
	}
	for _, n := range f.Notes {
		fmt.Fprintf(w, "note\t%s\n", n)
	}
}
