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

// draftKeep are the MedicationRequest elements a draft keeps in an
// AppContext: what the computation reads, nothing that names or dates the
// patient (no id, subject, encounter, requester, identifiers, authoredOn,
// notes or narrative).
var draftKeep = []string{"resourceType", "status", "intent", "medicationCodeableConcept", "medicationReference",
	"contained", "dosageInstruction", "dispenseRequest", "category"}

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
		raw := in.Drafts[ref]
		var d map[string]json.RawMessage
		if json.Unmarshal(raw, &d) != nil || string(d["resourceType"]) != `"MedicationRequest"` {
			continue
		}
		kept := map[string]json.RawMessage{}
		for _, k := range draftKeep {
			if v, ok := d[k]; ok {
				kept[k] = v
			}
		}
		if c, ok := kept["contained"]; ok {
			kept["contained"] = containedMedications(c)
		}
		if dsg, ok := kept["dosageInstruction"]; ok {
			kept["dosageInstruction"] = withoutPatientText(dsg)
		}
		if ref == f.Order {
			ctx.Review = len(ctx.Drafts)
		}
		b, err := json.Marshal(kept)
		if err != nil {
			return Link{}, false
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

// containedMedications keeps the contained Medications a draft may refer
// to ("#med") and drops any other contained resource.
func containedMedications(raw json.RawMessage) json.RawMessage {
	var all []map[string]json.RawMessage
	if json.Unmarshal(raw, &all) != nil {
		return json.RawMessage(`[]`)
	}
	var meds []map[string]json.RawMessage
	for _, r := range all {
		if string(r["resourceType"]) == `"Medication"` {
			meds = append(meds, r)
		}
	}
	b, _ := json.Marshal(meds)
	return b
}

// withoutPatientText drops the dosage elements written for the patient
// (patientInstruction), free text the computation does not read.
func withoutPatientText(raw json.RawMessage) json.RawMessage {
	var ds []map[string]json.RawMessage
	if json.Unmarshal(raw, &ds) != nil {
		return json.RawMessage(`[]`)
	}
	for _, d := range ds {
		delete(d, "patientInstruction")
	}
	b, _ := json.Marshal(ds)
	return b
}
