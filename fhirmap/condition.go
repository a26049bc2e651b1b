package fhirmap

import (
	"fmt"
	"time"

	"github.com/halite-cds/halite/rules"
	fhir "github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// condition reads one Condition; only clinically active ones become facts.
func (m *mapper) condition(r Resource) {
	var c fhir.Condition
	err := DecodeJSON(r.Raw, &c)
	if err != nil {
		m.reject(r, "", "invalid resource: "+err.Error())
		return
	}
	if !m.refersToPatient(str(c.Subject.Reference), r) {
		m.reject(r, "", "subject is not the patient in context")
		return
	}
	cs, text := codings(c.Code)
	cond := rules.Condition{
		Reference:          r.Ref(),
		Codings:            cs,
		Text:               text,
		ClinicalStatus:     firstCode(c.ClinicalStatus),
		VerificationStatus: firstCode(c.VerificationStatus),
	}
	switch cond.ClinicalStatus {
	case "active", "recurrence", "relapse":
	default:
		m.unused[[2]string{r.Type, fmt.Sprintf("clinicalStatus %q is not active", cond.ClinicalStatus)}]++
		return
	}
	if cond.VerificationStatus == "refuted" || cond.VerificationStatus == "entered-in-error" {
		m.unused[[2]string{r.Type, fmt.Sprintf("verificationStatus is %q", cond.VerificationStatus)}]++
		return
	}
	cond.Onset = conditionOnset(c)
	m.facts.Conditions = append(m.facts.Conditions, cond)
}

// conditionOnset is when a condition began as the resource says it:
// onsetDateTime or onsetPeriod.start, else recordedDate; nil when neither
// is a readable date (a date alone is midnight UTC).
func conditionOnset(c fhir.Condition) *time.Time {
	var s *string
	switch {
	case c.OnsetDateTime != nil:
		s = c.OnsetDateTime
	case c.OnsetPeriod != nil && c.OnsetPeriod.Start != nil:
		s = c.OnsetPeriod.Start
	default:
		s = c.RecordedDate
	}
	if s == nil {
		return nil
	}
	t, _, err := ParseDateTime(*s)
	if err != nil {
		return nil
	}
	return &t
}
