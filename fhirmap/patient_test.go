package fhirmap

import (
	"encoding/json"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/rules"
)

func date(y int, m time.Month, d int) *time.Time {
	t := time.Date(y, m, d, 0, 0, 0, 0, time.UTC)
	return &t
}

func TestMapPatient(t *testing.T) {
	tests := []struct {
		name      string
		raw       string // "" means no Patient
		wantSex   rules.Sex
		wantBirth *time.Time
		wantNote  string // substring of one note; "" means no note
		wantRej   *rules.Rejection
	}{
		{"male", `{"resourceType":"Patient","id":"p1","gender":"male","birthDate":"1980-11-20"}`,
			rules.SexMale, date(1980, 11, 20), "", nil},
		{"female", `{"resourceType":"Patient","id":"p1","gender":"female","birthDate":"1991-08-28"}`, // scenario 10's birth date
			rules.SexFemale, date(1991, 8, 28), "", nil},
		{"other", `{"resourceType":"Patient","id":"p1","gender":"other","birthDate":"1991-08-28"}`, // FHIR AdministrativeGender code
			rules.SexOther, date(1991, 8, 28), "", nil},
		{"unknown", `{"resourceType":"Patient","id":"p1","gender":"unknown","birthDate":"1991-08-28"}`, // FHIR AdministrativeGender code
			rules.SexUnknown, date(1991, 8, 28), "", nil},
		{"no id is accepted", `{"resourceType":"Patient","gender":"male","birthDate":"1980-11-20"}`,
			rules.SexMale, date(1980, 11, 20), "", nil},
		{"invalid gender f", `{"resourceType":"Patient","id":"p1","gender":"f","birthDate":"1970-06-15"}`, // scenario 07
			rules.SexMissing, date(1970, 6, 15), `Patient.gender "f" is not an AdministrativeGender code`, nil},
		{"gender case matters", `{"resourceType":"Patient","id":"p1","gender":"Male","birthDate":"1970-06-15"}`, // FHIR codes are case-sensitive
			rules.SexMissing, date(1970, 6, 15), `Patient.gender "Male" is not an AdministrativeGender code`, nil},
		{"missing gender", `{"resourceType":"Patient","id":"p1","birthDate":"1970-06-15"}`,
			rules.SexMissing, date(1970, 6, 15), "Patient.gender is missing", nil},
		{"missing birthDate", `{"resourceType":"Patient","id":"p1","gender":"male"}`,
			rules.SexMale, nil, "Patient.birthDate is missing", nil},
		{"partial birthDate year", `{"resourceType":"Patient","id":"p1","gender":"male","birthDate":"1970"}`,
			rules.SexMale, nil, `Patient.birthDate: "1970" is a partial date; age not computed`, nil},
		{"partial birthDate year-month", `{"resourceType":"Patient","id":"p1","gender":"male","birthDate":"1970-06"}`,
			rules.SexMale, nil, `"1970-06" is a partial date`, nil},
		{"impossible birthDate", `{"resourceType":"Patient","id":"p1","gender":"male","birthDate":"1970-02-30"}`,
			rules.SexMale, nil, `"1970-02-30" is not a FHIR date`, nil},
		{"birthDate after evaluation time", `{"resourceType":"Patient","id":"p1","gender":"female","birthDate":"2026-11-21"}`,
			rules.SexFemale, nil, "Patient.birthDate is after the evaluation time", nil},
		{"no Patient", "", rules.SexMissing, nil, "no Patient resource", nil},
		{"null Patient", "null", rules.SexMissing, nil, "no Patient resource", nil},
		{"other patient", `{"resourceType":"Patient","id":"p2","gender":"male","birthDate":"1980-11-20"}`,
			rules.SexMissing, nil, "", &rules.Rejection{Source: "Patient/p2", Reason: "Patient is not the patient in context"}},
		{"not a Patient", `{"resourceType":"Observation","id":"p1"}`,
			rules.SexMissing, nil, "", &rules.Rejection{Source: "Patient/p1", Reason: "not a readable Patient resource"}},
		{"gender not a string", `{"resourceType":"Patient","id":"p1","gender":1}`,
			rules.SexMissing, nil, "", &rules.Rejection{Source: "Patient/p1", Reason: "not a readable Patient resource"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			in := Input{At: testAt, PatientID: testPatient}
			if tt.raw != "" {
				in.Patient = json.RawMessage(tt.raw)
			}
			f := Map(in, ruleset(t))
			p := f.Patient
			if p.Reference != "Patient/p1" {
				t.Errorf("reference %q, want Patient/p1", p.Reference)
			}
			if p.Sex != tt.wantSex {
				t.Errorf("sex %q, want %q", p.Sex, tt.wantSex)
			}
			switch {
			case tt.wantBirth == nil && p.BirthDate != nil:
				t.Errorf("birth date %v, want nil", *p.BirthDate)
			case tt.wantBirth != nil && (p.BirthDate == nil || !p.BirthDate.Equal(*tt.wantBirth)):
				t.Errorf("birth date %v, want %v", p.BirthDate, *tt.wantBirth)
			}
			if tt.wantNote == "" && len(f.Notes) != 0 {
				t.Errorf("notes %q, want none", f.Notes)
			}
			if tt.wantNote != "" && !strings.Contains(strings.Join(f.Notes, "\n"), tt.wantNote) {
				t.Errorf("notes %q, want one containing %q", f.Notes, tt.wantNote)
			}
			if tt.wantRej == nil && len(f.Rejected) != 0 {
				t.Errorf("rejected %+v; a data-quality problem of the Patient is a note, not a failure", f.Rejected)
			}
			if tt.wantRej != nil && (len(f.Rejected) != 1 || f.Rejected[0] != *tt.wantRej) {
				t.Errorf("rejected %+v, want [%+v]", f.Rejected, *tt.wantRej)
			}
		})
	}
}

func TestMapPatientAge(t *testing.T) {
	// Scenario 10: born 1991-08-28, "woman 35 y" at 2026-11-20 (testdata/scenarios/README.md).
	f := Map(Input{At: testAt, PatientID: testPatient,
		Patient: json.RawMessage(`{"resourceType":"Patient","id":"p1","gender":"female","birthDate":"1991-08-28"}`)}, ruleset(t))
	if age, ok := f.Patient.AgeYears(f.At); !ok || age != 35 {
		t.Errorf("age %d, %v; want 35", age, ok)
	}
}
