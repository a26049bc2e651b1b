// Command halite-wasm is halite's computation for the browser: the sodium
// course app (hooks/app) runs it as WebAssembly, so the figures it shows
// come from the same rules and fhirmap code as the cards, never from a
// re-implementation in JavaScript. Build it with
// `GOOS=js GOARCH=wasm go build ./cmd/halite-wasm` (hooks/app's build does).
package main

import (
	"encoding/json"
	"errors"
	"fmt"
	"sort"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/rules"
)

// CourseRequest is what the app asks: the resources it read from the FHIR
// server with the clinician's token, the draft orders the card was about
// (from its appContext), and the rate to try for the draft under review.
type CourseRequest struct {
	At        time.Time         `json:"at"`
	PatientID string            `json:"patientId"`
	Server    string            `json:"server"`
	Resources []json.RawMessage `json:"resources"`
	Drafts    []json.RawMessage `json:"drafts"`
	// Review is the index in Drafts of the draft order under review, and
	// Rule the card's rule: its figures are the ones shown.
	Review int    `json:"review"`
	Rule   string `json:"rule,omitempty"`
	// RateMlPerHour, when set, replaces the reviewed draft's rate.
	RateMlPerHour *float64 `json:"rateMlPerHour,omitempty"`
	// HistoryHours is how far back the sodium series goes (72 when 0).
	HistoryHours float64 `json:"historyHours,omitempty"`
}

// Course is what the app draws: the sodium results with their origin,
// the nadir (or peak) the limits are measured from, the limit lines, the
// orders as bars, the projected course of the reviewed order, and the
// figures and findings of the infusion check.
type Course struct {
	Ruleset    string             `json:"ruleset"`
	At         time.Time          `json:"at"`
	Sodium     []Point            `json:"sodium"`
	Reference  *Point             `json:"reference,omitempty"`
	Falling    bool               `json:"falling"` // hypernatremia: limits on the fall from the peak
	Limits     []LimitLine        `json:"limits"`
	Orders     []Bar              `json:"orders"`
	Projection []Point            `json:"projection"`
	Figures    map[string]float64 `json:"figures"`
	Findings   []FindingView      `json:"findings"`
	Missing    []string           `json:"missing"`
}

// Point is one sodium value at one time.
type Point struct {
	At     time.Time `json:"at"`
	Value  float64   `json:"value"`
	Origin string    `json:"origin,omitempty"` // laboratory, blood gas, point of care
}

// LimitLine is the value the sodium should not pass (fall below, in
// hypernatremia) under the Hours limit: the reference value of the
// trailing window (its nadir; its peak in hypernatremia) plus the limit,
// drawn from the reference's time to the end of the projection.
type LimitLine struct {
	Hours float64   `json:"hours"`
	From  time.Time `json:"from"`
	Until time.Time `json:"until"`
	Value float64   `json:"value"`
}

// Bar is an order on the time axis.
type Bar struct {
	Label         string    `json:"label"`
	Kind          string    `json:"kind"` // running, draft, reviewed
	Start         time.Time `json:"start"`
	End           time.Time `json:"end"`
	RateMlPerHour *float64  `json:"rateMlPerHour,omitempty"`
	NaKmmolPerL   *float64  `json:"naKmmolPerL,omitempty"`
}

// FindingView is a finding as the app lists it.
type FindingView struct {
	Rule      string `json:"rule"`
	Indicator string `json:"indicator"`
	Summary   string `json:"summary"`
	Order     string `json:"order,omitempty"`
}

// draftRef names the i-th draft (drafts carry no ids of their own).
func draftRef(i int) string { return fmt.Sprintf("MedicationRequest/draft-%d", i+1) }

