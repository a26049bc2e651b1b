package main

import (
	"bytes"
	"context"
	"encoding/json"
	"encoding/xml"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"os"
	"path/filepath"
	"slices"
	"sort"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/halite-cds/halite/hooks"
)

// expectations is a case's expectations file (DIR/expected/CASE.json for
// the case DIR/CASE.json): the evaluation time and, per hook, the cards
// that must and must not appear.
type expectations struct {
	At string `json:"at"`
	// Service, when given, is the one service the case is sent to (a
	// captured call is replayed to the service it was sent to).
	Service string                     `json:"service,omitempty"`
	Hooks   map[string]hookExpectation `json:"hooks"`
}

// hookExpectation is what one hook must answer: each listed card matched by
// a card of a service on the hook; no card of an absent rule; no card at
// all with none.
//
// Each card given matches at most one expectation, and a card no
// expectation matches fails the check unless Extra is "allow".
type hookExpectation struct {
	Cards  []cardExpectation `json:"cards,omitempty"`
	Absent []string          `json:"absent,omitempty"`
	None   bool              `json:"none,omitempty"`
	Extra  string            `json:"extra,omitempty"`
}

// cardExpectation matches a card by rule, and when given by service,
// indicator and figures (each within its tolerance).
type cardExpectation struct {
	Rule      string                       `json:"rule"`
	Service   string                       `json:"service,omitempty"`
	Indicator string                       `json:"indicator,omitempty"`
	Figures   map[string]figureExpectation `json:"figures,omitempty"`
}

type figureExpectation struct {
	Value     float64 `json:"value"`
	Tolerance float64 `json:"tolerance"`
}

// suiteCheck is the result of one hook of one case.
type suiteCheck struct {
	Case, Hook string
	Problems   []string
	Cards      []string // "indicator rule" of each card, in order
	Highest    string
	Took       time.Duration
}

// indicatorRank orders CDS Hooks indicators; 0 is no card.
var indicatorRank = map[string]int{"info": 1, "warning": 2, "critical": 3}

// suite evaluates cases against their expectations files: a summary
// table, JUnit XML for CI, and an exit status by --fail-on.
func suite(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("suite", "suite [--at RFC3339] [--junit FILE] [--fail-on mismatch|info|warning|critical] [--record] [--policy-override FILE] [--lab-codes FILE] PATH...", stderr)
	at := fs.String("at", "", "evaluation `time` (RFC 3339) for cases whose expectations give none")
	junit := fs.String("junit", "", "write JUnit XML to `file`, one test case per case and hook")
	failOn := fs.String("fail-on", "mismatch", "exit 1 on a `level`: mismatch (an expectation not met), or info, warning, critical (a card at that level or above, as well as any mismatch)")
	record := fs.Bool("record", false, "write each case's expectations file from the cards it gives now (rules, services and indicators), keeping its time")
	policy := fs.String("policy-override", "", "apply a site policy override `file`")
	labCodes := fs.String("lab-codes", "", "read results also by a site's local laboratory codes in `file`")
	paths, err := parseFlags(fs, args)
	if err != nil {
		return err
	}
	if len(paths) == 0 {
		return errors.New("suite: give one or more case files or directories")
	}
	if _, ok := indicatorRank[*failOn]; !ok && *failOn != "mismatch" {
		return fmt.Errorf("--fail-on: %q is not mismatch, info, warning or critical", *failOn)
	}
	var defaultAt time.Time
	if *at != "" {
		if defaultAt, err = time.Parse(time.RFC3339, *at); err != nil {
			return fmt.Errorf("--at: %q is not an RFC 3339 time such as 2026-11-20T08:00:00Z", *at)
		}
	}
	cases, err := suiteCases(paths)
	if err != nil {
		return err
	}
	rs, err := loadRuleset(*policy)
	if err != nil {
		return err
	}
	bf := bundleFlags{labCodes: *labCodes, user: "Practitioner/cli-user"}
	reg, err := bf.registry(rs)
	if err != nil {
		return err
	}
	log := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: slog.LevelError}))
	engine := hooks.NewEngine(hooks.EngineConfig{Registry: reg, Ruleset: rs, Limits: hooks.Limits{MaxPages: 1}, Log: log})
	var checks []suiteCheck
	for _, c := range cases {
		cs, err := runSuiteCase(ctx, engine, reg, c, defaultAt, *record)
		if err != nil {
			checks = append(checks, suiteCheck{Case: c, Hook: "-", Problems: []string{err.Error()}})
			continue
		}
		checks = append(checks, cs...)
	}
	writeSuiteTable(stdout, checks)
	if *junit != "" {
		if err := writeJUnit(*junit, checks); err != nil {
			return err
		}
	}
	for _, c := range checks {
		if len(c.Problems) > 0 || (*failOn != "mismatch" && indicatorRank[c.Highest] >= indicatorRank[*failOn]) {
			return &exitError{code: exitFailure}
		}
	}
	return nil
}

