package fhirmap

import (
	"encoding/json"
	"fmt"
	"strconv"
	"strings"
	"time"

	"github.com/halite-cds/halite/rules"
	fhir "github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// medicationRequestFields are the MedicationRequest elements halite reads,
// in fhir-models' types (see observationFields for why only these).
type medicationRequestFields struct {
	Status                    string                                 `json:"status"`
	Intent                    string                                 `json:"intent"`
	MedicationCodeableConcept fhir.CodeableConcept                   `json:"medicationCodeableConcept"`
	MedicationReference       fhir.Reference                         `json:"medicationReference"`
	Subject                   fhir.Reference                         `json:"subject"`
	AuthoredOn                *string                                `json:"authoredOn"`
	DosageInstruction         []fhir.Dosage                          `json:"dosageInstruction"`
	DispenseRequest           *fhir.MedicationRequestDispenseRequest `json:"dispenseRequest"`
	PriorPrescription         *fhir.Reference                        `json:"priorPrescription"`
}

// medicationRequest reads one MedicationRequest. fhir-models drops
// `contained`, so contained Medications are read from the raw JSON.
func (m *mapper) medicationRequest(r Resource) (rules.MedicationOrder, bool) {
	var mr medicationRequestFields
	err := DecodeJSON(r.Raw, &mr)
	if err != nil {
		m.reject(r, "", "invalid resource: "+err.Error())
		return rules.MedicationOrder{}, false
	}
	if mr.Status == "" {
		m.reject(r, "", "status is missing")
		return rules.MedicationOrder{}, false
	}
	if !m.refersToPatient(str(mr.Subject.Reference), r) { // subject is 1..1 in R4
		m.reject(r, "", "subject is not the patient in context")
		return rules.MedicationOrder{}, false
	}
	o := rules.MedicationOrder{Reference: r.Ref(), Status: mr.Status, Intent: mr.Intent}
	if mr.AuthoredOn != nil {
		if t, _, err := ParseDateTime(*mr.AuthoredOn); err == nil {
			o.AuthoredOn = &t
		} else {
			m.note("%s: authoredOn: %v", r.Ref(), err)
		}
	}
	o.Medication = m.medicationOf(r, mr.MedicationCodeableConcept, mr.MedicationReference)
	if len(mr.DosageInstruction) > 0 {
		for _, ignored := range dosage(&o, mr.DosageInstruction[0]) {
			m.note("%s: %s is not read", r.Ref(), ignored)
		}
		if len(mr.DosageInstruction) > 1 {
			m.note("%s: only the first of %d dosage instructions is read", r.Ref(), len(mr.DosageInstruction))
		}
	}
	if dr := mr.DispenseRequest; dr != nil {
		o.DispenseQuantity = quantity(dr.Quantity)
	}
	if p := mr.PriorPrescription; p != nil && p.Reference != nil {
		if t, err := m.refs.Resolve(*p.Reference, r); err == nil {
			o.Replaces = t.Ref()
		} else {
			o.Replaces = *p.Reference // not in the data: kept as written
		}
	}
	if len(mr.DosageInstruction) > 0 {
		if end := boundsEnd(mr.DosageInstruction[0]); end != "" {
			if t, hasTime, err := ParseDateTime(end); err == nil && hasTime {
				o.EndsAt = &t
			} else {
				m.note("%s: timing.repeat.boundsPeriod.end %q is not a date and time; no stop read from it", r.Ref(), end)
			}
		}
	}
	return o, true
}

// medicationOf reads what an order or administration is for: its
// medicationCodeableConcept cc, else its medicationReference mref.
func (m *mapper) medicationOf(r Resource, cc fhir.CodeableConcept, mref fhir.Reference) rules.Medication {
	if cs, text := codings(&cc); len(cs) > 0 || text != "" {
		return rules.Medication{Source: rules.FromCodeableConcept, Codings: cs, Text: text}
	}
	ref := str(mref.Reference)
	unresolved := rules.Medication{Source: rules.FromUnresolved, Text: str(mref.Display)}
	if ref == "" {
		return unresolved
	}
	t, err := m.refs.Resolve(ref, r)
	switch {
	case err != nil && strings.HasPrefix(ref, "#"):
		m.note("%s: contained Medication %s not found", r.Ref(), ref)
		return unresolved
	case err != nil:
		m.note("%s: medicationReference: %v", r.Ref(), err)
		return unresolved
	case t.Type != "Medication":
		m.note("%s: medicationReference is to a %s, not a Medication", r.Ref(), t.Type)
		return unresolved
	case t.Contained:
		med, ok := containedMedication(t.Resource.Raw)
		if !ok {
			m.note("%s: contained Medication %s is not readable", r.Ref(), ref)
			return unresolved
		}
		med.Source = rules.FromContained
		return med
	}
	if med, ok := m.referencedMedication(t.Ref()); ok {
		return med
	}
	if _, exists := m.medications[t.Ref()]; !exists {
		m.note("%s: Medication %s is not in the data", r.Ref(), ref)
	}
	return unresolved
}

// readMedication is a referenced Medication as read, or ok=false when it
// could not be read.
type readMedication struct {
	med rules.Medication
	ok  bool
}

// referencedMedication reads the Medication with reference ref once.
func (m *mapper) referencedMedication(ref string) (rules.Medication, bool) {
	if got, done := m.readMedications[ref]; done {
		return got.med, got.ok
	}
	res, exists := m.medications[ref]
	if !exists {
		return rules.Medication{}, false
	}
	var got readMedication
	var med fhir.Medication
	if err := DecodeJSON(res.Raw, &med); err != nil {
		m.reject(res, "", "invalid resource: "+err.Error())
	} else {
		got.med, got.ok = medication(med), true
		got.med.Source = rules.FromReferenced
	}
	m.readMedications[ref] = got
	return got.med, got.ok
}

// containedMedication reads a contained Medication.
func containedMedication(raw json.RawMessage) (rules.Medication, bool) {
	var med fhir.Medication
	if err := DecodeJSON(raw, &med); err != nil {
		return rules.Medication{}, false
	}
	return medication(med), true
}

func medication(med fhir.Medication) rules.Medication {
	cs, text := codings(med.Code)
	out := rules.Medication{Codings: cs, Text: text, Form: firstCode(med.Form)}
	for _, ing := range med.Ingredient {
		ics, itext := codings(&ing.ItemCodeableConcept)
		if len(ics) == 0 && itext == "" {
			itext = str(ing.ItemReference.Display)
		}
		in := rules.Ingredient{Codings: ics, Text: itext}
		if s := ing.Strength; s != nil {
			num, den := quantity(s.Numerator), quantity(s.Denominator)
			if num != nil && den != nil {
				in.Strength = &rules.Ratio{Numerator: *num, Denominator: *den}
			}
		}
		out.Ingredients = append(out.Ingredients, in)
	}
	return out
}

// dosage reads route, dose, rate and timing from the first dosage
// instruction, and names the forms it left unread so they can be noted.
func dosage(o *rules.MedicationOrder, d fhir.Dosage) (ignored []string) {
	o.Route, o.RouteText = codings(d.Route)
	if len(d.DoseAndRate) > 1 {
		ignored = append(ignored, "doseAndRate after the first")
	}
	if len(d.DoseAndRate) > 0 {
		dr := d.DoseAndRate[0]
		if dr.DoseRange != nil {
			ignored = append(ignored, "doseRange")
		}
		if dr.RateRange != nil {
			ignored = append(ignored, "rateRange")
		}
		o.Dose = quantity(dr.DoseQuantity)
		o.Rate, o.RateMlPerHour = rateOf(dr.RateQuantity, dr.RateRatio)
	}
	if d.Timing != nil && d.Timing.Repeat != nil {
		rep := d.Timing.Repeat
		if v, ok := number(rep.Duration); ok {
			o.Duration = &rules.Quantity{Value: v, Unit: str(rep.DurationUnit)}
		}
		o.Bounds = duration(rep.BoundsDuration)
		o.Frequency = rep.Frequency
		if v, ok := number(rep.Period); ok {
			o.Period = &rules.Quantity{Value: v, Unit: str(rep.PeriodUnit)}
		}
	}
	return ignored
}

// medicationAdministrationFields are the MedicationAdministration elements
// halite reads.
type medicationAdministrationFields struct {
	Status                    string                               `json:"status"`
	MedicationCodeableConcept fhir.CodeableConcept                 `json:"medicationCodeableConcept"`
	MedicationReference       fhir.Reference                       `json:"medicationReference"`
	Subject                   fhir.Reference                       `json:"subject"`
	Request                   *fhir.Reference                      `json:"request"`
	Dosage                    *fhir.MedicationAdministrationDosage `json:"dosage"`
	EffectiveDateTime         *string                              `json:"effectiveDateTime"`
	EffectivePeriod           *fhir.Period                         `json:"effectivePeriod"`
}

// medicationAdministration reads a MedicationAdministration: an in-progress
// one as an infusion running now, with its medication, route and rate (FHIR
// R4 MedicationAdministration.dosage.rate[x]); a completed one as a dose
// given, with its time (effectiveDateTime, or the start of effectivePeriod).
// It returns the order and the list it belongs to; none, with the reason
// counted, for another status, one that is not the patient's, or a given
// dose without a time.
func (m *mapper) medicationAdministration(r Resource) (rules.MedicationOrder, *[]rules.MedicationOrder) {
	var ma medicationAdministrationFields
	if err := DecodeJSON(r.Raw, &ma); err != nil {
		m.reject(r, "", "invalid resource: "+err.Error())
		return rules.MedicationOrder{}, nil
	}
	list := &m.facts.Infusing
	switch ma.Status {
	case "in-progress":
	case "completed":
		list = &m.facts.Given
	default:
		m.unused[[2]string{r.Type, fmt.Sprintf("status %q is neither in-progress nor completed", ma.Status)}]++
		return rules.MedicationOrder{}, nil
	}
	if !m.refersToPatient(str(ma.Subject.Reference), r) {
		m.reject(r, "", "subject is not the patient in context")
		return rules.MedicationOrder{}, nil
	}
	o := rules.MedicationOrder{Reference: r.Ref(), Status: ma.Status}
	if ma.Status == "completed" {
		at, err := givenAt(ma)
		if err != nil {
			m.reject(r, "", err.Error())
			return rules.MedicationOrder{}, nil
		}
		if at.After(m.in.At) {
			m.reject(r, "", "given after the evaluation time")
			return rules.MedicationOrder{}, nil
		}
		o.GivenAt = &at
	}
	o.Medication = m.medicationOf(r, ma.MedicationCodeableConcept, ma.MedicationReference)
	if ma.Request != nil && ma.Request.Reference != nil {
		if t, err := m.refs.Resolve(*ma.Request.Reference, r); err == nil {
			o.ForRequest = t.Ref()
		}
	}
	if d := ma.Dosage; d != nil {
		o.Route, o.RouteText = codings(d.Route)
		o.Dose = quantity(d.Dose)
		o.Rate, o.RateMlPerHour = rateOf(d.RateQuantity, d.RateRatio)
	}
	return o, list
}

// givenAt is when a completed administration was given: its
// effectiveDateTime, or the start of its effectivePeriod (the end when it
// has no start), as the search parameter effective-time sorts it; a full
// date and time is required.
func givenAt(ma medicationAdministrationFields) (time.Time, error) {
	var s string
	switch p := ma.EffectivePeriod; {
	case ma.EffectiveDateTime != nil:
		s = *ma.EffectiveDateTime
	case p != nil && p.Start != nil:
		s = *p.Start
	case p != nil && p.End != nil:
		s = *p.End
	default:
		return time.Time{}, fmt.Errorf("a completed administration has no effective time")
	}
	t, hasTime, err := ParseDateTime(s)
	if err != nil || !hasTime {
		return time.Time{}, fmt.Errorf("effective time %q is not a date and time", s)
	}
	return t, nil
}

// boundsEnd is the end of the first dosage's timing.repeat.boundsPeriod, if
// any: the time the order stops.
func boundsEnd(d fhir.Dosage) string {
	if d.Timing == nil || d.Timing.Repeat == nil || d.Timing.Repeat.BoundsPeriod == nil {
		return ""
	}
	return str(d.Timing.Repeat.BoundsPeriod.End)
}

func formatQuantity(q rules.Quantity) string {
	return strings.TrimSpace(strconv.FormatFloat(q.Value, 'f', -1, 64) + " " + q.Unit)
}

// rateOf reads a dosage's rate[x], as written and in mL/h when its units
// allow; empty and nil when neither form is given.
func rateOf(q *fhir.Quantity, ratio *fhir.Ratio) (string, *float64) {
	switch {
	case q != nil:
		if v := quantity(q); v != nil {
			return formatQuantity(*v), rateMlPerHour(v.Value, v.Unit)
		}
	case ratio != nil:
		return ratioRate(ratio)
	}
	return "", nil
}

// ratioRate reads a rate written as a ratio (100 mL per 1 h): as written,
// and in mL/h when its units allow.
func ratioRate(r *fhir.Ratio) (string, *float64) {
	num, den := quantity(r.Numerator), quantity(r.Denominator)
	if num == nil || den == nil || den.Value <= 0 {
		return "", nil
	}
	text := formatQuantity(*num) + " per " + formatQuantity(*den)
	if ml, ok := rules.VolumeMl(*num); ok {
		if h, ok := rules.DurationHours(*den); ok && h > 0 {
			v := ml / h
			return text, &v
		}
	}
	return text, nil
}

// rateMlPerHour normalises a rate written as a single UCUM quantity.
func rateMlPerHour(v float64, unit string) *float64 {
	var f float64
	switch unit {
	case "mL/h", "ml/h", "mL/hr":
		f = 1
	case "mL/min", "ml/min":
		f = 60
	case "L/h", "l/h":
		f = 1000
	case "mL/d", "ml/d", "mL/(24.h)":
		f = 1.0 / 24
	default:
		return nil
	}
	r := v * f
	return &r
}
