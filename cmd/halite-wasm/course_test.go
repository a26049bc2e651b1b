package main

import (
	"context"
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/rules"
)

// appQueries are the searches the app makes (hooks/app/src/app.js), with
// the patient id for {id}.
var appQueries = []string{
	"Observation?patient={id}&_sort=-date&_count=500",
	"MedicationRequest?patient={id}&status=active",
	"MedicationAdministration?patient={id}&status=in-progress",
	"Procedure?patient={id}&status=completed",
	"Condition?patient={id}&clinical-status=active",
}

// TestAppQueriesAreTheApps: the searches this test makes are the app's
// own (hooks/app/src/app.js), so the agreement below is the app's.
func TestAppQueriesAreTheApps(t *testing.T) {
	src, err := os.ReadFile(filepath.Join("..", "..", "hooks", "app", "src", "app.js"))
	if err != nil {
		t.Fatal(err)
	}
	for _, q := range appQueries {
		js := strings.ReplaceAll(q, "{id}", "${pid}")
		if !strings.Contains(string(src), "`"+js+"`") {
			t.Errorf("app.js does not search %s", js)
		}
	}
}

// TestCourseAgreesWithTheCards runs every golden scenario with a draft
// order through the infusion check as the service answers it, then does
// what the app does with each card that links the sodium course — read the
// chart with the app's searches, take the drafts from the card's
// appContext — and requires the same figures as the card's.
func TestCourseAgreesWithTheCards(t *testing.T) {
	rs, err := rules.Load()
	if err != nil {
		t.Fatal(err)
	}
	files, _ := filepath.Glob(filepath.Join("..", "..", "testdata", "scenarios", "*.json"))
	engine := hooks.NewEngine(hooks.EngineConfig{Registry: hooks.NewRegistry(nil, rs), Ruleset: rs, Limits: hooks.Limits{MaxPages: 5},
		AppURL: "https://halite.example.org/app/launch.html", FixedClock: true})
	svc, _ := engine.Registry().Lookup("sodium-infusion-check")
	linked := 0
	for _, file := range files {
		name := filepath.Base(file)
		at := scenarioTime(t, name)
		raw, err := os.ReadFile(file)
		if err != nil {
			t.Fatal(err)
		}
		b, err := fhirmap.ParseBundle(raw)
		if err != nil {
			t.Fatal(err)
		}
		req, err := hooks.BuildRequest(b, svc, hooks.RequestOptions{Hook: hooks.HookOrderSign, UserID: "Practitioner/u"})
		if err != nil {
			continue // no draft order: nothing to sign
		}
		body, _ := json.Marshal(req)
		var head struct {
			PatientID string `json:"patientId"`
		}
		_ = json.Unmarshal(req.Context, &head)
		out, err := engine.Handle(context.Background(), svc.ID, body, at)
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		for _, card := range out.Response.Cards {
			var link *hooks.Link
			for i := range card.Links {
				if card.Links[i].Type == "smart" {
					link = &card.Links[i]
				}
			}
			if link == nil {
				continue
			}
			linked++
			var ctx hooks.AppContext
			if err := json.Unmarshal([]byte(link.AppContext), &ctx); err != nil {
				t.Fatalf("%s: appContext: %v", name, err)
			}
			if ctx.At == nil || !ctx.At.Equal(at) || ctx.Service != svc.ID {
				t.Errorf("%s: appContext at %v service %q", name, ctx.At, ctx.Service)
			}
			course, err := ComputeCourse(rs, CourseRequest{At: *ctx.At, PatientID: head.PatientID,
				Resources: appReads(t, b, head.PatientID, ctx.Drafts), Drafts: ctx.Drafts, Review: ctx.Review, Rule: ctx.Rule})
			if err != nil {
				t.Fatalf("%s: %v", name, err)
			}
			var ext struct {
				Halite struct {
					Rule    string             `json:"rule"`
					Figures map[string]float64 `json:"figures"`
				} `json:"halite"`
			}
			if err := json.Unmarshal(card.Extension, &ext); err != nil {
				t.Fatal(err)
			}
			if !reflect.DeepEqual(course.Figures, ext.Halite.Figures) {
				t.Errorf("%s (%s): the app's figures differ from the card's:\napp  %v\ncard %v", name, ext.Halite.Rule, course.Figures, ext.Halite.Figures)
			}
			found := false
			for _, f := range course.Findings {
				found = found || (f.Rule == ext.Halite.Rule && f.Order == draftRef(ctx.Review))
			}
			if !found {
				t.Errorf("%s: the app does not find the card's %s for the order under review: %v", name, ext.Halite.Rule, course.Findings)
			}
			if len(course.Sodium) == 0 || len(course.Limits) == 0 {
				t.Errorf("%s: the course has %d sodium values and %d limit lines", name, len(course.Sodium), len(course.Limits))
			}
		}
	}
	t.Logf("%d cards linking the app, each with the card's figures", linked)
	if linked != 18 { // the README says 18
		t.Errorf("only %d cards link the app across the scenarios", linked)
	}
}