// suiteCases lists the case files: each file given, and every .json file
// of a directory given (its expected/ subdirectory holds the
// expectations), sorted.
func suiteCases(paths []string) ([]string, error) {
	var out []string
	for _, p := range paths {
		st, err := os.Stat(p)
		if err != nil {
			return nil, fmt.Errorf("suite: %w", err)
		}
		if !st.IsDir() {
			out = append(out, p)
			continue
		}
		files, err := filepath.Glob(filepath.Join(p, "*.json"))
		if err != nil {
			return nil, fmt.Errorf("suite: %w", err)
		}
		out = append(out, files...)
	}
	if len(out) == 0 {
		return nil, errors.New("suite: no case files (*.json) found")
	}
	sort.Strings(out)
	return out, nil
}

// expectationsPath is the expectations file of a case.
func expectationsPath(c string) string {
	return filepath.Join(filepath.Dir(c), "expected", filepath.Base(c))
}

// readExpectations reads a case's expectations, refusing unknown members
// so that a misspelt key is not a silently passing check.
func readExpectations(path string) (expectations, error) {
	var e expectations
	data, err := os.ReadFile(path)
	if err != nil {
		return e, fmt.Errorf("expectations: %w", err)
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&e); err != nil {
		return e, fmt.Errorf("expectations %s: %w", path, err)
	}
	if len(e.Hooks) == 0 {
		return e, fmt.Errorf("expectations %s: hooks is empty: it would check nothing", path)
	}
	for hook, h := range e.Hooks {
		switch {
		case h.None && len(h.Cards) > 0:
			return e, fmt.Errorf("expectations %s: hooks.%s has both none and cards", path, hook)
		case h.Extra != "" && h.Extra != "allow":
			return e, fmt.Errorf("expectations %s: hooks.%s.extra %q: the only value is allow", path, hook, h.Extra)
		case !h.None && len(h.Cards) == 0 && len(h.Absent) == 0:
			return e, fmt.Errorf("expectations %s: hooks.%s expects nothing (give cards, absent or none)", path, hook)
		}
		for i, c := range h.Cards {
			if c.Rule == "" {
				return e, fmt.Errorf("expectations %s: hooks.%s.cards[%d] needs a rule", path, hook, i)
			}
			if _, ok := indicatorRank[c.Indicator]; c.Indicator != "" && !ok {
				return e, fmt.Errorf("expectations %s: hooks.%s.cards[%d].indicator %q is not info, warning or critical", path, hook, i, c.Indicator)
			}
		}
	}
	return e, nil
}

// runSuiteCase evaluates one case on each hook its expectations name (with
// record, on each hook the case can be sent on) and checks the cards.
func runSuiteCase(ctx context.Context, engine *hooks.Engine, reg *hooks.Registry, c string, defaultAt time.Time, record bool) ([]suiteCheck, error) {
	in, err := readCase(c)
	if err != nil {
		return nil, err
	}
	exp, err := readExpectations(expectationsPath(c))
	previous := exp.Hooks
	switch {
	case err != nil && !(record && errors.Is(err, os.ErrNotExist)):
		return nil, err
	case record:
		exp.Hooks = map[string]hookExpectation{}
		for _, h := range []string{hooks.HookOrderSign, hooks.HookOrderSelect, hooks.HookPatientView} {
			if in.hook == "" || in.hook == h {
				exp.Hooks[h] = hookExpectation{}
			}
		}
	}
	when := defaultAt
	if exp.At != "" {
		if when, err = time.Parse(time.RFC3339, exp.At); err != nil {
			return nil, fmt.Errorf("expectations: at %q is not an RFC 3339 time", exp.At)
		}
	}
	if when.IsZero() {
		return nil, errors.New("no evaluation time: give \"at\" in the expectations or --at (a suite never evaluates at now)")
	}
	name := filepath.Base(c)
	var checks []suiteCheck
	hooksOf := make([]string, 0, len(exp.Hooks))
	for h := range exp.Hooks {
		hooksOf = append(hooksOf, h)
	}
	sort.Strings(hooksOf)
	for _, hook := range hooksOf {
		check := suiteCheck{Case: name, Hook: hook}
		start := time.Now()
		cards, err := suiteCards(ctx, engine, reg, in, hook, exp.Service, when)
		check.Took = time.Since(start)
		switch {
		case record && err != nil:
			delete(exp.Hooks, hook) // a hook the case cannot be sent on (no draft orders)
			continue
		case err != nil:
			check.Problems = append(check.Problems, err.Error())
		default:
			for _, cd := range cards {
				check.Cards = append(check.Cards, cd.Indicator+" "+cd.rule)
				if indicatorRank[cd.Indicator] > indicatorRank[check.Highest] {
					check.Highest = cd.Indicator
				}
			}
			if record {
				exp.Hooks[hook] = recorded(cards, previous[hook])
			} else {
				check.Problems = exp.Hooks[hook].check(cards)
			}
		}
		checks = append(checks, check)
	}
	if record {
		if exp.At == "" {
			exp.At = when.Format(time.RFC3339)
		}
		var buf bytes.Buffer
		if err := writeJSON(&buf, exp); err != nil {
			return nil, err
		}
		if err := os.MkdirAll(filepath.Dir(expectationsPath(c)), 0o755); err != nil {
			return nil, fmt.Errorf("record: %w", err)
		}
		if err := os.WriteFile(expectationsPath(c), buf.Bytes(), 0o644); err != nil {
			return nil, fmt.Errorf("record: %w", err)
		}
	}
	return checks, nil
}

