package main

import (
	"bytes"
	"context"
	"image"
	"image/color"
	"image/png"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/feedback"
)

// burdenFixture fills a card log for the week to 2026-11-20 (Berlin days):
// two sites, two ruleset revisions, cards on three days with empty days
// between, feedback with reasons, a card without suggestions, findings
// held back, and the calls behind them.
func burdenFixture(t *testing.T, db string) {
	t.Helper()
	st, err := feedback.OpenSQLite(db, feedback.Options{})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	berlin, _ := time.LoadLocation("Europe/Berlin")
	// 00:30 Berlin on 20 Nov is 23:30 UTC on 19 Nov: the report counts it on the 20th.
	day := func(d, h, m int) time.Time { return time.Date(2026, 11, d, h, m, 0, 0, berlin) }
	type logged struct {
		id, tenant, rule, indicator, ruleset, held string
		at                                         time.Time
		offered                                    bool
	}
	cards := []logged{
		{"a", "ward-a", "sodium-projected-over-limit", "warning", "r1", "", day(14, 9, 0), true},
		{"b", "ward-a", "sodium-projected-over-limit", "warning", "r1", "", day(14, 10, 0), true},
		{"c", "ward-b", "sodium-projected-over-limit", "critical", "r1", "", day(17, 11, 0), true},
		{"d", "ward-a", "hyponatremia-urine-studies-missing", "info", "r2", "", day(20, 0, 30), false},
		{"e", "ward-a", "sodium-projected-over-limit", "warning", "r2", "", day(20, 8, 0), true},
		{"f", "ward-a", "sodium-projected-over-limit", "warning", "r2", "select-to-sign", day(20, 8, 2), false},
		{"g", "ward-a", "sodium-projected-over-limit", "warning", "r2", "overridden", day(20, 9, 0), false},
	}
	for _, c := range cards {
		rec := feedback.CardRecord{UUID: c.id, Service: "sodium-infusion-check", Rule: c.rule, Indicator: c.indicator, Ruleset: c.ruleset,
			Tenant: c.tenant, PatientHash: "h", At: c.at, Suppressed: c.held}
		if c.offered {
			rec.Suggestions = []string{c.id + "-s"}
		}
		if err := st.LogCards(ctx, []feedback.CardRecord{rec}); err != nil {
			t.Fatal(err)
		}
	}
	// Feedback 2, 64 and 6 minutes after cards a, b and c.
	fb := func(card, tenant, outcome, reason string, after time.Duration) feedback.FeedbackRecord {
		var at time.Time
		for _, c := range cards {
			if c.id == card {
				at = c.at
			}
		}
		f := feedback.FeedbackRecord{Card: card, Service: "sodium-infusion-check", Outcome: outcome, Tenant: tenant, OutcomeAt: at.Add(after)}
		if reason != "" {
			f.ReasonSystem, f.ReasonCode = hooks.OverrideReasonSystem, reason
		}
		if outcome == feedback.Accepted {
			f.AcceptedSuggestions = []string{card + "-s"}
		}
		return f
	}
	for _, f := range []feedback.FeedbackRecord{fb("a", "ward-a", feedback.Accepted, "", 2*time.Minute),
		fb("b", "ward-a", feedback.Overridden, "local-protocol", 64*time.Minute), fb("c", "ward-b", feedback.Overridden, "local-protocol", 6*time.Minute)} {
		if err := st.RecordFeedback(ctx, []feedback.FeedbackRecord{f}); err != nil {
			t.Fatal(err)
		}
	}
	calls := []struct {
		tenant, ruleset  string
		at               time.Time
		n, cards, failed int
	}{
		{"ward-a", "r1", day(14, 9, 0), 40, 0, 0}, {"ward-a", "r1", day(14, 10, 0), 2, 1, 0},
		{"ward-b", "r1", day(17, 11, 0), 10, 1, 1}, {"ward-a", "r2", day(20, 8, 0), 36, 0, 0},
		{"ward-a", "r2", day(20, 8, 2), 2, 0, 0}, {"ward-a", "r2", day(20, 0, 30), 2, 1, 0},
	}
	for _, c := range calls {
		for i := range c.n {
			cards := 0
			if i == 0 {
				cards = c.cards
			}
			st.CountCall(feedback.CallRecord{At: c.at, Service: "sodium-infusion-check", Hook: "order-sign", Tenant: c.tenant, Ruleset: c.ruleset,
				Cards: cards, Failed: i > 0 && i <= c.failed})
		}
	}
	if err := st.Close(); err != nil {
		t.Fatal(err)
	}
}

