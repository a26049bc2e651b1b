package deploy

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"sort"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"
)

// scrapeSeries reads the recorded scrape (recorded by
// TestRecordedScrape in cmd/halite) into series name → the label names
// seen on it.
func scrapeSeries(t *testing.T) map[string]map[string]bool {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join("prometheus", "testdata", "scrape.prom"))
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]map[string]bool{}
	for _, line := range strings.Split(string(raw), "\n") {
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		name, rest, _ := strings.Cut(line, "{")
		name, _, _ = strings.Cut(name, " ")
		if out[name] == nil {
			out[name] = map[string]bool{}
		}
		labels, _, _ := strings.Cut(rest, "} ")
		for _, kv := range strings.Split(labels, `",`) {
			if k, _, ok := strings.Cut(kv, "="); ok {
				out[name][k] = true
			}
		}
	}
	return out
}

var (
	metricName = regexp.MustCompile(`\b((?:halite|http_server|go|process)_[a-z_]+)\b(\{[^}]*\})?`)
	matcher    = regexp.MustCompile(`([a-z_]+)\s*(?:=~|!~|!=|=)\s*"`)
	grouping   = regexp.MustCompile(`\b(?:by|ignoring|on)\s*\(([^)]*)\)`)
)

// checkExpr reports every series an expression uses that the scrape does
// not have, and every label it matches or groups by that those series do
// not carry.
func checkExpr(t *testing.T, where, expr string, scrape map[string]map[string]bool) {
	t.Helper()
	found := metricName.FindAllStringSubmatch(expr, -1)
	if len(found) == 0 {
		t.Errorf("%s: no halite series in %q", where, expr)
	}
	labelsOf := map[string]bool{}
	for _, m := range found {
		labels, ok := scrape[m[1]]
		if !ok {
			t.Errorf("%s: series %s is not in the recorded scrape", where, m[1])
			continue
		}
		for l := range labels {
			labelsOf[l] = true
		}
		for _, lm := range matcher.FindAllStringSubmatch(m[2], -1) {
			if !labels[lm[1]] {
				t.Errorf("%s: %s has no label %q in the recorded scrape", where, m[1], lm[1])
			}
		}
	}
	for _, g := range grouping.FindAllStringSubmatch(expr, -1) {
		for _, l := range strings.Split(g[1], ",") {
			if l = strings.TrimSpace(l); l != "" && !labelsOf[l] {
				t.Errorf("%s: grouping label %q is on none of its series", where, l)
			}
		}
	}
}

// TestAlertRulesUseScrapedSeries: every series and label the alert rules
// and their promtool tests use is in the scrape a running halite gave;
// promtool (in .ci/run) checks the rules' syntax and behaviour.
func TestAlertRulesUseScrapedSeries(t *testing.T) {
	scrape := scrapeSeries(t)
	var rules struct {
		Groups []struct {
			Rules []struct {
				Alert  string            `yaml:"alert"`
				Expr   string            `yaml:"expr"`
				Labels map[string]string `yaml:"labels"`
			} `yaml:"rules"`
		} `yaml:"groups"`
	}
	raw, err := os.ReadFile(filepath.Join("prometheus", "alerts.yml"))
	if err != nil {
		t.Fatal(err)
	}
	if err := yaml.Unmarshal(raw, &rules); err != nil {
		t.Fatal(err)
	}
	var alerts []string
	for _, g := range rules.Groups {
		for _, r := range g.Rules {
			alerts = append(alerts, r.Alert)
			checkExpr(t, r.Alert, r.Expr, scrape)
			if s := r.Labels["severity"]; s != "page" && s != "ticket" {
				t.Errorf("%s: severity %q, want page or ticket", r.Alert, s)
			}
		}
	}
	sort.Strings(alerts)
	want := []string{"HaliteAuthFailures", "HaliteCallsFailing", "HaliteCallsSlow", "HaliteCardLogFailing", "HaliteFHIRServerFailing", "HaliteFHIRServerSlow"}
	if strings.Join(alerts, ",") != strings.Join(want, ",") {
		t.Errorf("alerts %v, want %v", alerts, want)
	}
	var tests struct {
		Tests []struct {
			InputSeries []struct {
				Series string `yaml:"series"`
			} `yaml:"input_series"`
			AlertRuleTest []struct {
				Alertname string `yaml:"alertname"`
				ExpAlerts []any  `yaml:"exp_alerts"`
			} `yaml:"alert_rule_test"`
		} `yaml:"tests"`
	}
	raw, err = os.ReadFile(filepath.Join("prometheus", "alerts_test.yml"))
	if err != nil {
		t.Fatal(err)
	}
	if err := yaml.Unmarshal(raw, &tests); err != nil {
		t.Fatal(err)
	}
	fires, quiet := map[string]bool{}, map[string]bool{}
	for i, tc := range tests.Tests {
		for _, s := range tc.InputSeries {
			checkExpr(t, fmt.Sprintf("alerts_test.yml test %d", i+1), s.Series, scrape)
		}
		for _, a := range tc.AlertRuleTest {
			if len(a.ExpAlerts) > 0 {
				fires[a.Alertname] = true
			} else {
				quiet[a.Alertname] = true
			}
		}
	}
	for _, a := range want {
		if !fires[a] {
			t.Errorf("%s has no promtool case where it fires", a)
		}
		if !quiet[a] {
			t.Errorf("%s has no promtool case where it stays quiet", a)
		}
	}
}

// TestDashboardUsesScrapedSeries: every query of the dashboard reads
// series and labels the recorded scrape has.
func TestDashboardUsesScrapedSeries(t *testing.T) {
	scrape := scrapeSeries(t)
	raw, err := os.ReadFile(filepath.Join("grafana", "halite-dashboard.json"))
	if err != nil {
		t.Fatal(err)
	}
	var dash struct {
		Title  string `json:"title"`
		Panels []struct {
			Title   string `json:"title"`
			Targets []struct {
				Expr string `json:"expr"`
			} `json:"targets"`
		} `json:"panels"`
	}
	if err := json.Unmarshal(raw, &dash); err != nil {
		t.Fatal(err)
	}
	n := 0
	for _, p := range dash.Panels {
		for _, tg := range p.Targets {
			n++
			checkExpr(t, p.Title, tg.Expr, scrape)
		}
	}
	if n < 10 {
		t.Errorf("only %d queries in the dashboard", n)
	}
}
