package main

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/deid"
	"github.com/halite-cds/halite/rules"
)

var timeWithClock = regexp.MustCompile(`^\d{4}-\d{2}-\d{2}T`)

// phiOf collects what identifies the patient of a scenario bundle: names,
// identifiers, the birth date, every resource id (6 characters or more)
// and every date with a time of day.
func phiOf(t *testing.T, raw []byte) []string {
	t.Helper()
	var doc any
	if err := json.Unmarshal(raw, &doc); err != nil {
		t.Fatal(err)
	}
	var out []string
	var walk func(key string, v any)
	walk = func(key string, v any) {
		switch x := v.(type) {
		case map[string]any:
			for k, y := range x {
				walk(k, y)
			}
		case []any:
			for _, y := range x {
				walk(key, y)
			}
		case string:
			switch {
			case key == "given" && (x == "Test" || x == "Patient" || x == "Demo"):
				// the fixtures' placeholder given names, words of the trade too
			case key == "family" || key == "given" || key == "birthDate" || key == "value" && strings.HasPrefix(x, "HAL-"):
				out = append(out, x)
			case key == "id" && len(x) >= 6:
				out = append(out, x)
			case timeWithClock.MatchString(x):
				out = append(out, x)
			}
		}
	}
	walk("", doc)
	return out
}

// TestDeidentifiedScenarios: for every scenario and every service of each
// hook, the request de-identified keeps none of the patient's names,
// identifiers, birth date, resource ids or times, and evaluated at the
// shifted time gives the same cards (rules and indicators) as the original.
func TestDeidentifiedScenarios(t *testing.T) {
	rs, err := rules.Load()
	if err != nil {
		t.Fatal(err)
	}
	reg := hooks.NewRegistry(nil, rs)
	engine := hooks.NewEngine(hooks.EngineConfig{Registry: reg, Ruleset: rs, Limits: hooks.Limits{MaxPages: 1}})
	session, err := deid.NewSession()
	if err != nil {
		t.Fatal(err)
	}
	at, _ := time.Parse(time.RFC3339, scenarioAt)
	cardsOf := func(body []byte, svc string, when time.Time) []string {
		out, err := engine.Handle(context.Background(), svc, body, when)
		if err != nil {
			t.Fatalf("%s: %v", svc, err)
		}
		var got []string
		for _, c := range out.Response.Cards {
			var ext struct {
				Halite struct {
					Rule string `json:"rule"`
				} `json:"halite"`
			}
			_ = json.Unmarshal(c.Extension, &ext)
			got = append(got, c.Indicator+" "+ext.Halite.Rule)
		}
		return got
	}
	checked := 0
	for _, file := range scenarioFiles(t) {
		raw, err := os.ReadFile(file)
		if err != nil {
			t.Fatal(err)
		}
		phi := phiOf(t, raw)
		b := readScenario(t, filepath.Base(file))
		for _, svc := range reg.Services() {
			for _, hook := range svc.Hooks {
				req, err := hooks.BuildRequest(b, svc, hooks.RequestOptions{Hook: hook, UserID: "Practitioner/cli-user"})
				if err != nil {
					continue // no draft orders for an order hook
				}
				body := mustJSON(t, req)
				clean, shifted, err := session.Request(body, at)
				if err != nil {
					t.Fatal(err)
				}
				for _, p := range phi {
					if bytes.Contains(clean, []byte(p)) {
						t.Errorf("%s %s %s: %q survived de-identification", filepath.Base(file), svc.ID, hook, p)
					}
				}
				if got, want := cardsOf(clean, svc.ID, shifted), cardsOf(body, svc.ID, at); !slices.Equal(got, want) {
					t.Errorf("%s %s %s: de-identified cards %q, original %q", filepath.Base(file), svc.ID, hook, got, want)
				}
				checked++
			}
		}
	}
	if checked < 100 {
		t.Errorf("only %d requests checked", checked)
	}
}

// TestServeCapture: the development server with capture_dir writes each
// call de-identified with its expectations, and the capture replays as a
// suite with the same cards; capture_dir is refused outside development
// mode.
func TestServeCapture(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "capture")
	t.Setenv("HALITE_CAPTURE_DIR", dir)
	base, logs, stop := startServe(t, "--at", scenarioAt)
	demo, err := os.ReadFile(filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json"))
	if err != nil {
		t.Fatal(err)
	}
	resp, err := http.Post(base+"/cds-services/sodium-infusion-check", "application/json", bytes.NewReader(demo))
	if err != nil {
		t.Fatal(err)
	}
	io.Copy(io.Discard, resp.Body)
	resp.Body.Close()
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(logs.String(), "CAPTURE:") {
		t.Errorf("no capture warning:\n%s", logs.String())
	}
	captured, err := os.ReadFile(filepath.Join(dir, "0001-sodium-infusion-check.json"))
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range []string{"pt-alder", "Alder", "HAL-0001", "obs-alder", "mr-alder"} {
		if bytes.Contains(captured, []byte(p)) {
			t.Errorf("%q survived in the capture", p)
		}
	}
	var out bytes.Buffer
	if err := run(context.Background(), []string{"suite", dir}, &out, io.Discard); err != nil || !strings.Contains(out.String(), "1 passed") {
		t.Errorf("the capture does not replay: %v\n%s", err, out.String())
	}

	t.Setenv("HALITE_DEVELOPMENT_MODE", "false")
	err = run(context.Background(), []string{"serve", "--addr", "127.0.0.1:0"}, io.Discard, io.Discard)
	if err == nil || !strings.Contains(err.Error(), "capture_dir is for development mode only") {
		t.Errorf("capture_dir outside development mode: %v", err)
	}
}