// suiteCard is a card with the service and rule that gave it.
type suiteCard struct {
	hooks.Card
	service, rule string
	figures       map[string]float64
}

// suiteCards evaluates in on hook by every service of the hook.
func suiteCards(ctx context.Context, engine *hooks.Engine, reg *hooks.Registry, in caseInput, hook, service string, when time.Time) ([]suiteCard, error) {
	if in.hook != "" && in.hook != hook {
		return nil, fmt.Errorf("the captured request is for hook %q", in.hook)
	}
	svcs := reg.ForHook(hook)
	if service != "" {
		svc, ok := reg.Lookup(service)
		if !ok || !svc.Serves(hook) {
			return nil, fmt.Errorf("service %q does not serve %q", service, hook)
		}
		svcs = []hooks.Service{svc}
	}
	if len(svcs) == 0 {
		return nil, fmt.Errorf("no service serves %q", hook)
	}
	outcomes, _, _, err := in.run(ctx, engine, svcs, hooks.RequestOptions{Hook: hook, UserID: "Practitioner/cli-user"}, when)
	if err != nil {
		return nil, err
	}
	var out []suiteCard
	for _, svc := range svcs {
		for _, c := range outcomes[svc.ID].Response.Cards {
			rule, figures := haliteRule(c)
			out = append(out, suiteCard{Card: c, service: svc.ID, rule: rule, figures: figures})
		}
	}
	return out, nil
}

// haliteRule is the rule and figures halite's extension gives a card (none
// for a card without it, which matches by nothing but its indicator).
func haliteRule(c hooks.Card) (string, map[string]float64) {
	var ext struct {
		Halite struct {
			Rule    string             `json:"rule"`
			Figures map[string]float64 `json:"figures"`
		} `json:"halite"`
	}
	_ = json.Unmarshal(c.Extension, &ext)
	return ext.Halite.Rule, ext.Halite.Figures
}

// check lists every way cards fall short of h.
func (h hookExpectation) check(cards []suiteCard) []string {
	var problems []string
	if h.None && len(cards) > 0 {
		problems = append(problems, fmt.Sprintf("expected no card, got %d", len(cards)))
	}
	used := make([]bool, len(cards))
	for _, want := range h.Cards {
		var near []string
		found := false
		for i, c := range cards {
			if used[i] || c.rule != want.Rule || (want.Service != "" && c.service != want.Service) {
				continue
			}
			why := want.mismatch(c)
			if why == "" {
				found, used[i] = true, true
				break
			}
			near = append(near, why)
		}
		if !found {
			p := "expected a " + want.Rule + " card"
			if len(near) > 0 {
				p += ": " + strings.Join(near, "; ")
			} else {
				p += ": none given"
			}
			problems = append(problems, p)
		}
	}
	for i, c := range cards {
		switch {
		case slices.Contains(h.Absent, c.rule):
			problems = append(problems, "unexpected "+c.rule+" card: "+c.Summary)
		case !used[i] && !h.None && h.Extra != "allow":
			problems = append(problems, "a card no expectation lists ("+c.Indicator+" "+c.rule+"): "+c.Summary)
		}
	}
	return problems
}

