package fhirmap

import (
	"fmt"
	"time"

	"github.com/halite-cds/halite/rules"
	fhir "github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// usableStatus lists the Observation statuses whose values halite uses.
var usableStatus = map[fhir.ObservationStatus]bool{
	fhir.ObservationStatusFinal:     true,
	fhir.ObservationStatusAmended:   true,
	fhir.ObservationStatusCorrected: true,
}

// observationFields are the Observation elements halite reads, in
// fhir-models' types so that each is validated as fhir.Observation would
// validate it. Decoding only these is the point: the other elements of a
// result (interpretation, referenceRange, notes…) are skipped rather than
// built and thrown away, and a defect in one of them does not cost a value
// halite can read. Status is a pointer so that a missing status is seen as
// missing, not as the enum's zero value.
type observationFields struct {
	Status            *fhir.ObservationStatus `json:"status"`
	Code              fhir.CodeableConcept    `json:"code"`
	Subject           *fhir.Reference         `json:"subject"`
	EffectiveDateTime *string                 `json:"effectiveDateTime"`
	EffectivePeriod   *fhir.Period            `json:"effectivePeriod"`
	EffectiveInstant  *string                 `json:"effectiveInstant"`
	Issued            *string                 `json:"issued"`
	ValueQuantity     *fhir.Quantity          `json:"valueQuantity"`
}

// observation maps one Observation. One whose code halite does not read is
// skipped without a rejection, so that an error in a resource halite does
// not use is not reported against it. The resource is decoded once; only
// when that fails is its status and code head read again to tell whether
// halite reads it and why it is refused.
func (m *mapper) observation(r Resource) {
	var obs observationFields
	if err := DecodeJSON(r.Raw, &obs); err != nil {
		m.unreadableObservation(r, err)
		return
	}
	code, meas, localUnit, known := recognise(m.codes, obs.Code)
	if !known {
		return
	}
	a := meas.analyte
	if obs.Status == nil {
		m.reject(r, a, "status is missing")
		return
	}
	if !usableStatus[*obs.Status] {
		m.reject(r, a, fmt.Sprintf("status %q is not final, amended or corrected", obs.Status.Code()))
		return
	}
	if obs.Subject == nil || !m.refersToPatient(str(obs.Subject.Reference), r) {
		m.reject(r, a, "subject is not the patient in context")
		return
	}
	at, err := effectiveTime(obs)
	if err != nil {
		m.reject(r, a, err.Error())
		return
	}
	var periodHours float64
	if a == rules.UrineVolume {
		if at, periodHours, err = collectionPeriod(obs); err != nil {
			m.reject(r, a, err.Error())
			return
		}
	}
	if at.After(m.in.At) {
		m.reject(r, a, "effective time is after the evaluation time")
		return
	}
	q := obs.ValueQuantity
	if q == nil {
		m.reject(r, a, "no valueQuantity")
		return
	}
	if q.Comparator != nil {
		m.reject(r, a, fmt.Sprintf("value has comparator %q", q.Comparator.Code()))
		return
	}
	v, ok := number(q.Value)
	if !ok {
		m.reject(r, a, "valueQuantity has no numeric value")
		return
	}
	unit := ucumUnit(q.System, q.Code, q.Unit)
	if unit == "" {
		unit = localUnit // the site declared its code's unit
	}
	cv, err := toCanonical(meas, v, unit)
	if err != nil {
		m.reject(r, a, err.Error())
		return
	}
	if ok, why := m.rs.CheckPlausible(a, cv); !ok {
		m.reject(r, a, why)
		return
	}
	m.facts.Labs[a] = append(m.facts.Labs[a], rules.Measurement{
		Analyte:     a,
		Value:       cv,
		At:          at,
		Source:      r.Ref(),
		Code:        code,
		Specimen:    meas.specimen,
		Original:    q.Value.String() + " " + unit,
		Origin:      meas.origin,
		PeriodHours: periodHours,
		Status:      obs.Status.Code(),
		Issued:      issuedTime(obs.Issued),
	})
}

// issuedTime is Observation.issued, or nil when it is absent or not a
// full date and time (it only ranks results taken at one time).
func issuedTime(s *string) *time.Time {
	if s == nil {
		return nil
	}
	t, hasTime, err := ParseDateTime(*s)
	if err != nil || !hasTime {
		return nil
	}
	return &t
}

// observationStatusAndCode is the part of an Observation read again when
// the whole did not decode: whether halite reads its code, and whether it
// has a status.
type observationStatusAndCode struct {
	Status *string              `json:"status"`
	Code   fhir.CodeableConcept `json:"code"`
}

func observationHead(r Resource) (observationStatusAndCode, error) {
	var head observationStatusAndCode
	err := DecodeJSON(r.Raw, &head)
	return head, err
}

// unreadableObservation reports an Observation that did not decode
// (decodeErr), if halite reads its code: a missing status first, as for a
// readable one, else the decoding error.
func (m *mapper) unreadableObservation(r Resource, decodeErr error) {
	head, err := observationHead(r)
	if err != nil {
		m.reject(r, "", "invalid resource: "+err.Error())
		return
	}
	_, meas, _, known := recognise(m.codes, head.Code)
	if !known {
		return
	}
	if head.Status == nil {
		m.reject(r, meas.analyte, "status is missing")
		return
	}
	m.reject(r, meas.analyte, "invalid resource: "+decodeErr.Error())
}

// recognise finds the first coding of cc that codes reads, a LOINC code
// before a site's local one. It returns the code as Measurement.Code holds
// it, how it maps, and the unit a result without one is read in.
func recognise(codes *Codes, cc fhir.CodeableConcept) (string, measure, string, bool) {
	for _, loincFirst := range []bool{true, false} {
		for _, c := range cc.Coding {
			sys := str(c.System)
			if c.Code == nil || (sys == SystemLOINC) != loincFirst {
				continue
			}
			if m, unit, ok := codes.lookup(sys, *c.Code); ok {
				if sys == SystemLOINC {
					return *c.Code, m, unit, true
				}
				return sys + "|" + *c.Code, m, unit, true
			}
		}
	}
	return "", measure{}, "", false
}

// collectionPeriod is a urine volume's collection period: its end, and its
// length in hours, from effectivePeriod (both ends with a time of day). A
// volume without one is refused: its rate cannot be known.
func collectionPeriod(o observationFields) (time.Time, float64, error) {
	p := o.EffectivePeriod
	if p == nil || p.Start == nil || p.End == nil {
		return time.Time{}, 0, fmt.Errorf("a urine volume needs its collection period (effectivePeriod with start and end)")
	}
	start, startTime, err1 := ParseDateTime(*p.Start)
	end, endTime, err2 := ParseDateTime(*p.End)
	switch {
	case err1 != nil || err2 != nil || !startTime || !endTime:
		return time.Time{}, 0, fmt.Errorf("effectivePeriod %q to %q: a collection period needs two dates with times", *p.Start, *p.End)
	case !end.After(start):
		return time.Time{}, 0, fmt.Errorf("effectivePeriod ends at or before it starts")
	}
	return end, end.Sub(start).Hours(), nil
}

// effectiveTime is the clinically relevant time: effectiveDateTime,
// effectiveInstant, or the start (else the end) of effectivePeriod. It must
// carry a time of day, since rates of change are computed from it.
func effectiveTime(o observationFields) (time.Time, error) {
	var s string
	switch {
	case o.EffectiveDateTime != nil:
		s = *o.EffectiveDateTime
	case o.EffectiveInstant != nil:
		s = *o.EffectiveInstant
	case o.EffectivePeriod != nil && o.EffectivePeriod.Start != nil:
		s = *o.EffectivePeriod.Start
	case o.EffectivePeriod != nil && o.EffectivePeriod.End != nil:
		s = *o.EffectivePeriod.End
	default:
		return time.Time{}, fmt.Errorf("no effective time")
	}
	t, hasTime, err := ParseDateTime(s)
	if err != nil {
		return time.Time{}, fmt.Errorf("effective time: %v", err)
	}
	if !hasTime {
		return time.Time{}, fmt.Errorf("effective time %q has no time of day", s)
	}
	return t, nil
}
