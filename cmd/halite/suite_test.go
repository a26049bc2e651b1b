package main

import (
	"bytes"
	"context"
	"encoding/xml"
	"errors"
	"io"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestSuiteScenarios runs the repository's scenarios as a suite against
// their expectations (testdata/scenarios/expected, figures hand-computed in
// the scenarios' README) and reads the JUnit XML back.
func TestSuiteScenarios(t *testing.T) {
	junit := filepath.Join(t.TempDir(), "suite.xml")
	var out bytes.Buffer
	if err := run(context.Background(), []string{"suite", "--junit", junit, filepath.Join("..", "..", "testdata", "scenarios")}, &out, io.Discard); err != nil {
		t.Fatalf("suite: %v\n%s", err, out.String())
	}
	cases, _ := filepath.Glob(filepath.Join("..", "..", "testdata", "scenarios", "*.json"))
	var x junitSuites
	data, err := os.ReadFile(junit)
	if err != nil || xml.Unmarshal(data, &x) != nil || len(x.Suites) != 1 {
		t.Fatalf("junit: %v %s", err, data)
	}
	if s := x.Suites[0]; s.Failures != 0 || s.Tests < len(cases) || len(s.Cases) != s.Tests {
		t.Errorf("junit suite %d tests, %d failures, for %d cases", s.Tests, s.Failures, len(cases))
	}
	if !strings.Contains(out.String(), "47-water-deprivation-central.json") || !strings.Contains(out.String(), " 0 failed") {
		t.Errorf("summary:\n%s", out.String())
	}
}

// TestSuiteMismatches: every way a case can fall short is reported on its
// line, in the JUnit failure and in the exit status, and --fail-on sets the
// status by the highest card.
func TestSuiteMismatches(t *testing.T) {
	dir := t.TempDir()
	src, err := os.ReadFile(filepath.Join("..", "..", "testdata", "scenarios", "47-water-deprivation-central.json"))
	if err != nil {
		t.Fatal(err)
	}
	write := func(name, content string) {
		if err := os.MkdirAll(filepath.Dir(filepath.Join(dir, name)), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(dir, name), []byte(content), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	write("wdt.json", string(src))
	write("expected/wdt.json", `{"at": "2026-11-20T08:00:00Z", "hooks": {
		"patient-view": {"cards": [
			{"rule": "water-deprivation-test", "indicator": "warning"},
			{"rule": "water-deprivation-test", "figures": {"risePercent": {"value": 100, "tolerance": 1}, "nothing": {"value": 1, "tolerance": 0}}},
			{"rule": "siadh-lab-pattern"}],
			"absent": ["water-deprivation-test"]},
		"order-sign": {"cards": [{"rule": "sodium-limit-exceeded"}]}}}`)
	junit := filepath.Join(dir, "out.xml")
	var out bytes.Buffer
	err = run(context.Background(), []string{"suite", "--junit", junit, dir}, &out, io.Discard)
	var ex *exitError
	if !errors.As(err, &ex) || ex.code != exitFailure {
		t.Fatalf("suite with mismatches: %v", err)
	}
	for _, want := range []string{
		"expected a water-deprivation-test card: indicator info, want warning",
		"no figure nothing, risePercent 128.6, want 100 ± 1",
		"expected a siadh-lab-pattern card: none given",
		"unexpected water-deprivation-test card: Water deprivation test",
		"expected a sodium-limit-exceeded card: none given",
		"1 cases, 2 checks: 0 passed, 2 failed",
	} {
		if !strings.Contains(out.String(), want) {
			t.Errorf("output lacks %q:\n%s", want, out.String())
		}
	}
	if data, _ := os.ReadFile(junit); !bytes.Contains(data, []byte(`failures="2"`)) || !bytes.Contains(data, []byte("<failure message=")) {
		t.Errorf("junit:\n%s", data)
	}

	// Met expectations pass; --fail-on info fails on the info card.
	write("expected/wdt.json", `{"at": "2026-11-20T08:00:00Z", "hooks": {"patient-view": {"cards": [{"rule": "water-deprivation-test",
		"indicator": "info", "figures": {"risePercent": {"value": 128.6, "tolerance": 0.05}}}], "absent": ["concentrating-defect-pattern"]},
		"order-sign": {"none": true}}}`)
	if err := run(context.Background(), []string{"suite", dir}, io.Discard, io.Discard); err != nil {
		t.Errorf("met expectations: %v", err)
	}
	if err := run(context.Background(), []string{"suite", "--fail-on", "warning", dir}, io.Discard, io.Discard); err != nil {
		t.Errorf("--fail-on warning with an info card: %v", err)
	}
	if err := run(context.Background(), []string{"suite", "--fail-on", "info", dir}, io.Discard, io.Discard); !errors.As(err, &ex) {
		t.Errorf("--fail-on info with an info card: %v", err)
	}

	// One card meets one expectation only; a card nobody lists fails unless
	// extra is allow.
	for _, tc := range []struct {
		expect string
		pass   bool
	}{
		{`{"at": "2026-11-20T08:00:00Z", "hooks": {"patient-view": {"cards": [{"rule": "water-deprivation-test"}, {"rule": "water-deprivation-test"}]}}}`, false},
		{`{"at": "2026-11-20T08:00:00Z", "hooks": {"patient-view": {"absent": ["siadh-lab-pattern"]}}}`, false},
		{`{"at": "2026-11-20T08:00:00Z", "hooks": {"patient-view": {"absent": ["siadh-lab-pattern"], "extra": "allow"}}}`, true},
		{`{"at": "2026-11-20T08:00:00Z", "service": "sodium-chart-review", "hooks": {"patient-view": {"cards": [{"rule": "water-deprivation-test"}]}}}`, true},
	} {
		write("expected/wdt.json", tc.expect)
		out.Reset()
		err := run(context.Background(), []string{"suite", dir}, &out, io.Discard)
		if (err == nil) != tc.pass {
			t.Errorf("%s: %v\n%s", tc.expect, err, out.String())
		}
	}

	for _, tc := range []struct{ name, expect, want string }{
		{"expects nothing", `{"at": "2026-11-20T08:00:00Z", "hooks": {"patient-view": {}}}`, "expects nothing"},
		{"no hooks", `{"at": "2026-11-20T08:00:00Z", "hooks": {}}`, "hooks is empty"},
		{"unknown member", `{"at": "2026-11-20T08:00:00Z", "hooks": {"patient-view": {"card": []}}}`, `unknown field "card"`},
		{"no time", `{"hooks": {"patient-view": {"none": true}}}`, "no evaluation time"},
		{"bad indicator", `{"at": "2026-11-20T08:00:00Z", "hooks": {"patient-view": {"cards": [{"rule": "x", "indicator": "high"}]}}}`, `indicator "high"`},
		{"none and cards", `{"at": "2026-11-20T08:00:00Z", "hooks": {"patient-view": {"none": true, "cards": [{"rule": "x"}]}}}`, "both none and cards"},
	} {
		write("expected/wdt.json", tc.expect)
		out.Reset()
		err := run(context.Background(), []string{"suite", dir}, &out, io.Discard)
		if !errors.As(err, &ex) || !strings.Contains(out.String(), tc.want) {
			t.Errorf("%s: %v\n%s", tc.name, err, out.String())
		}
	}
	if err := run(context.Background(), []string{"suite", "--fail-on", "sometimes", dir}, io.Discard, io.Discard); err == nil || !strings.Contains(err.Error(), "--fail-on") {
		t.Errorf("--fail-on sometimes: %v", err)
	}
	os.Remove(filepath.Join(dir, "expected", "wdt.json"))
	out.Reset()
	if err := run(context.Background(), []string{"suite", dir}, &out, io.Discard); !errors.As(err, &ex) || !strings.Contains(out.String(), "no such file") {
		t.Errorf("a case without expectations: %v\n%s", err, out.String())
	}
}