// appReads is what the app reads: the Patient, its searches' results, and
// the Medications the drafts refer to, from the scenario served as a FHIR
// server.
func appReads(t *testing.T, b *fhirmap.Bundle, patientID string, drafts []json.RawMessage) []json.RawMessage {
	t.Helper()
	srv := httptest.NewServer(hooks.NewBundleStore(b))
	defer srv.Close()
	get := func(q string) []byte {
		resp, err := http.Get(srv.URL + "/fhir/" + q)
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		var body json.RawMessage
		if err := json.NewDecoder(resp.Body).Decode(&body); err != nil || resp.StatusCode != 200 {
			t.Fatalf("%s: %d %v", q, resp.StatusCode, err)
		}
		return body
	}
	out := []json.RawMessage{get("Patient/" + patientID)}
	for _, q := range appQueries {
		page, err := fhirmap.ParseBundle(get(strings.ReplaceAll(q, "{id}", patientID)))
		if err != nil {
			t.Fatal(err)
		}
		for _, e := range page.Entries {
			out = append(out, e.Resource)
		}
	}
	for _, d := range append(append([]json.RawMessage{}, drafts...), out...) {
		var ref struct {
			MedicationReference struct{ Reference string } `json:"medicationReference"`
		}
		if json.Unmarshal(d, &ref) == nil && strings.HasPrefix(ref.MedicationReference.Reference, "Medication/") {
			out = append(out, get(ref.MedicationReference.Reference))
		}
	}
	return out
}

// scenarioTime is the time a scenario's expectations are evaluated at.
func scenarioTime(t *testing.T, name string) time.Time {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join("..", "..", "testdata", "scenarios", "expected", name))
	if err != nil {
		t.Fatal(err)
	}
	var e struct {
		At time.Time `json:"at"`
	}
	if err := json.Unmarshal(raw, &e); err != nil {
		t.Fatal(err)
	}
	return e.At
}

// TestComputeCourseRefuses: a request the computation cannot answer says why.
func TestComputeCourseRefuses(t *testing.T) {
	rs, err := rules.Load()
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	draft := json.RawMessage(`{"resourceType":"MedicationRequest","status":"draft","intent":"order"}`)
	zero := 0.0
	for _, tc := range []struct {
		name string
		req  CourseRequest
		want string
	}{
		{"no time", CourseRequest{Drafts: []json.RawMessage{draft}}, "at: required"},
		{"no draft", CourseRequest{At: at}, "review"},
		{"review out of range", CourseRequest{At: at, Drafts: []json.RawMessage{draft}, Review: 1}, "review"},
		{"not a request", CourseRequest{At: at, Drafts: []json.RawMessage{json.RawMessage(`{"resourceType":"Observation"}`)}}, "not a MedicationRequest"},
		{"zero rate", CourseRequest{At: at, Drafts: []json.RawMessage{draft}, RateMlPerHour: &zero}, "not a rate to try"},
	} {
		if _, err := ComputeCourse(rs, tc.req); err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%s: error %v, want %q", tc.name, err, tc.want)
		}
	}
}
