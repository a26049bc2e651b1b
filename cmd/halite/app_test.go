package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"io"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

// appScenario is the golden scenario the browser test launches the app on:
// 3% saline at 40 mL/h in chronic hyponatremia, projected over the 24-h
// limit (testdata/scenarios/README.md, row 14).
const (
	appScenario   = "14-hypona-3pct-overshoot.json"
	appScenarioAt = "2026-11-20T08:00:00Z"
)

// startServeBundleSMART runs serve-bundle --smart on scenario and returns
// its base URL (http://HOST:PORT).
func startServeBundleSMART(t *testing.T, scenario string) string {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	pr, pw := io.Pipe()
	done := make(chan error, 1)
	go func() {
		done <- run(ctx, []string{"serve-bundle", "--addr", "127.0.0.1:0", "--smart", scenario}, pw, io.Discard)
		pw.Close()
	}()
	t.Cleanup(func() { cancel(); <-done })
	line, err := bufio.NewReader(pr).ReadString('\n')
	if err != nil {
		cancel()
		t.Fatalf("serve-bundle --smart did not start: %v", err)
	}
	go func() { _, _ = io.Copy(io.Discard, pr) }()
	fhir := strings.TrimSpace(line[strings.Index(line, "http://"):])
	return strings.TrimSuffix(fhir, "/fhir")
}

// responseCard is a card of a CDS Hooks response, as the tests read it.
type responseCard struct {
	Links     []map[string]string `json:"links"`
	Extension struct {
		Halite struct {
			Figures map[string]float64 `json:"figures"`
		} `json:"halite"`
	} `json:"extension"`
}

// projectionCard is the card of a CDS Hooks response that carries a
// projection's figures, with its SMART link (nil when it has none).
func projectionCard(t *testing.T, body []byte) (link map[string]string, figures map[string]float64) {
	t.Helper()
	var resp struct {
		Cards []responseCard `json:"cards"`
	}
	if err := json.Unmarshal(body, &resp); err != nil {
		t.Fatalf("%v: %.300s", err, body)
	}
	for _, c := range resp.Cards {
		if f := c.Extension.Halite.Figures; f["limit24h"] > 0 {
			for _, l := range c.Links {
				if l["type"] == "smart" {
					link = l
				}
			}
			return link, f
		}
	}
	t.Fatalf("no card with a projection's figures in %.500s", body)
	return nil, nil
}

// evalAtRate runs `halite eval --json` on the scenario with its draft's rate
// set to rate (mL/h) and returns the figures of its card.
func evalAtRate(t *testing.T, rate float64) map[string]float64 {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join("..", "..", "testdata", "scenarios", appScenario))
	if err != nil {
		t.Fatal(err)
	}
	var b map[string]any
	if err := json.Unmarshal(raw, &b); err != nil {
		t.Fatal(err)
	}
	for _, e := range b["entry"].([]any) {
		r := e.(map[string]any)["resource"].(map[string]any)
		if r["resourceType"] == "MedicationRequest" && r["status"] == "draft" {
			d := r["dosageInstruction"].([]any)[0].(map[string]any)
			delete(d, "text")
			d["doseAndRate"].([]any)[0].(map[string]any)["rateQuantity"].(map[string]any)["value"] = rate
		}
	}
	file := filepath.Join(t.TempDir(), "at-rate.json")
	out, _ := json.Marshal(b)
	if err := os.WriteFile(file, out, 0o600); err != nil {
		t.Fatal(err)
	}
	var got bytes.Buffer
	// eval exits non-zero on a warning card; its JSON is written all the same.
	_ = run(context.Background(), []string{"eval", "--json", "--at", appScenarioAt, "--hook", "order-sign", "--service", "sodium-infusion-check", file}, &got, io.Discard)
	_, f := projectionCard(t, got.Bytes())
	return f
}