// TestReport prints the burden report of a known card log and renders its
// page in headless Chromium, looking at what is drawn: the chart's size,
// its legend and dated axis, the bars' colours in the screenshot, and
// every day of the period in the table. HALITE_REPORT_SCREENSHOT names a
// file to keep the screenshot in.
func TestReport(t *testing.T) {
	t.Setenv("HALITE_CONFIG", "")
	db := filepath.Join(t.TempDir(), "halite.db")
	t.Setenv("HALITE_STORE_DSN", "sqlite:"+db)
	burdenFixture(t, db)
	page := filepath.Join(t.TempDir(), "report.html")
	var out bytes.Buffer
	if err := run(context.Background(), []string{"report", "--from", "2026-11-14", "--to", "2026-11-20", "--display-timezone", "Europe/Berlin",
		"--html", page}, &out, io.Discard); err != nil {
		t.Fatal(err)
	}
	text := strings.Join(strings.Fields(out.String()), " ")
	for _, want := range []string{
		// 92 calls (one failed), 5 cards shown (a, b, c, d, e): 5.4 per 100; 2 held back: 2.2 per 100.
		"calls 92 (failed 1), with cards 3, cards 5 (5.4 per 100 calls), held back as repeats 2 (2.2 per 100 calls)",
		// ward-a: 82 calls, 4 cards (4.9 per 100); ward-b: 10 calls, 1 critical card (10.0), one call failed.
		"ward-a 82 4 4.9 0 3 1 2 0", "ward-b 10 1 10.0 1 0 0 0 1",
		// The info rule offers nothing to accept: n/a, not 0%.
		"sodium-infusion-check hyponatremia-urine-studies-missing 1 1.1 0 n/a 0 - -",
		// a accepted, b and c overridden: 1 of 3 = 33%; feedback after 2, 6 and 64 min: median 6.0 min.
		"sodium-infusion-check sodium-projected-over-limit 4 4.3 2 33% 2 6.0 min Following a local protocol (2)",
		// Before/after: r1 52 calls 3 cards; r2 40 calls 2 cards, 2 held back.
		"r1 2026-11-14 2026-11-17 52 3 5.8 0.0 33%", "r2 2026-11-20 2026-11-20 40 2 5.0 5.0 no feedback",
		"Following a local protocol 2 100%",
		"shown at selection, unchanged at signing 1 50%", "overridden with a reason, no worse since 1 50%",
		// Every day kept, empty ones too; d (00:30 Berlin) is on the 20th.
		"2026-11-15 0 0 0 0 0 0", "2026-11-16 0 0 0 0 0 0", "2026-11-20 40 2 0 0 2 2",
	} {
		if !strings.Contains(text, want) {
			t.Errorf("report text lacks %q:\n%s", want, out.String())
		}
	}
	if _, err := exec.LookPath("chromium"); err != nil {
		if os.Getenv("CI") == "true" {
			t.Fatal("CI must render the report in Chromium: chromium is not installed")
		}
		t.Skip("chromium not installed")
	}
	opts := append(chromedp.DefaultExecAllocatorOptions[:], chromedp.ExecPath("chromium"), chromedp.NoSandbox,
		chromedp.WindowSize(1280, 900), chromedp.UserDataDir(t.TempDir()))
	actx, cancel := chromedp.NewExecAllocator(context.Background(), opts...)
	defer cancel()
	ctx, cancel := chromedp.NewContext(actx)
	defer cancel()
	ctx, cancel = context.WithTimeout(ctx, 60*time.Second)
	defer cancel()
	if err := chromedp.Do(ctx, chromedp.Navigate("file://"+page), chromedp.WaitVisible(chromedp.CSS("#outcomes-chart svg"))); err != nil {
		t.Fatalf("chromium: %v", err)
	}
	eval := func(js string, into any) {
		t.Helper()
		var err error
		switch v := into.(type) {
		case *map[string]float64:
			*v, err = chromedp.Run(ctx, chromedp.Evaluate[map[string]float64](js))
		case *string:
			*v, err = chromedp.Run(ctx, chromedp.Evaluate[string](js))
		case *int:
			*v, err = chromedp.Run(ctx, chromedp.Evaluate[int](js))
		}
		if err != nil {
			t.Fatalf("chromium: %s: %v", js, err)
		}
	}
	var chartBox map[string]float64
	var chartText, firstRule string
	var dayRows int
	eval(`(() => { const r = document.querySelector('#outcomes-chart svg').getBoundingClientRect(); return {w: r.width, h: r.height}; })()`, &chartBox)
	eval(`document.querySelector('#outcomes-chart svg').textContent`, &chartText)
	eval(`document.querySelectorAll('#days tr').length - 1`, &dayRows)
	eval(`document.querySelector('#rules tr:nth-child(2) td:nth-child(2)').textContent`, &firstRule)
	chart, err := chromedp.Run(ctx, chromedp.Screenshot(chromedp.CSS("#outcomes-chart")))
	if err != nil {
		t.Fatalf("chromium: %v", err)
	}
	full, err := chromedp.Run(ctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatalf("chromium: %v", err)
	}
	if chartBox["w"] < 600 || chartBox["h"] < 250 {
		t.Errorf("the chart is drawn %v×%v px, want at least 600×250", chartBox["w"], chartBox["h"])
	}
	for _, want := range []string{"Cards per day by outcome", "accepted", "overridden", "no feedback", "held back as repeats",
		"day (Europe/Berlin)", "14 Nov", "cards"} {
		if !strings.Contains(chartText, want) {
			t.Errorf("the drawn chart lacks %q (legend, title, axes): %q", want, chartText)
		}
	}
	if dayRows != 7 {
		t.Errorf("%d day rows, want the 7 days of the period, empty ones kept", dayRows)
	}
	if firstRule != "sodium-projected-over-limit" {
		t.Errorf("rules not sorted by volume: first is %q", firstRule)
	}
	img, err := png.Decode(bytes.NewReader(chart))
	if err != nil {
		t.Fatal(err)
	}
	// Accepted (a), overridden (b, c), no feedback (d, e) and held back
	// (f, g) each cover some pixels of the drawn chart in their colour.
	for name, c := range map[string]color.RGBA{"accepted": colourBlue, "overridden": colourVermillion, "no feedback": colourGrey, "held back": colourSky} {
		if n := pixelsNear(img, c); n < 50 {
			t.Errorf("%s: %d pixels of its colour in the screenshot, want a visible bar", name, n)
		}
	}
	if path := os.Getenv("HALITE_REPORT_SCREENSHOT"); path != "" {
		if err := os.WriteFile(path, full, 0o644); err != nil {
			t.Fatal(err)
		}
	}
}

