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
	// PatientFullURL is the fullUrl of the Patient's Bundle entry, if any.
	PatientFullURL string
	// Server is the call's fhirServer: references on it, or relative ones
	// to resources the data lacks, name resources by their Type/id.
	Server string
	// Entries are the search results, with the fullUrls references are
	// resolved against: Observations, MedicationRequests, Conditions and the
	// Medications they reference. A resource that appears more than once
	// (overlapping searches) is read once.
	Entries []BundleEntry
	// DraftEntries are the entries of context.draftOrders.
	DraftEntries []BundleEntry
	// Selections are order-select's selected references ("MedicationRequest/1");
	// nil means every draft order is evaluated (order-sign).
	Selections []string
	// Codes are the result codes read; nil means the built-in LOINC table.
	Codes *Codes
}

type mapper struct {
	in    Input
	rs    *rules.Ruleset
	codes *Codes
	facts rules.Facts
	refs  *References
	// medications indexes Medication resources by "Medication/id".
	medications map[string]Resource
	// readMedications caches each referenced Medication once read, so an
	// unreadable one is rejected once, however many orders point at it.
	readMedications map[string]readMedication
	// unused counts resources not used for a reason that would flood the
	// report if given per resource, by type and reason.
	unused map[[2]string]int
}

// Map reads in into facts. Problems with single resources never fail the
// call: each unusable resource is kept in Facts.Rejected with its reason.
func Map(in Input, rs *rules.Ruleset) rules.Facts {
	m := &mapper{
		in:              in,
		rs:              rs,
		codes:           in.Codes,
		facts:           rules.Facts{At: in.At, Labs: map[rules.Analyte][]rules.Measurement{}},
		medications:     map[string]Resource{},
		readMedications: map[string]readMedication{},
		unused:          map[[2]string]int{},
	}
	if m.codes == nil {
		m.codes = BuiltinCodes()
	}
	resources := m.distinct("resources", in.Entries)
	unreadCodes := 0
	drafts := m.distinct("draftOrders", in.DraftEntries)
	all := append(append([]Resource(nil), resources...), drafts...)
	if p, err := ReadEntry(BundleEntry{FullURL: in.PatientFullURL, Resource: in.Patient}); err == nil {
		all = append(all, p)
	}
	m.refs = NewReferences(in.Server, all)
	m.patient()
	for _, r := range all {
		if r.Type == "Medication" {
			m.medications[r.Ref()] = r
		}
	}
	for _, r := range resources {
		switch r.Type {
		case "Observation":
			before := len(m.facts.Rejected) + m.labCount()
			m.observation(r)
			if len(m.facts.Rejected)+m.labCount() == before {
				unreadCodes++
			}
		case "MedicationRequest":
			if o, ok := m.medicationRequest(r); ok && o.Status == "active" {
				m.facts.Medications = append(m.facts.Medications, o)
			} else if ok {
				m.unused[[2]string{r.Type, fmt.Sprintf("status %q is not active", o.Status)}]++
			}
		case "Condition":
			m.condition(r)
		case "Procedure":
			m.procedure(r)
		case "MedicationAdministration":
			if o, list := m.medicationAdministration(r); list != nil {
				*list = append(*list, o)
			}
		case "Medication":
		default:
			m.unused[[2]string{r.Type, "resource type not read by halite"}]++
		}
	}
	selected := map[string]bool{}
	for _, s := range in.Selections {
		selected[s] = true
	}
	for _, r := range drafts {
		switch r.Type {
		case "MedicationRequest":
		case "NutritionOrder":
			if n, ok := m.nutritionOrder(r); ok {
				n.Selected = in.Selections == nil || selected[n.Reference]
				m.facts.DraftNutrition = append(m.facts.DraftNutrition, n)
			}
			continue
		case "Medication":
			continue // read when an order references it
		default:
			m.unused[[2]string{r.Type, "draft order type not read by halite"}]++
			continue
		}
		if o, ok := m.medicationRequest(r); ok {
			o.Draft = true
			o.Selected = in.Selections == nil || selected[o.Reference]
			m.facts.DraftOrders = append(m.facts.DraftOrders, o)
		}
	}
	for ref, r := range m.medications {
		if _, read := m.readMedications[ref]; !read {
			m.unused[[2]string{r.Type, "no order read references it"}]++
		}
	}
	m.reportUnused()
	if unreadCodes > 0 {
		// A note, not a rejection: nothing is wrong with such a result.
		m.note("%d × Observation %s", unreadCodes, noteUnreadCode)
	}
	m.resolveSameTime()
	return m.facts
}

// resolveSameTime orders each series by time and settles results taken at
// the same time with differing values, by the policy (rules.SameTimePolicy).
func (m *mapper) resolveSameTime() {
	for _, a := range rules.Analytes() {
		s := m.facts.Labs[a]
		if len(s) == 0 {
			continue
		}
		sort.SliceStable(s, func(i, j int) bool {
			return s[i].At.Before(s[j].At) || s[i].At.Equal(s[j].At) && s[i].PeriodHours < s[j].PeriodHours
		})
		kept, rejected, notes := rules.ResolveSameTime(s, m.rs.Policy().SameTime)
		m.facts.Labs[a] = kept
		m.facts.Rejected = append(m.facts.Rejected, rejected...)
		m.facts.Notes = append(m.facts.Notes, notes...)
	}
}

// noteUnreadCode ends the note counting Observations whose code halite
// does not read.
const noteUnreadCode = "not used: no code halite reads"

// labCount is the number of results used so far.
func (m *mapper) labCount() int {
	n := 0
	for _, s := range m.facts.Labs {
		n += len(s)
	}
	return n
}

// reportUnused adds one rejection per type and reason counted in unused,
// with the count as its Source ("12 × Encounter"), in a stable order.
func (m *mapper) reportUnused() {
	keys := make([][2]string, 0, len(m.unused))
	for k := range m.unused {
		keys = append(keys, k)
	}
	sort.Slice(keys, func(i, j int) bool {
		return keys[i][0] < keys[j][0] || keys[i][0] == keys[j][0] && keys[i][1] < keys[j][1]
	})
	for _, k := range keys {
		m.facts.Rejected = append(m.facts.Rejected, rules.Rejection{
			Source: fmt.Sprintf("%d × %s", m.unused[k], k[0]), Reason: k[1]})
	}
}

// refersToPatient reports whether ref, written in r, is the patient in context.
func (m *mapper) refersToPatient(ref string, r Resource) bool {
	return m.refs.RefersToPatient(ref, r, m.in.PatientID)
}

// distinct reads each entry of the named list once; values that are not
// FHIR resources are rejected.
func (m *mapper) distinct(list string, entries []BundleEntry) []Resource {
	var out []Resource
	seen := map[string]bool{}
	for i, e := range entries {
		r, err := ReadEntry(e)
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
	if p.ID == "" {
		p.ID = urnID(m.in.PatientFullURL)
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