// mismatch says how c differs from the expected card, or "".
func (want cardExpectation) mismatch(c suiteCard) string {
	var diffs []string
	if want.Indicator != "" && c.Indicator != want.Indicator {
		diffs = append(diffs, fmt.Sprintf("indicator %s, want %s", c.Indicator, want.Indicator))
	}
	names := make([]string, 0, len(want.Figures))
	for n := range want.Figures {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		f := want.Figures[n]
		got, ok := c.figures[n]
		switch {
		case !ok:
			diffs = append(diffs, "no figure "+n)
		case math.Abs(got-f.Value) > f.Tolerance:
			diffs = append(diffs, fmt.Sprintf("%s %g, want %g ± %g", n, got, f.Value, f.Tolerance))
		}
	}
	return strings.Join(diffs, ", ")
}

// recorded is the expectation the cards meet: each card's rule, service and
// indicator, or none. What was written by hand before is kept where it
// still applies: the absent rules, and the figures of a card of the same
// rule and service.
func recorded(cards []suiteCard, before hookExpectation) hookExpectation {
	if len(cards) == 0 {
		return hookExpectation{None: true, Absent: before.Absent}
	}
	h := hookExpectation{Absent: before.Absent}
	for _, c := range cards {
		e := cardExpectation{Rule: c.rule, Service: c.service, Indicator: c.Indicator}
		for _, old := range before.Cards {
			if old.Rule == c.rule && (old.Service == "" || old.Service == c.service) {
				e.Figures = old.Figures
			}
		}
		h.Cards = append(h.Cards, e)
	}
	return h
}

// writeSuiteTable prints a line per case and hook, the problems under it,
// and the totals.
func writeSuiteTable(w io.Writer, checks []suiteCheck) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "case\thook\tresult\tcards")
	failed, highest := 0, ""
	cases := map[string]bool{}
	for _, c := range checks {
		cases[c.Case] = true
		result := "pass"
		if len(c.Problems) > 0 {
			result, failed = "FAIL", failed+1
		}
		if indicatorRank[c.Highest] > indicatorRank[highest] {
			highest = c.Highest
		}
		cards := strings.Join(c.Cards, ", ")
		if cards == "" {
			cards = "none"
		}
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\n", c.Case, c.Hook, result, cards)
		for _, p := range c.Problems {
			fmt.Fprintf(tw, "\t\t\t- %s\n", p)
		}
	}
	tw.Flush()
	if highest == "" {
		highest = "none"
	}
	fmt.Fprintf(w, "%d cases, %d checks: %d passed, %d failed; highest indicator %s\n", len(cases), len(checks), len(checks)-failed, failed, highest)
}

// JUnit XML as CI systems read it (the common subset: testsuites,
// testsuite, testcase, failure).
type junitSuites struct {
	XMLName xml.Name     `xml:"testsuites"`
	Suites  []junitSuite `xml:"testsuite"`
}

type junitSuite struct {
	Name     string      `xml:"name,attr"`
	Tests    int         `xml:"tests,attr"`
	Failures int         `xml:"failures,attr"`
	Errors   int         `xml:"errors,attr"`
	Time     string      `xml:"time,attr"`
	Cases    []junitCase `xml:"testcase"`
}

type junitCase struct {
	ClassName string        `xml:"classname,attr"`
	Name      string        `xml:"name,attr"`
	Time      string        `xml:"time,attr"`
	Failure   *junitFailure `xml:"failure,omitempty"`
	Error     *junitFailure `xml:"error,omitempty"`
}

type junitFailure struct {
	Message string `xml:"message,attr"`
	Text    string `xml:",chardata"`
}

// writeJUnit writes the checks as one JUnit test suite to path.
func writeJUnit(path string, checks []suiteCheck) error {
	s := junitSuite{Name: "halite suite", Tests: len(checks)}
	var total time.Duration
	for _, c := range checks {
		total += c.Took
		jc := junitCase{ClassName: "halite." + strings.TrimSuffix(filepath.Base(c.Case), ".json"), Name: c.Hook, Time: seconds(c.Took)}
		switch {
		case len(c.Problems) > 0 && c.Hook == "-": // the case could not be run
			s.Errors++
			jc.Error = &junitFailure{Message: c.Problems[0], Text: strings.Join(c.Problems, "\n")}
		case len(c.Problems) > 0:
			s.Failures++
			jc.Failure = &junitFailure{Message: c.Problems[0], Text: strings.Join(c.Problems, "\n")}
		}
		s.Cases = append(s.Cases, jc)
	}
	s.Time = seconds(total)
	out, err := xml.MarshalIndent(junitSuites{Suites: []junitSuite{s}}, "", "  ")
	if err != nil {
		return fmt.Errorf("junit: %w", err)
	}
	if err := os.WriteFile(path, append([]byte(xml.Header), append(out, '\n')...), 0o644); err != nil {
		return fmt.Errorf("junit: %w", err)
	}
	return nil
}

func seconds(d time.Duration) string { return fmt.Sprintf("%.3f", d.Seconds()) }
