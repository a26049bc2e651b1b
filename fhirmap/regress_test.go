package fhirmap

import (
	"encoding/json"
	"strings"
	"testing"

	"github.com/halite-cds/halite/rules"
)

// Regression tests for defects found in review.

func TestDuplicateKeyCenturiesApart(t *testing.T) {
	// Two instants whose UnixNano values collide (int64 wrap-around) are
	// distinct results, not duplicates. 140 mmol/L: invented normal value.
	f := Map(Input{At: testAt, PatientID: testPatient, Entries: raws(
		obsSpec{id: "a", effective: dt("1000-01-01T00:00:00Z")}.raw(),
		obsSpec{id: "b", effective: dt("1584-07-21T23:34:33.709551616Z")}.raw(),
	)}, ruleset(t))
	if len(f.Labs[rules.Sodium]) != 2 || len(f.Rejected) != 0 {
		t.Errorf("series %d, rejected %+v; want both results kept", len(f.Labs[rules.Sodium]), f.Rejected)
	}
}

func TestUnreadCodeNeverRejected(t *testing.T) {
	// LOINC 718-7 (haemoglobin) is not read by halite; a bad status in it is
	// none of halite's business.
	f := mapResources(t, obsSpec{id: "hb", code: "718-7", status: "done"}.raw())
	if len(f.Rejected) != 0 {
		t.Errorf("rejected %+v; an Observation halite does not read must be skipped silently", f.Rejected)
	}
}

func TestNullStatusIsMissing(t *testing.T) {
	raw := json.RawMessage(strings.Replace(string(obsSpec{id: "n"}.raw()), `"status":"final"`, `"status":null`, 1))
	f := mapResources(t, raw)
	if len(f.Rejected) != 1 || f.Rejected[0].Reason != "status is missing" {
		t.Errorf("rejected %+v, want one \"status is missing\"", f.Rejected)
	}
}

func TestBirthDateAsDateTime(t *testing.T) {
	f := Map(Input{At: testAt, PatientID: testPatient,
		Patient: json.RawMessage(`{"resourceType":"Patient","id":"p1","gender":"male","birthDate":"1970-01-01T00:00:00Z"}`)},
		ruleset(t))
	if f.Patient.BirthDate != nil || len(f.Notes) != 1 || !strings.Contains(f.Notes[0], "dateTime, not a date") {
		t.Errorf("birth date %v, notes %v", f.Patient.BirthDate, f.Notes)
	}
}

func TestUnreadableReferencedMedicationRejectedOnce(t *testing.T) {
	med := json.RawMessage(`{"resourceType":"Medication","id":"bad","code":"not-a-codeable-concept"}`)
	order := func(id string) json.RawMessage {
		return json.RawMessage(`{"resourceType":"MedicationRequest","id":"` + id + `","status":"active","intent":"order",` +
			`"subject":{"reference":"Patient/p1"},"medicationReference":{"reference":"Medication/bad","display":"shown name"}}`)
	}
	f := mapResources(t, med, order("o1"), order("o2"))
	if len(f.Rejected) != 1 || f.Rejected[0].Source != "Medication/bad" {
		t.Errorf("rejected %+v, want Medication/bad once", f.Rejected)
	}
	for _, o := range f.Medications {
		if o.Medication.Source != rules.FromUnresolved || o.Medication.Text != "shown name" {
			t.Errorf("%s: medication %+v, want unresolved with its display text", o.Reference, o.Medication)
		}
	}
}

func TestGreekMuMicromole(t *testing.T) {
	// LOINC 14682-9 creatinine in µmol/L, written with U+03BC; 80 µmol/L is
	// an invented value.
	f := mapResources(t, obsSpec{id: "cr", code: "14682-9", value: vq("80", "μmol/L")}.raw())
	if s := f.Labs[rules.Creatinine]; len(s) != 1 || s[0].Value != 80 {
		t.Errorf("creatinine %+v, rejected %+v", s, f.Rejected)
	}
}

func TestMedicationRequestWithoutSubjectRejected(t *testing.T) {
	// MedicationRequest.subject is 1..1 in FHIR R4.
	f := mapResources(t, json.RawMessage(`{"resourceType":"MedicationRequest","id":"ns","status":"active","intent":"order",`+
		`"medicationCodeableConcept":{"text":"invented drug"}}`))
	if len(f.Medications) != 0 || len(f.Rejected) != 1 || f.Rejected[0].Source != "MedicationRequest/ns" {
		t.Errorf("medications %+v rejected %+v", f.Medications, f.Rejected)
	}
}

func TestUnreadDosageFormsAreNoted(t *testing.T) {
	raw := json.RawMessage(`{"resourceType":"MedicationRequest","id":"r","status":"active","intent":"order",` +
		`"subject":{"reference":"Patient/p1"},"medicationCodeableConcept":{"text":"invented drug"},` +
		`"dosageInstruction":[{"doseAndRate":[{"doseRange":{"low":{"value":1,"code":"mg"}},` +
		`"rateRange":{"low":{"value":1,"code":"mL/h"}}},{"doseQuantity":{"value":2,"code":"mg"}}]}]}`)
	f := mapResources(t, raw)
	notes := strings.Join(f.Notes, "\n")
	for _, want := range []string{"doseAndRate after the first", "doseRange", "rateRange"} {
		if !strings.Contains(notes, want) {
			t.Errorf("notes %q lack %q", notes, want)
		}
	}
	if len(f.Medications) != 1 || f.Medications[0].Frequency != nil || f.Medications[0].Dose != nil {
		t.Errorf("an absent frequency or dose must stay absent: %+v", f.Medications)
	}
}