// pixelsNear counts the pixels of img within a small distance of c.
func pixelsNear(img image.Image, c color.RGBA) int {
	n := 0
	b := img.Bounds()
	for y := b.Min.Y; y < b.Max.Y; y++ {
		for x := b.Min.X; x < b.Max.X; x++ {
			r, g, bl, _ := img.At(x, y).RGBA()
			if near(r>>8, c.R) && near(g>>8, c.G) && near(bl>>8, c.B) {
				n++
			}
		}
	}
	return n
}

func near(a uint32, b uint8) bool { return a+6 >= uint32(b) && a <= uint32(b)+6 }

// TestBurdenDaysInAHalfHourZone: days are counted in the display zone by
// quarter hour, so in India (UTC+05:30) a card at 18:30 UTC is on the next
// day and one at 18:15 UTC on the same day, calls alike.
func TestBurdenDaysInAHalfHourZone(t *testing.T) {
	kolkata, err := time.LoadLocation("Asia/Kolkata")
	if err != nil {
		t.Fatal(err)
	}
	q := func(h, m int) time.Time { return time.Date(2026, 11, 19, h, m, 0, 0, time.UTC) }
	rep := feedback.Report{
		Cards: []feedback.CardGroup{{Period: q(18, 15), Service: "s", Rule: "r", Indicator: "info", Count: 1},
			{Period: q(18, 30), Service: "s", Rule: "r", Indicator: "info", Count: 2}},
		Calls: []feedback.CallGroup{{Period: q(18, 15), Service: "s", Calls: 10}, {Period: q(18, 30), Service: "s", Calls: 20}},
	}
	from := time.Date(2026, 11, 19, 0, 0, 0, 0, kolkata)
	b := readBurden(rep, from, from.AddDate(0, 0, 1), kolkata)
	if len(b.Days) != 2 || b.Days[0].Shown() != 1 || b.Days[0].Calls != 10 || b.Days[1].Shown() != 2 || b.Days[1].Calls != 20 {
		t.Errorf("days %+v, want 19 Nov 1 card of 10 calls, 20 Nov 2 cards of 20 calls", b.Days)
	}
}
