package main

import (
	"bytes"
	"context"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks/feedback"
)

// TestReport fills a store with cards and outcomes, prints the report and
// renders its HTML page in headless Chromium (Debian's chromium), checking
// the chart is in the rendered document.
func TestReport(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	db := filepath.Join(t.TempDir(), "halite.db")
	t.Setenv("HALITE_STORE_DSN", "sqlite:"+db)
	st, err := feedback.OpenSQLite(db, feedback.Options{})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	day := time.Now().UTC().Truncate(24 * time.Hour)
	for i, rule := range []string{"sodium-projected-over-limit", "sodium-projected-over-limit", "sodium-projected-over-limit", "drug-hyponatremia-risk"} {
		id := "card-" + string(rune('a'+i))
		if err := st.LogCards(ctx, []feedback.CardRecord{{UUID: id, Service: "sodium-infusion-check", Rule: rule, Indicator: "warning",
			Ruleset: "r", PatientHash: "h", At: day.Add(-time.Duration(i) * 24 * time.Hour), Suggestions: []string{id + "-s"}}}); err != nil {
			t.Fatal(err)
		}
	}
	must := func(err error) {
		if err != nil {
			t.Fatal(err)
		}
	}
	must(st.RecordFeedback(ctx, []feedback.FeedbackRecord{{Card: "card-a", Service: "sodium-infusion-check", Outcome: feedback.Accepted, AcceptedSuggestions: []string{"card-a-s"}, OutcomeAt: day}}))
	must(st.RecordFeedback(ctx, []feedback.FeedbackRecord{{Card: "card-b", Service: "sodium-infusion-check", Outcome: feedback.Overridden, ReasonSystem: "s", ReasonCode: "local-protocol", OutcomeAt: day}}))
	must(st.RecordFeedback(ctx, []feedback.FeedbackRecord{{Card: "card-c", Service: "sodium-infusion-check", Outcome: feedback.Overridden, ReasonSystem: "s", ReasonCode: "local-protocol", OutcomeAt: day}}))
	must(st.Close())

	page := filepath.Join(t.TempDir(), "report.html")
	var out bytes.Buffer
	if err := run(ctx, []string{"report", "--html", page}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	text := out.String()
	// 3 shown, 1 accepted, 2 overridden: acceptance 1/3 = 33%; top reason local-protocol (2).
	if !strings.Contains(text, "sodium-projected-over-limit") || !strings.Contains(text, "33%") || !strings.Contains(text, "local-protocol (2)") ||
		!strings.Contains(text, "no feedback") {
		t.Errorf("report text:\n%s", text)
	}
	chromium, err := exec.LookPath("chromium")
	if err != nil {
		if os.Getenv("CI") == "true" {
			t.Fatal("CI must render the report in Chromium: chromium is not installed")
		}
		t.Skip("chromium not installed")
	}
	cmd := exec.Command(chromium, "--headless", "--no-sandbox", "--disable-gpu", "--user-data-dir="+t.TempDir(), "--dump-dom", "file://"+page)
	dom, err := cmd.Output()
	if err != nil {
		t.Fatalf("chromium: %v", err)
	}
	d := string(dom)
	if !strings.Contains(d, `<svg id="outcomes-chart"`) || strings.Count(d, `<g class="day"`) != 4 || strings.Count(d, `class="acc"`) != 4 {
		t.Errorf("rendered page lacks the chart (4 days of bars):\n%s", d)
	}
	if !strings.Contains(d, "<td>sodium-projected-over-limit</td>") {
		t.Errorf("rendered page lacks the table")
	}
}
