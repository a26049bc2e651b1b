package hooks

import (
	"encoding/json"
	"time"

	"github.com/halite-cds/halite/rules"
)

// AppExtensionKey names the discovery extension that says a service's
// cards link the sodium course app (CDS Hooks 2.0 §Extensions: a
// reverse-domain key).
const AppExtensionKey = "io.github.halite-cds.sodium-course"

// AppContext is what a card's SMART link gives the sodium course app (in
// the token response, CDS Hooks 2.0 §Link): the draft orders of the call,
// stripped of everything that could identify the patient, which one is
// under review, the service and rule, and — only when the service runs on
// a fixed clock (development) — the time it evaluated at.
type AppContext struct {
	Version int               `json:"version"`
	Service string            `json:"service"`
	Rule    string            `json:"rule"`
	Review  int               `json:"review"`
	Drafts  []json.RawMessage `json:"drafts"`
	At      *time.Time        `json:"at,omitempty"`
}

// appDraft is a draft order reduced to what the computation reads, at
// every depth: the medication (its codings and name, or the reference
// alone), category codings, contained Medications' code, form and
// ingredients, the first dosage's route, dose and rate and timing.repeat
// without its start, and the dispensed quantity. Narrative, display and
// free text other than the medication's name, extensions, identifiers,
// people and dates other than the course's end are left out. A draft with
// a modifierExtension is not reduced (ok false): dropping it could change
// its meaning.
func appDraft(raw json.RawMessage) (json.RawMessage, bool) {
	var d map[string]any
	if json.Unmarshal(raw, &d) != nil || d["resourceType"] != "MedicationRequest" || hasModifier(d) {
		return nil, false
	}
	out := map[string]any{"resourceType": "MedicationRequest", "status": d["status"], "intent": d["intent"]}
	if v, ok := d["medicationCodeableConcept"].(map[string]any); ok {
		out["medicationCodeableConcept"] = pick(v, "coding", "text")
	}
	if v, ok := d["medicationReference"].(map[string]any); ok {
		out["medicationReference"] = pick(v, "reference")
	}
	if cats, ok := d["category"].([]any); ok {
		var kept []any
		for _, c := range cats {
			if m, ok := c.(map[string]any); ok {
				kept = append(kept, pick(m, "coding"))
			}
		}
		out["category"] = kept
	}
	if cs, ok := d["contained"].([]any); ok {
		var meds []any
		for _, c := range cs {
			if m, ok := c.(map[string]any); ok && m["resourceType"] == "Medication" {
				meds = append(meds, pick(m, "resourceType", "id", "code", "form", "ingredient"))
			}
		}
		out["contained"] = meds
	}
	if ds, ok := d["dosageInstruction"].([]any); ok && len(ds) > 0 {
		if first, ok := ds[0].(map[string]any); ok {
			dosage := pick(first, "route", "doseAndRate")
			if t, ok := first["timing"].(map[string]any); ok {
				if rep, ok := t["repeat"].(map[string]any); ok {
					rep = pick(rep, "boundsDuration", "boundsPeriod", "count", "duration", "durationUnit", "frequency", "period", "periodUnit")
					if bp, ok := rep["boundsPeriod"].(map[string]any); ok {
						rep["boundsPeriod"] = pick(bp, "end")
					}
					dosage["timing"] = map[string]any{"repeat": rep}
				}
			}
			out["dosageInstruction"] = []any{dosage}
		}
	}
	if dr, ok := d["dispenseRequest"].(map[string]any); ok {
		out["dispenseRequest"] = pick(dr, "quantity")
	}
	for k, v := range out {
		if v == nil {
			delete(out, k)
		}
	}
	b, err := json.Marshal(stripText(out))
	return b, err == nil
}

// pick copies the named members of m.
func pick(m map[string]any, names ...string) map[string]any {
	out := map[string]any{}
	for _, n := range names {
		if v, ok := m[n]; ok {
			out[n] = v
		}
	}
	return out
}

// stripText drops display texts, narrative and extensions at every depth
// of the reduced draft, but the medication's own name (a CodeableConcept
// text directly under medicationCodeableConcept or a contained code).
func stripText(v any) any {
	switch t := v.(type) {
	case map[string]any:
		for k, c := range t {
			switch k {
			case "display", "extension", "comment", "div":
				delete(t, k)
			default:
				t[k] = stripText(c)
			}
		}
	case []any:
		for i := range t {
			t[i] = stripText(t[i])
		}
	}
	return v
}

// hasModifier reports a modifierExtension at any depth.
func hasModifier(v any) bool {
	switch t := v.(type) {
	case map[string]any:
		for k, c := range t {
			if k == "modifierExtension" || hasModifier(c) {
				return true
			}
		}
	case []any:
		for _, c := range t {
			if hasModifier(c) {
				return true
			}
		}
	}
	return false
}

// courseLink is the SMART link to the sodium course for a finding about
// one draft order with a projection's figures, when the app is served.
func courseLink(f rules.Finding, in suggestionInput) (Link, bool) {
	if in.AppURL == "" || f.Order == "" || in.Drafts[f.Order] == nil {
		return Link{}, false
	}
	if _, ok := f.Figures["limit24h"]; !ok {
		return Link{}, false
	}
	ctx := AppContext{Version: 1, Service: in.Service, Rule: f.Rule, Review: -1}
	if in.FixedClock {
		at := in.At.UTC()
		ctx.At = &at
	}
	for _, ref := range in.DraftOrder {
		b, ok := appDraft(in.Drafts[ref])
		if !ok {
			if ref == f.Order {
				return Link{}, false // the order under review cannot be passed on safely
			}
			continue
		}
		if ref == f.Order {
			ctx.Review = len(ctx.Drafts)
		}
		ctx.Drafts = append(ctx.Drafts, b)
	}
	if ctx.Review < 0 {
		return Link{}, false
	}
	b, err := json.Marshal(ctx)
	if err != nil {
		return Link{}, false
	}
	return Link{Label: "Sodium course: chart and other rates", URL: in.AppURL, Type: "smart", AppContext: string(b)}, true
}

// discovery is the registry's discovery document; with the app served,
// the infusion check's services say that their cards link it.
func (e *Engine) discovery() Discovery {
	d := e.registry.Discovery()
	if e.appURL == "" {
		return d
	}
	for i, s := range d.Services {
		if svc, _ := e.registry.Lookup(s.ID); svc.Check == rules.InfusionCheck {
			d.Services[i].Extension = map[string]any{AppExtensionKey: map[string]string{
				"launchUrl": e.appURL,
				"about":     "cards that project a draft order's sodium change link this SMART app (links[].type smart): the sodium course with its limits, and other rates to try",
			}}
		}
	}
	return d
}
