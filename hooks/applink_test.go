package hooks

import (
	"encoding/json"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/rules"
)

// TestCourseLink: a finding about a draft with a projection's figures
// links the app, whose appContext keeps what the computation reads and
// drops what could identify the patient; other findings, or no app, get
// no link. With the app, discovery says so for the infusion check only.
func TestCourseLink(t *testing.T) {
	draft := json.RawMessage(`{"resourceType":"MedicationRequest","id":"mr-7","status":"draft","intent":"order",
		"subject":{"reference":"Patient/pt-42"},"encounter":{"reference":"Encounter/e-1"},"authoredOn":"2026-11-20T07:30:00Z",
		"identifier":[{"value":"ORD-991"}],"note":[{"text":"for Jane Roe"}],"text":{"div":"<div>Jane Roe</div>"},
		"contained":[{"resourceType":"Patient","id":"p","name":[{"family":"Roe"}]},{"resourceType":"Medication","id":"m","code":{"text":"NaCl 3%"}}],
		"medicationCodeableConcept":{"text":"sodium chloride 3%","coding":[{"code":"730781","display":"Roe's bag"}]},
		"dosageInstruction":[{"text":"40 mL/h for Roe","patientInstruction":"Mrs Roe: call the nurse","additionalInstruction":[{"text":"Roe"}],
			"timing":{"event":["2026-11-20T09:00:00Z"],"repeat":{"boundsPeriod":{"start":"2026-11-20T09:00:00Z","end":"2026-11-21T09:00:00Z"}}},
			"doseAndRate":[{"rateQuantity":{"value":40,"code":"mL/h"}}],"extension":[{"url":"x","valueString":"Roe"}]}],
		"dispenseRequest":{"quantity":{"value":500},"validityPeriod":{"start":"2026-11-20"},"performer":{"display":"Roe"}}}`)
	other := json.RawMessage(`{"resourceType":"MedicationRequest","id":"mr-8","status":"draft","intent":"order","medicationCodeableConcept":{"text":"dextrose 5%"}}`)
	in := suggestionInput{At: time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC), Drafts: map[string]json.RawMessage{"MedicationRequest/mr-8": other, "MedicationRequest/mr-7": draft},
		DraftOrder: []string{"MedicationRequest/mr-8", "MedicationRequest/mr-7"}, Service: "sodium-infusion-check", AppURL: "https://h.example.org/app/launch.html"}
	f := rules.Finding{Rule: "sodium-projected-over-limit", Order: "MedicationRequest/mr-7", Figures: map[string]float64{"limit24h": 10}}
	l, ok := courseLink(f, in)
	if !ok || l.Type != "smart" || l.URL != in.AppURL {
		t.Fatalf("link %+v %v", l, ok)
	}
	// The course's end is kept (the computation reads it); every other date goes.
	for _, phi := range []string{"pt-42", "Encounter", "mr-7", "mr-8", "2026-11-20", "ORD-991", "Jane Roe", "Roe", `"Patient"`, "call the nurse"} {
		if strings.Contains(l.AppContext, phi) {
			t.Errorf("appContext carries %q: %s", phi, l.AppContext)
		}
	}
	var ctx AppContext
	if err := json.Unmarshal([]byte(l.AppContext), &ctx); err != nil {
		t.Fatal(err)
	}
	if ctx.Review != 1 || len(ctx.Drafts) != 2 || !strings.Contains(string(ctx.Drafts[1]), "sodium chloride 3%") ||
		!strings.Contains(string(ctx.Drafts[1]), `"rateQuantity":{"code":"mL/h","value":40}`) || !strings.Contains(string(ctx.Drafts[1]), "NaCl 3%") ||
		!strings.Contains(string(ctx.Drafts[1]), "2026-11-21T09:00:00Z") || !strings.Contains(string(ctx.Drafts[1]), `"quantity":{"value":500}`) || ctx.At != nil || ctx.Rule != f.Rule || ctx.Service != in.Service {
		t.Errorf("appContext %s", l.AppContext)
	}
	in.FixedClock = true
	if l, _ := courseLink(f, in); !strings.Contains(l.AppContext, `"at":"2026-11-20T08:00:00Z"`) {
		t.Errorf("a fixed clock is not passed on: %s", l.AppContext)
	}
	for name, change := range map[string]func(*rules.Finding, *suggestionInput){
		"no app":      func(_ *rules.Finding, in *suggestionInput) { in.AppURL = "" },
		"no order":    func(f *rules.Finding, _ *suggestionInput) { f.Order = "" },
		"no figures":  func(f *rules.Finding, _ *suggestionInput) { f.Figures = nil },
		"other order": func(f *rules.Finding, _ *suggestionInput) { f.Order = "MedicationRequest/elsewhere" },
	} {
		f2, in2 := f, in
		change(&f2, &in2)
		if _, ok := courseLink(f2, in2); ok {
			t.Errorf("%s: linked", name)
		}
	}
	e := testEngine(t, nil)
	e.appURL = in.AppURL
	for _, s := range e.discovery().Services {
		_, has := s.Extension[AppExtensionKey]
		if has != (s.ID == "sodium-infusion-check") {
			t.Errorf("discovery %s (%s): app extension %v", s.ID, s.Hook, has)
		}
	}
}
