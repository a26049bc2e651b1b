package fhirmap

import (
	"fmt"

	"github.com/halite-cds/halite/rules"
	"github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// procedure maps a completed Procedure of the patient with a performed
// time; others are counted as unused with their reason.
func (m *mapper) procedure(r Resource) {
	var p fhir.Procedure
	if err := DecodeJSON(r.Raw, &p); err != nil {
		m.reject(r, "", "invalid resource: "+err.Error())
		return
	}
	if !m.refersToPatient(str(p.Subject.Reference), r) {
		m.reject(r, "", "subject is not the patient in context")
		return
	}
	if st := p.Status.Code(); st != "completed" {
		m.unused[[2]string{r.Type, fmt.Sprintf("status %q is not completed", st)}]++
		return
	}
	var when string
	switch {
	case p.PerformedDateTime != nil:
		when = *p.PerformedDateTime
	case p.PerformedPeriod != nil && p.PerformedPeriod.Start != nil:
		when = *p.PerformedPeriod.Start
	case p.PerformedPeriod != nil && p.PerformedPeriod.End != nil:
		when = *p.PerformedPeriod.End
	default:
		m.unused[[2]string{r.Type, "no performed time"}]++
		return
	}
	at, _, err := ParseDateTime(when)
	if err != nil {
		m.reject(r, "", "performed time: "+err.Error())
		return
	}
	cs, text := codings(p.Code)
	m.facts.Procedures = append(m.facts.Procedures, rules.Procedure{Reference: r.Ref(), Codings: cs, Text: text, At: at})
}
