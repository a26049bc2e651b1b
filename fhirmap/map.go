package fhirmap

import (
	"encoding/json"
	"fmt"
	"sort"
	"time"

	"github.com/halite-cds/halite/rules"
)

// Input is the FHIR data of one hook call, as raw resources.
type Input struct {
	At        time.Time       // evaluation time; results after it are not used
	PatientID string          // context.patientId
	Patient   json.RawMessage // nil when the chart returned no Patient
	// Resources are the search results: Observations, MedicationRequests,
	// Conditions and the Medications they reference. A resource that appears
	// more than once (overlapping searches) is read once.
	Resources []json.RawMessage
	// DraftOrders are the resources of context.draftOrders.
	DraftOrders []json.RawMessage
	// Selections are order-select's selected references ("MedicationRequest/1");
	// nil means every draft order is evaluated (order-sign).
	Selections []string
}

type mapper struct {
	in    Input
	rs    *rules.Ruleset
	facts rules.Facts
	seen  map[seriesKey]string
	// medications indexes Medication resources by "Medication/id".
	medications map[string]Resource
	// readMedications caches each referenced Medication once read, so an
	// unreadable one is rejected once, however many orders point at it.
	readMedications map[string]readMedication
}

// Map reads in into facts. Problems with single resources never fail the
// call: each unusable resource is kept in Facts.Rejected with its reason.
func Map(in Input, rs *rules.Ruleset) rules.Facts {
	m := &mapper{
		in:              in,
		rs:              rs,
		facts:           rules.Facts{At: in.At, Labs: map[rules.Analyte][]rules.Measurement{}},
		seen:            map[seriesKey]string{},
		medications:     map[string]Resource{},
		readMedications: map[string]readMedication{},
	}
	m.patient()
	resources := m.distinct("resources", in.Resources)
	drafts := m.distinct("draftOrders", in.DraftOrders)
	for _, r := range append(resources, drafts...) {
		if r.Type == "Medication" {
			m.medications[r.Ref()] = r
		}
	}
	for _, r := range resources {
		switch r.Type {
		case "Observation":
			m.observation(r)
		case "MedicationRequest":
			if o, ok := m.medicationRequest(r); ok && o.Status == "active" {
				m.facts.Medications = append(m.facts.Medications, o)
			}
		case "Condition":
			m.condition(r)
		}
	}
	selected := map[string]bool{}
	for _, s := range in.Selections {
		selected[s] = true
	}
	for _, r := range drafts {
		if r.Type != "MedicationRequest" {
			continue
		}
		if o, ok := m.medicationRequest(r); ok {
			o.Draft = true
			o.Selected = in.Selections == nil || selected[o.Reference]
			m.facts.DraftOrders = append(m.facts.DraftOrders, o)
		}
	}
	for a, s := range m.facts.Labs {
		sort.SliceStable(s, func(i, j int) bool { return s[i].At.Before(s[j].At) })
		m.facts.Labs[a] = s
	}
	return m.facts
}

// distinct reads each raw resource of the named list once; values that are
// not FHIR resources are rejected.
func (m *mapper) distinct(list string, raws []json.RawMessage) []Resource {
	var out []Resource
	seen := map[string]bool{}
	for i, raw := range raws {
		r, err := ReadResource(raw)
		if err != nil {
			m.facts.Rejected = append(m.facts.Rejected, rules.Rejection{
				Source: fmt.Sprintf("%s[%d]", list, i), Reason: err.Error()})
			continue
		}
		if r.ID != "" {
			if seen[r.Ref()] {
				continue
			}
			seen[r.Ref()] = true
		}
		out = append(out, r)
	}
	return out
}

func (m *mapper) reject(r Resource, a rules.Analyte, reason string) {
	m.facts.Rejected = append(m.facts.Rejected, rules.Rejection{Source: r.Ref(), Analyte: a, Reason: reason})
}

func (m *mapper) note(format string, args ...any) {
	m.facts.Notes = append(m.facts.Notes, fmt.Sprintf(format, args...))
}

// patient reads the Patient. fhir-models rejects the whole resource on an
// unknown gender code, so the fields are read from the raw JSON instead.
func (m *mapper) patient() {
	m.facts.Patient.Reference = "Patient/" + m.in.PatientID
	if len(m.in.Patient) == 0 || string(m.in.Patient) == "null" {
		m.note("no Patient resource: age and sex are unknown")
		return
	}
	var p struct {
		ResourceType string  `json:"resourceType"`
		ID           string  `json:"id"`
		Gender       *string `json:"gender"`
		BirthDate    *string `json:"birthDate"`
	}
	if err := DecodeJSON(m.in.Patient, &p); err != nil || p.ResourceType != "Patient" {
		m.facts.Rejected = append(m.facts.Rejected, rules.Rejection{
			Source: m.facts.Patient.Reference, Reason: "not a readable Patient resource"})
		return
	}
	if p.ID != "" && p.ID != m.in.PatientID {
		m.facts.Rejected = append(m.facts.Rejected, rules.Rejection{
			Source: "Patient/" + p.ID, Reason: "Patient is not the patient in context"})
		return
	}
	switch g := rules.Sex(str(p.Gender)); g {
	case rules.SexMale, rules.SexFemale, rules.SexOther, rules.SexUnknown:
		m.facts.Patient.Sex = g
	case rules.SexMissing:
		m.note("Patient.gender is missing")
	default:
		m.note("Patient.gender %q is not an AdministrativeGender code; sex treated as not recorded", g)
	}
	if p.BirthDate == nil {
		m.note("Patient.birthDate is missing")
		return
	}
	b, err := parseDate(*p.BirthDate)
	if err != nil {
		m.note("Patient.birthDate: %v; age not computed", err)
		return
	}
	if b.After(m.in.At) {
		m.note("Patient.birthDate is after the evaluation time; age not computed")
		return
	}
	m.facts.Patient.BirthDate = &b
}