// ComputeCourse runs halite's mapping and infusion check over req.
func ComputeCourse(rs *rules.Ruleset, req CourseRequest) (Course, error) {
	if req.At.IsZero() {
		return Course{}, errors.New("at: required")
	}
	if req.Review < 0 || req.Review >= len(req.Drafts) {
		return Course{}, fmt.Errorf("review: %d is not one of the %d draft orders", req.Review, len(req.Drafts))
	}
	in := fhirmap.Input{At: req.At, PatientID: req.PatientID, Server: req.Server}
	for _, raw := range req.Resources {
		res, err := fhirmap.ReadResource(raw)
		if err != nil {
			continue // Map reports what it cannot use; an unreadable one is not data
		}
		if res.Type == "Patient" {
			in.Patient = raw
			continue
		}
		in.Entries = append(in.Entries, fhirmap.BundleEntry{Resource: raw})
	}
	for i, raw := range req.Drafts {
		d, err := asDraft(raw, i, req.PatientID, i == req.Review, req.RateMlPerHour)
		if err != nil {
			return Course{}, fmt.Errorf("drafts[%d]: %w", i, err)
		}
		in.DraftEntries = append(in.DraftEntries, fhirmap.BundleEntry{Resource: d})
	}
	facts := fhirmap.Map(in, rs)
	out := Course{Ruleset: rs.Revision(), At: req.At, Figures: map[string]float64{}, Sodium: []Point{}, Limits: []LimitLine{},
		Orders: []Bar{}, Projection: []Point{}, Findings: []FindingView{}, Missing: []string{}}
	history := req.HistoryHours
	if history <= 0 {
		history = 72
	}
	from := req.At.Add(-time.Duration(history * float64(time.Hour)))
	for _, m := range facts.Labs[rules.Sodium] {
		if !m.At.Before(from) {
			out.Sodium = append(out.Sodium, Point{At: m.At, Value: m.Value, Origin: string(m.Origin)})
		}
	}
	reviewed := draftRef(req.Review)
	for _, f := range rs.Evaluate(rules.InfusionCheck, facts) {
		out.Findings = append(out.Findings, FindingView{Rule: f.Rule, Indicator: f.Indicator.String(), Summary: f.Summary, Order: f.Order})
		if f.Order == reviewed && len(f.Figures) > 0 && (req.Rule == "" || f.Rule == req.Rule || len(out.Figures) == 0) {
			out.Figures = f.Figures
		}
	}
	for _, g := range facts.Gaps {
		out.Missing = append(out.Missing, g.Reason)
	}
	// In hypernatremia the limits bound the fall from the peak, judged, as
	// the infusion check judges it, on the latest sodium within the
	// policy's age.
	pr := rs.Policy().Projection
	if na := facts.Labs[rules.Sodium]; len(na) > 0 {
		last := na[len(na)-1]
		out.Falling = !last.At.Before(req.At.Add(-time.Duration(pr.SodiumMaxAgeHours*float64(time.Hour)))) && last.Value > pr.HypernatremiaAbove
	}
	trend := rules.AnalyseSodium(facts.Labs[rules.Sodium], req.At)
	limit := func(hours, allowed float64, w *rules.SodiumWindow) {
		if w == nil || allowed <= 0 {
			return
		}
		ref := w.Nadir
		value := ref.Value + allowed
		if out.Falling {
			ref = w.Peak
			value = ref.Value - allowed
		}
		if out.Reference == nil || hours == 24 {
			out.Reference = &Point{At: ref.At, Value: ref.Value, Origin: string(ref.Origin)}
		}
		out.Limits = append(out.Limits, LimitLine{Hours: hours, From: ref.At, Until: req.At.Add(24 * time.Hour), Value: value})
	}
	limit(24, out.Figures["limit24h"], trend.Window24h)
	limit(48, out.Figures["limit48h"], trend.Window48h)
	if latest, ok := out.Figures["sodiumLatest"]; ok {
		if change, ok := out.Figures["projectedChange24h"]; ok {
			out.Projection = []Point{{At: req.At, Value: latest}, {At: req.At.Add(24 * time.Hour), Value: rules.Round(latest+change, 1)}}
		}
	}
	bar := func(o rules.MedicationOrder, kind string, start time.Time) {
		comp, ok := rs.InfusateComposition(o.Medication)
		if !ok {
			return
		}
		end := req.At.Add(24 * time.Hour)
		if o.EndsAt != nil && o.EndsAt.Before(end) {
			end = *o.EndsAt
		}
		nak := rules.Round(comp.NaK(), 1)
		label := o.Medication.Text
		if label == "" && len(o.Medication.Codings) > 0 {
			label = o.Medication.Codings[0].Display
		}
		out.Orders = append(out.Orders, Bar{Label: label, Kind: kind, Start: start, End: end, RateMlPerHour: o.RateMlPerHour, NaKmmolPerL: &nak})
	}
	for _, o := range append(append([]rules.MedicationOrder{}, facts.Medications...), facts.Infusing...) {
		start := from
		if o.AuthoredOn != nil && o.AuthoredOn.After(from) {
			start = *o.AuthoredOn
		}
		bar(o, "running", start)
	}
	for _, o := range facts.DraftOrders {
		kind := "draft"
		if o.Reference == reviewed {
			kind = "reviewed"
		}
		bar(o, kind, req.At)
	}
	sort.SliceStable(out.Orders, func(i, j int) bool { return out.Orders[i].Start.Before(out.Orders[j].Start) })
	return out, nil
}

// asDraft is a draft order from the card's appContext made ready to map:
// a MedicationRequest, status draft, about the launch's patient, with an
// id of its own and, for the reviewed one, the rate to try.
func asDraft(raw json.RawMessage, i int, patientID string, reviewed bool, rate *float64) (json.RawMessage, error) {
	var d map[string]any
	if err := json.Unmarshal(raw, &d); err != nil {
		return nil, errors.New("not a JSON object")
	}
	if d["resourceType"] != "MedicationRequest" {
		return nil, errors.New("not a MedicationRequest")
	}
	d["id"] = fmt.Sprintf("draft-%d", i+1)
	d["status"] = "draft"
	d["subject"] = map[string]any{"reference": "Patient/" + patientID}
	if reviewed && rate != nil {
		if *rate <= 0 || *rate > 10000 {
			return nil, fmt.Errorf("rate %g mL/h is not a rate to try", *rate)
		}
		dosage, _ := d["dosageInstruction"].([]any)
		if len(dosage) == 0 {
			dosage = []any{map[string]any{}}
		}
		first, _ := dosage[0].(map[string]any)
		if first == nil {
			first = map[string]any{}
		}
		delete(first, "text") // it states the old rate
		first["doseAndRate"] = []any{map[string]any{"rateQuantity": map[string]any{
			"value": *rate, "unit": "mL/h", "system": "http://unitsofmeasure.org", "code": "mL/h"}}}
		dosage[0] = first
		d["dosageInstruction"] = dosage
	}
	return json.Marshal(d)
}
