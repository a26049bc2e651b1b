package hooks

import (
	"bytes"
	"encoding/json"
	"fmt"
	"strconv"
	"strings"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/rules"
)

// Codes of the laboratory tests halite suggests.
const (
	loincSystem = "http://loinc.org"
	sodiumLOINC = "2951-2"
	ucumSystem  = "http://unitsofmeasure.org"
)

// labTest is a test a suggestion can order.
type labTest int

// The tests halite suggests.
const (
	serumSodium labTest = iota
	urineOsmolTest
	urineSodium
)

// loinc is the test's LOINC code and display (reference notes §8) and a
// short text.
func (t labTest) loinc() (code, display, text string) {
	switch t {
	case urineOsmolTest:
		return "2695-5", "Osmolality of Urine", "Urine osmolality"
	case urineSodium:
		return "2955-3", "Sodium [Moles/volume] in Urine", "Urine sodium"
	}
	return sodiumLOINC, "Sodium [Moles/volume] in Serum or Plasma", "Serum sodium"
}

// suggestionInput is what building suggestions needs from the call.
type suggestionInput struct {
	At        time.Time
	PatientID string
	// EncounterID is context.encounterId, if the call gave one; suggested
	// requests then belong to that encounter.
	EncounterID string
	// Drafts are the draft orders by reference ("MedicationRequest/id"),
	// and DraftOrder their references in the call's order.
	Drafts     map[string]json.RawMessage
	DraftOrder []string
	// Service is the service answering; AppURL, when set, is the sodium
	// course app's SMART launch URL, which cards with a projection link;
	// FixedClock says the service evaluates at a fixed time (development),
	// which the app is then told.
	Service    string
	AppURL     string
	FixedClock bool
}

// draftIndex keys the raw draft orders by their reference, and lists the
// references in the call's order.
func draftIndex(entries []fhirmap.BundleEntry) (map[string]json.RawMessage, []string) {
	out := make(map[string]json.RawMessage, len(entries))
	var order []string
	for _, e := range entries {
		raw := e.Resource
		var head struct {
			ResourceType string `json:"resourceType"`
			ID           string `json:"id"`
		}
		if fhirmap.DecodeJSON(raw, &head) == nil && head.ResourceType != "" && head.ID != "" {
			out[head.ResourceType+"/"+head.ID] = raw
			order = append(order, head.ResourceType+"/"+head.ID)
		}
	}
	return out, order
}

// suggestions builds a finding's advice as CDS Hooks suggestions with
// FHIR R4 resources: an update of the draft at the new rate (with a
// sodium re-check), a sodium re-check ServiceRequest to create, or the
// deletion of the draft by resourceId. Advice that cannot be built from
// the call (no draft to update, a draft with several rates) is left out,
// never guessed.
func suggestions(f rules.Finding, in suggestionInput) ([]Suggestion, error) {
	var out []Suggestion
	for _, adv := range f.Advice {
		var actions []Action
		switch adv.Kind {
		case rules.AdviseRate:
			updated, ok, err := withRate(in.Drafts[f.Order], adv.RateMlPerHour)
			if err != nil {
				return nil, fmt.Errorf("suggest a rate for %s: %w", f.Order, err)
			}
			if !ok {
				continue
			}
			recheck, err := labRequest(in, f.Order, serumSodium, adv.RecheckHours)
			if err != nil {
				return nil, err
			}
			actions = []Action{
				{Type: "update", Description: fmt.Sprintf("Set the infusion rate of the draft order to %s mL/h", formatRate(adv.RateMlPerHour)), Resource: updated},
				{Type: "create", Description: recheckDescription(adv.RecheckHours), Resource: recheck},
			}
		case rules.AdviseRecheck:
			for _, h := range []float64{adv.RecheckHours, adv.FollowUpHours} {
				if h == 0 && len(actions) > 0 {
					break // no follow-up
				}
				recheck, err := labRequest(in, f.Order, serumSodium, h)
				if err != nil {
					return nil, err
				}
				actions = append(actions, Action{Type: "create", Description: recheckDescription(h), Resource: recheck})
			}
		case rules.AdviseUrineStudies:
			for _, test := range []labTest{urineOsmolTest, urineSodium} {
				req, err := labRequest(in, f.Order, test, 0)
				if err != nil {
					return nil, err
				}
				code, _, text := test.loinc()
				actions = append(actions, Action{Type: "create", Description: fmt.Sprintf("Order a %s (LOINC %s) now",
					strings.ToLower(text), code), Resource: req})
			}
		case rules.AdviseWithdraw:
			if _, ok := in.Drafts[f.Order]; !ok {
				continue
			}
			actions = []Action{{Type: "delete", Description: "Remove the draft order " + f.Order, ResourceID: f.Order}}
		default:
			return nil, fmt.Errorf("suggest: unknown advice kind %q", adv.Kind)
		}
		id, err := newRecordID()
		if err != nil {
			return nil, err
		}
		out = append(out, Suggestion{Label: adv.Label, UUID: id, IsRecommended: adv.Recommended, Actions: actions})
	}
	return out, nil
}