// TestSodiumCourseApp launches the app the way an EHR would from a card's
// SMART link, through the full SMART App Launch flow (EHR launch,
// discovery, authorization code with PKCE) against serve-bundle's
// development authorization server, in headless Chromium: the chart shows
// the scenario's sodium values and limits with the figures the card gave,
// and moving the rate changes the projection to what `halite eval` gives
// for that rate. It saves a screenshot (testdata/app/ with -update).
func TestSodiumCourseApp(t *testing.T) {
	if _, err := exec.LookPath("chromium"); err != nil {
		if os.Getenv("CI") == "true" {
			t.Fatal("CI must run the app in Chromium: chromium is not installed")
		}
		t.Skip("chromium not installed")
	}
	t.Setenv("HALITE_CONFIG", "")
	scenario := filepath.Join("..", "..", "testdata", "scenarios", appScenario)
	smart := startServeBundleSMART(t, scenario)
	base, _, stop := startServe(t, "--at", appScenarioAt)
	defer stop()

	// The card, as the EHR gets it.
	status, body := postJSON(t, base+"/cds-services/sodium-infusion-check", "", infusionRequest(t, appScenario))
	if status != 200 {
		t.Fatalf("call: %d %s", status, body)
	}
	link, cardFigs := projectionCard(t, []byte(body))
	if link == nil || !strings.HasSuffix(link["url"], "/app/launch.html") || link["appContext"] == "" {
		t.Fatalf("no SMART link on the card: %s", body)
	}
	for _, phi := range []string{"pt-nyssa", "Nyssa", "mr-nyssa", "2026-11-20T07:30"} {
		if strings.Contains(link["appContext"], phi) {
			t.Errorf("appContext carries %q: %s", phi, link["appContext"])
		}
	}

	opts := append(chromedp.DefaultExecAllocatorOptions[:], chromedp.ExecPath("chromium"), chromedp.NoSandbox,
		chromedp.WindowSize(1200, 1000), chromedp.UserDataDir(t.TempDir()))
	actx, cancel := chromedp.NewExecAllocator(context.Background(), opts...)
	defer cancel()
	ctx, cancel := chromedp.NewContext(actx)
	defer cancel()
	ctx, cancel = context.WithTimeout(ctx, 90*time.Second)
	defer cancel()
	// The browser starts with the first action; the console is read after.
	if err := chromedp.Do(ctx, chromedp.Navigate("about:blank")); err != nil {
		t.Fatal(err)
	}
	var mu sync.Mutex
	var console []string
	go func() {
		for m, err := range chromedp.Console(ctx) {
			if err != nil {
				return
			}
			mu.Lock()
			console = append(console, string(m.Type)+": "+m.Text)
			mu.Unlock()
		}
	}()
	eval := func(js string) string {
		t.Helper()
		v, err := chromedp.Run(ctx, chromedp.Evaluate[string](js))
		if err != nil {
			t.Fatalf("chromium: %s: %v", js, err)
		}
		return v
	}
	// waitFor polls a JavaScript condition until it is true.
	waitFor := func(cond string) bool {
		for deadline := time.Now().Add(60 * time.Second); time.Now().Before(deadline); time.Sleep(100 * time.Millisecond) {
			if eval(`String(!!(`+cond+`))`) == "true" {
				return true
			}
		}
		return false
	}
	launch := smart + "/launch?url=" + url.QueryEscape(link["url"]) + "&appContext=" + url.QueryEscape(link["appContext"])
	// The launch goes through several redirects and a script-driven one;
	// the page is followed by polling, not by a navigation's load event.
	eval(`(() => { location.href = ` + strconv.Quote(launch) + `; return ""; })()`)
	waitFor(`document.body && document.body.dataset.ready`)
	if ready := eval(`document.body.dataset.ready || ""`); ready != "1" {
		mu.Lock()
		t.Fatalf("the app did not come up (ready=%q, status %q, at %s)\nconsole:\n%s", ready, eval(`(document.getElementById("status")||{}).textContent||""`),
			eval(`location.href`), strings.Join(console, "\n"))
	}
	figure := func(name string) float64 {
		t.Helper()
		text := eval(`(document.querySelector('tr[data-figure="` + name + `"] td.num')||{}).textContent||""`)
		f := strings.Fields(text)
		if len(f) == 0 {
			t.Fatalf("figure %s is not shown", name)
		}
		v, err := strconv.ParseFloat(f[0], 64)
		if err != nil {
			t.Fatalf("figure %s: %q", name, text)
		}
		return v
	}
	// The values and limits the card gave, and the scenario's results.
	for _, name := range []string{"sodiumLatest", "limit24h", "limit48h", "riseFromNadir24h", "projectedChange24h", "maxRateMlPerHour"} {
		if got := figure(name); got != cardFigs[name] {
			t.Errorf("%s: the app shows %g, the card %g", name, got, cardFigs[name])
		}
	}
	if nadir := eval(`(document.querySelector('tr[data-figure="reference"] td.num')||{}).textContent||""`); !strings.HasPrefix(nadir, "111.5 mmol/L") {
		t.Errorf("nadir shown %q, want 111.5 (112 at −22 h and 110 at −30 h interpolated at the 24-h window's start)", nadir)
	}
	rows := eval(`String(document.querySelectorAll("#results tbody tr").length)`)
	label := eval(`document.getElementById("chart").getAttribute("aria-label")`)
	if rows != "4" || !strings.Contains(label, "latest 116 mmol/L") || !strings.Contains(label, "24-h limit 121.5 mmol/L") {
		t.Errorf("results rows %s, chart label %q; want the scenario's 4 results (110, 112, 114, 116) and the limit 111.5 + 10", rows, label)
	}
	// Every control is labelled for a screen reader.
	if n := eval(`String([...document.querySelectorAll("input, button")].filter(e => !(e.labels && e.labels.length) && !e.getAttribute("aria-label") && !e.textContent.trim()).length)`); n != "0" {
		t.Errorf("%s controls without a label", n)
	}

	// Another rate: the projection follows, to eval's figure at that rate.
	const tryRate = 25.0
	eval(`(() => { const r = document.getElementById("rate"); r.value = "25"; r.dispatchEvent(new Event("change")); return ""; })()`)
	if !waitFor(`document.body.dataset.rate === "25"`) {
		t.Fatalf("the rate did not change: %s", eval(`document.getElementById("rate-note").textContent`))
	}
	want := evalAtRate(t, tryRate)
	for _, name := range []string{"projectedChange24h", "projectedTotal24h", "volume24hLitres", "maxRateMlPerHour"} {
		if got := figure(name); got != want[name] {
			t.Errorf("at %g mL/h %s: the app shows %g, halite eval %g", tryRate, name, got, want[name])
		}
	}
	if figure("projectedChange24h") == cardFigs["projectedChange24h"] {
		t.Errorf("the projection did not move with the rate (%g)", cardFigs["projectedChange24h"])
	}
	shot, err := chromedp.Run(ctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	if a := os.Getenv("CI_ARTIFACTS"); a != "" {
		dir = a
	}
	if *update {
		dir = filepath.Join("..", "..", "testdata", "app")
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, "sodium-course.png"), shot, 0o644); err != nil {
		t.Fatal(err)
	}
	mu.Lock()
	defer mu.Unlock()
	for _, l := range console {
		if strings.Contains(l, "Content Security Policy") || strings.HasPrefix(l, "exception") || strings.HasPrefix(l, "error") {
			t.Errorf("browser console: %s", l)
		}
	}
}