func recheckDescription(hours float64) string {
	switch {
	case hours == 0:
		return fmt.Sprintf("Order a serum sodium (LOINC %s) now", sodiumLOINC)
	case hours >= 48:
		return fmt.Sprintf("Order a serum sodium (LOINC %s) in %g days", sodiumLOINC, hours/24)
	}
	return fmt.Sprintf("Order a serum sodium (LOINC %s) in %g h", sodiumLOINC, hours)
}

func formatRate(v float64) string { return strconv.FormatFloat(v, 'f', -1, 64) }

// withRate returns the draft order with its rate set to mlPerHour, as a
// UCUM rateQuantity replacing the rateQuantity or rateRatio it had, and
// its instruction text marked as superseded. ok is
// false when there is no draft or it does not carry exactly one rate in
// one dosage instruction (the rate halite read), so the change would be
// ambiguous.
func withRate(draft json.RawMessage, mlPerHour float64) (json.RawMessage, bool, error) {
	if draft == nil {
		return nil, false, nil
	}
	dec := json.NewDecoder(bytes.NewReader(draft))
	dec.UseNumber() // keep every other number exactly as sent
	var mr map[string]any
	if err := dec.Decode(&mr); err != nil {
		return nil, false, fmt.Errorf("decode draft: %w", err)
	}
	dis, _ := mr["dosageInstruction"].([]any)
	if len(dis) != 1 {
		return nil, false, nil
	}
	di, _ := dis[0].(map[string]any)
	drs, _ := di["doseAndRate"].([]any)
	if len(drs) != 1 {
		return nil, false, nil
	}
	dr, _ := drs[0].(map[string]any)
	if dr == nil || (dr["rateQuantity"] == nil && dr["rateRatio"] == nil) {
		return nil, false, nil
	}
	delete(dr, "rateRatio")
	delete(dr, "rateRange")
	// The free-text instruction may state the old rate; keep it, marked as
	// superseded, so nothing the prescriber wrote is lost.
	if text, ok := di["text"].(string); ok && text != "" {
		di["text"] = fmt.Sprintf("Rate changed to %s mL/h; earlier instruction: %s", formatRate(mlPerHour), text)
	}
	dr["rateQuantity"] = map[string]any{"value": json.Number(formatRate(mlPerHour)), "unit": "mL/h", "system": ucumSystem, "code": "mL/h"}
	out, err := json.Marshal(mr)
	if err != nil {
		return nil, false, fmt.Errorf("encode draft: %w", err)
	}
	return out, true, nil
}

// serviceRequest is the part of FHIR R4 ServiceRequest halite writes.
type serviceRequest struct {
	ResourceType       string          `json:"resourceType"`
	Status             string          `json:"status"`
	Intent             string          `json:"intent"`
	Code               codeableConcept `json:"code"`
	Subject            reference       `json:"subject"`
	Encounter          *reference      `json:"encounter,omitempty"`
	SupportingInfo     []reference     `json:"supportingInfo,omitempty"`
	OccurrenceDateTime string          `json:"occurrenceDateTime"`
	Note               []annotation    `json:"note"`
}

type codeableConcept struct {
	Coding []Coding `json:"coding"`
	Text   string   `json:"text"`
}

type reference struct {
	Reference string `json:"reference"`
}

type annotation struct {
	Text string `json:"text"`
}

// labRequest is a draft ServiceRequest for test at at + hours, for the
// patient in context, citing the draft order as supporting information
// when there is one (basedOn would claim it fulfils the order).
func labRequest(in suggestionInput, order string, test labTest, hours float64) (json.RawMessage, error) {
	code, display, text := test.loinc()
	sr := serviceRequest{
		ResourceType: "ServiceRequest", Status: "draft", Intent: "order",
		Code:               codeableConcept{Coding: []Coding{{System: loincSystem, Code: code, Display: display}}, Text: text},
		Subject:            reference{Reference: "Patient/" + in.PatientID},
		OccurrenceDateTime: in.At.Add(time.Duration(hours * float64(time.Hour))).UTC().Format(time.RFC3339),
		Note:               []annotation{{Text: text + " suggested by halite; timing per local protocol."}},
	}
	if in.EncounterID != "" {
		sr.Encounter = &reference{Reference: "Encounter/" + in.EncounterID}
	}
	if _, ok := in.Drafts[order]; ok {
		sr.SupportingInfo = []reference{{Reference: order}}
	}
	out, err := json.Marshal(sr)
	if err != nil {
		return nil, fmt.Errorf("encode %s request: %w", text, err)
	}
	return out, nil
}
