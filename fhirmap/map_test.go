package fhirmap

import (
	"encoding/json"
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/rules"
)

func TestMapObservationStatus(t *testing.T) {
	tests := []struct {
		status     string
		wantReason string // "" means accepted
	}{
		{"final", ""},     // usable statuses: final, amended, corrected (FHIR ObservationStatus; halite policy in observation.go)
		{"amended", ""},   // as above
		{"corrected", ""}, // as above
		{"preliminary", `status "preliminary" is not final, amended or corrected`},
		{"registered", `status "registered" is not final, amended or corrected`},
		{"cancelled", `status "cancelled" is not final, amended or corrected`},
		{"entered-in-error", `status "entered-in-error" is not final, amended or corrected`},
		{"unknown", `status "unknown" is not final, amended or corrected`},
		{omit, "status is missing"},
	}
	for _, tt := range tests {
		t.Run(tt.status, func(t *testing.T) {
			f := mapResources(t, obsSpec{id: "na", status: tt.status}.raw())
			if tt.wantReason == "" {
				if len(f.Rejected) != 0 {
					t.Fatalf("rejected: %+v", f.Rejected)
				}
				if got := f.Labs[rules.Sodium]; len(got) != 1 || got[0].Value != 140 { // obsSpec default 140 mmol/L
					t.Fatalf("sodium series %+v, want one value 140", got)
				}
				return
			}
			if len(f.Labs[rules.Sodium]) != 0 {
				t.Errorf("sodium series %+v, want none", f.Labs[rules.Sodium])
			}
			want := rules.Rejection{Source: "Observation/na", Analyte: rules.Sodium, Reason: tt.wantReason}
			if len(f.Rejected) != 1 || f.Rejected[0] != want {
				t.Errorf("rejected %+v, want [%+v]", f.Rejected, want)
			}
		})
	}
}

func TestMapObservationRejections(t *testing.T) {
	tests := []struct {
		name       string
		spec       obsSpec
		wantReason string // exact, or a prefix when wantPrefix
		wantPrefix bool
	}{
		{"other patient", obsSpec{subject: "Patient/p2"}, "subject is not the patient in context", false},
		{"absolute ref to other patient", obsSpec{subject: "http://example.org/fhir/Patient/p11"}, "subject is not the patient in context", false},
		{"no subject", obsSpec{subject: omit}, "subject is not the patient in context", false},
		{"date-only effective", obsSpec{effective: dt("2026-11-19")}, `effective time "2026-11-19" has no time of day`, false},
		{"year-month effective", obsSpec{effective: dt("2026-11")}, `effective time "2026-11" has no time of day`, false},
		{"time without zone", obsSpec{effective: dt("2026-11-20T06:00:00")}, `effective time: "2026-11-20T06:00:00" is not a FHIR dateTime`, false},
		{"no effective time", obsSpec{effective: omit}, "no effective time", false},
		// testAt is 08:00Z; 08:00:01Z is one second later.
		{"after evaluation time", obsSpec{effective: dt("2026-11-20T08:00:01Z")}, "effective time is after the evaluation time", false},
		// 09:30+01:00 is 08:30Z, after 08:00Z.
		{"after evaluation time, offset", obsSpec{effective: dt("2026-11-20T09:30:00+01:00")}, "effective time is after the evaluation time", false},
		{"comparator <", obsSpec{value: `"valueQuantity":{"value":100,"comparator":"<","unit":"mmol/L","system":"http://unitsofmeasure.org","code":"mmol/L"}`}, `value has comparator "<"`, false},
		{"comparator >=", obsSpec{value: `"valueQuantity":{"value":180,"comparator":">=","unit":"mmol/L","system":"http://unitsofmeasure.org","code":"mmol/L"}`}, `value has comparator ">="`, false},
		{"valueString", obsSpec{value: `"valueString":"129 mmol/L (see comment)"`}, "no valueQuantity", false}, // text of scenario 07
		{"no value", obsSpec{value: omit}, "no valueQuantity", false},
		{"quantity without number", obsSpec{value: `"valueQuantity":{"unit":"mmol/L","system":"http://unitsofmeasure.org","code":"mmol/L"}`}, "valueQuantity has no numeric value", false},
		// 1400 mmol/L: scenario 07's implausible sodium; policy bounds 90–200 mmol/L (rules/data/policy.json, common practice).
		{"implausible high", obsSpec{value: vq("1400", "mmol/L")}, "implausible value 1400 mmol/L (accepted range 90–200)", false},
		// 89 mmol/L: just under the policy minimum 90 (rules/data/policy.json, common practice).
		{"implausible low", obsSpec{value: vq("89", "mmol/L")}, "implausible value 89 mmol/L (accepted range 90–200)", false},
		{"negative", obsSpec{value: vq("-140", "mmol/L")}, "implausible value -140 mmol/L", true},
		{"mg/dL for sodium", obsSpec{value: vq("140", "mg/dL")}, `unit "mg/dL" is not one halite converts for sodium`, false},
		{"mmol/dL", obsSpec{value: vq("12.9", "mmol/dL")}, `unit "mmol/dL" is not one halite converts for sodium`, false}, // scenario 07
		{"empty unit", obsSpec{value: `"valueQuantity":{"value":140}`}, "no unit", false},
		{"non-UCUM system uses unit text", obsSpec{value: `"valueQuantity":{"value":140,"unit":"mmol/dL","system":"http://example.org/units","code":"mmol/L"}`}, `unit "mmol/dL" is not one halite converts for sodium`, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			tt.spec.id = "na-x"
			f := mapResources(t, tt.spec.raw())
			if len(f.Labs[rules.Sodium]) != 0 {
				t.Errorf("sodium series %+v, want none", f.Labs[rules.Sodium])
			}
			if len(f.Rejected) != 1 {
				t.Fatalf("rejected %+v, want one", f.Rejected)
			}
			r := f.Rejected[0]
			if r.Source != "Observation/na-x" || r.Analyte != rules.Sodium {
				t.Errorf("rejection source/analyte %q/%q, want Observation/na-x/sodium", r.Source, r.Analyte)
			}
			if tt.wantPrefix && !strings.HasPrefix(r.Reason, tt.wantReason) || !tt.wantPrefix && r.Reason != tt.wantReason {
				t.Errorf("reason %q, want %q", r.Reason, tt.wantReason)
			}
		})
	}
}

func TestMapObservationAccepted(t *testing.T) {
	tests := []struct {
		name         string
		spec         obsSpec
		analyte      rules.Analyte
		want         float64
		tol          float64
		wantAt       time.Time
		wantSpecimen string
		wantOriginal string
	}{
		{
			name:    "effectiveDateTime",
			spec:    obsSpec{code: "2951-2", effective: dt("2026-11-20T06:00:00Z"), value: vq("136", "meq/L")},
			analyte: rules.Sodium, want: 136, tol: 0, // meq/L = mmol/L for Na+ (UCUM)
			wantAt: time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC), wantSpecimen: "serum or plasma",
			wantOriginal: "136 meq/L",
		},
		{
			name:    "effectiveInstant with +05:30",
			spec:    obsSpec{code: "2345-7", effective: `"effectiveInstant":"2026-11-20T10:15:00.000+05:30"`, value: vq("612", "mg/dL")},
			analyte: rules.Glucose, want: 33.97, tol: 0.005, // 612×10/180.156 (IUPAC molar mass)
			wantAt: time.Date(2026, 11, 20, 4, 45, 0, 0, time.UTC), wantSpecimen: "serum or plasma", // 10:15+05:30 = 04:45Z
			wantOriginal: "612 mg/dL",
		},
		{
			name:    "effectivePeriod start",
			spec:    obsSpec{code: "2947-0", effective: `"effectivePeriod":{"start":"2026-11-19T21:00:00-05:00","end":"2026-11-19T23:00:00-05:00"}`, value: vq("138", "mmol/L")},
			analyte: rules.Sodium, want: 138, tol: 0, // identity (UCUM)
			wantAt: time.Date(2026, 11, 20, 2, 0, 0, 0, time.UTC), wantSpecimen: "blood", // 21:00-05:00 = 02:00Z next day
			wantOriginal: "138 mmol/L",
		},
		{
			name:    "effectivePeriod end only",
			spec:    obsSpec{code: "2951-2", effective: `"effectivePeriod":{"end":"2026-11-20T03:00:00Z"}`, value: vq("131", "mmol/L")},
			analyte: rules.Sodium, want: 131, tol: 0, // identity (UCUM)
			wantAt: time.Date(2026, 11, 20, 3, 0, 0, 0, time.UTC), wantSpecimen: "serum or plasma",
			wantOriginal: "131 mmol/L",
		},
		{
			name:    "exactly at evaluation time",
			spec:    obsSpec{code: "2951-2", effective: dt("2026-11-20T08:00:00Z")},
			analyte: rules.Sodium, want: 140, tol: 0, // obsSpec default 140 mmol/L
			wantAt: testAt, wantSpecimen: "serum or plasma",
			wantOriginal: "140 mmol/L",
		},
		{
			name:    "value text kept as sent",
			spec:    obsSpec{code: "2951-2", value: vq("136.0", "meq/L")},
			analyte: rules.Sodium, want: 136, tol: 0, // meq/L = mmol/L (UCUM)
			wantAt: time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC), wantSpecimen: "serum or plasma",
			wantOriginal: "136.0 meq/L",
		},
		{
			name:    "unit text only, synonym",
			spec:    obsSpec{code: "2951-2", value: `"valueQuantity":{"value":136,"unit":"mEq/L"}`},
			analyte: rules.Sodium, want: 136, tol: 0, // meq/L = mmol/L (UCUM)
			wantAt: time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC), wantSpecimen: "serum or plasma",
			wantOriginal: "136 mEq/L",
		},
		{
			name:    "absolute subject reference",
			spec:    obsSpec{code: "2951-2", subject: "http://example.org/fhir/Patient/p1"},
			analyte: rules.Sodium, want: 140, tol: 0, // obsSpec default
			wantAt: time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC), wantSpecimen: "serum or plasma",
			wantOriginal: "140 mmol/L",
		},
		{
			name:    "weight in [lb_av]",
			spec:    obsSpec{code: "29463-7", value: vq("145.5", "[lb_av]")},
			analyte: rules.BodyWeight, want: 65.9977, tol: 0.00005, // UCUM: 1 [lb_av] = 0.45359237 kg
			wantAt: time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC), wantSpecimen: "",
			wantOriginal: "145.5 [lb_av]",
		},
		{
			name:    "urine sodium is not serum sodium",
			spec:    obsSpec{code: "2955-3", value: vq("25", "mmol/L")},
			analyte: rules.UrineSodium, want: 25, tol: 0, // identity (UCUM)
			wantAt: time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC), wantSpecimen: "urine",
			wantOriginal: "25 mmol/L",
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			tt.spec.id = "o1"
			f := mapResources(t, tt.spec.raw())
			if len(f.Rejected) != 0 {
				t.Fatalf("rejected %+v", f.Rejected)
			}
			s := f.Labs[tt.analyte]
			if len(s) != 1 {
				t.Fatalf("%s series %+v, want one", tt.analyte, s)
			}
			for a, other := range f.Labs {
				if a != tt.analyte && len(other) != 0 {
					t.Errorf("unexpected %s series %+v", a, other)
				}
			}
			m := s[0]
			if !near(m.Value, tt.want, tt.tol) {
				t.Errorf("value %v, want %v ± %g", m.Value, tt.want, tt.tol)
			}
			if !m.At.Equal(tt.wantAt) {
				t.Errorf("at %v, want %v", m.At, tt.wantAt)
			}
			if m.Analyte != tt.analyte || m.Source != "Observation/o1" || m.Code != tt.spec.code || m.Specimen != tt.wantSpecimen {
				t.Errorf("measurement %+v, want analyte %s source Observation/o1 code %s specimen %q", m, tt.analyte, tt.spec.code, tt.wantSpecimen)
			}
			if m.Original != tt.wantOriginal {
				t.Errorf("original %q, want %q", m.Original, tt.wantOriginal)
			}
		})
	}
}

func TestMapUnknownCodeIgnored(t *testing.T) {
	tests := []struct {
		name string
		spec obsSpec
	}{
		// 718-7 is hemoglobin in blood (LOINC, from memory); halite does not read it.
		{"unknown LOINC", obsSpec{code: "718-7", value: vq("13.5", "g/dL")}},
		{"unknown LOINC, other patient, no status", obsSpec{code: "718-7", status: omit, subject: "Patient/p2"}},
		{"sodium code in another system", obsSpec{system: "http://snomed.info/sct", code: "2951-2"}},
		{"no system", obsSpec{system: omit, code: "2951-2"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			tt.spec.id = "x"
			f := mapResources(t, tt.spec.raw())
			if len(f.Rejected) != 0 {
				t.Errorf("rejected %+v, want none", f.Rejected)
			}
			if !slices.Contains(f.Notes, "1 × Observation not used: no code halite reads") {
				t.Errorf("notes %q, want the Observation counted", f.Notes)
			}
			for a, s := range f.Labs {
				if len(s) != 0 {
					t.Errorf("%s series %+v, want none", a, s)
				}
			}
		})
	}
}

func TestMapSecondCodingRecognised(t *testing.T) {
	raw := `{"resourceType":"Observation","id":"k","status":"final",
	 "code":{"coding":[{"system":"http://example.org/local","code":"NA"},{"system":"http://loinc.org","code":"718-7"},{"system":"http://loinc.org","code":"2823-3"}]},
	 "subject":{"reference":"Patient/p1"},"effectiveDateTime":"2026-11-20T05:00:00Z",
	 "valueQuantity":{"value":3.3,"unit":"mmol/L","system":"http://unitsofmeasure.org","code":"mmol/L"}}`
	f := mapResources(t, json.RawMessage(raw))
	s := f.Labs[rules.Potassium]
	// 3.3 mmol/L: scenario 01's low potassium (testdata/scenarios/README.md); 2823-3 is serum potassium (codes.go).
	if len(s) != 1 || s[0].Value != 3.3 || s[0].Code != "2823-3" {
		t.Fatalf("potassium series %+v, want one 3.3 by 2823-3", s)
	}
}

// tiedNa is the rejection of sodium result loser, tied with stand.
func tiedNa(loser, stand, values string) rules.Rejection {
	return rules.Rejection{Source: "Observation/" + loser, Analyte: rules.Sodium, Reason: "differs from Observation/" + stand +
		" at the same time (" + values + " mmol/L) and neither ranks higher; Observation/" + stand +
		" stands for both, and each figure counts the value on its safer side"}
}

func TestMapDuplicates(t *testing.T) {
	a := obsSpec{id: "a", effective: dt("2026-11-20T02:00:00Z"), value: vq("128", "mmol/L")}.raw()
	// Same instant as a (03:00+01:00 = 02:00Z) and the same value, 128 meq/L = 128 mmol/L (UCUM).
	b := obsSpec{id: "b", effective: dt("2026-11-20T03:00:00+01:00"), value: vq("128", "meq/L")}.raw()
	// Same time, different value: not a duplicate.
	c := obsSpec{id: "c", effective: dt("2026-11-20T02:00:00Z"), value: vq("129", "mmol/L")}.raw()
	// Same time and value, other analyte (urine sodium 2955-3, plausible 0–500
	// mmol/L per rules/data/policy.json): not a duplicate.
	d := obsSpec{id: "d", code: "2955-3", effective: dt("2026-11-20T02:00:00Z"), value: vq("128", "mmol/L")}.raw()

	tests := []struct {
		name         string
		in           []json.RawMessage
		wantSources  []string // sodium series sources, oldest first
		wantRejected []rules.Rejection
	}{
		{"different id", []json.RawMessage{a, b}, []string{"Observation/a"},
			[]rules.Rejection{{Source: "Observation/b", Analyte: rules.Sodium, Reason: "duplicate of Observation/a"}}},
		{"reversed", []json.RawMessage{b, a}, []string{"Observation/b"},
			[]rules.Rejection{{Source: "Observation/a", Analyte: rules.Sodium, Reason: "duplicate of Observation/b"}}},
		{"same resource twice is read once", []json.RawMessage{a, a}, []string{"Observation/a"}, nil},
		// A different value at the same time is a conflict, not a change
		// (rules.SameTimePolicy): 128 stands, being farther from 140.
		{"same resource in overlapping searches", []json.RawMessage{a, c, a, c}, []string{"Observation/a"}, []rules.Rejection{tiedNa("c", "a", "129 vs 128")}},
		{"different value", []json.RawMessage{c, a}, []string{"Observation/a"}, []rules.Rejection{tiedNa("c", "a", "129 vs 128")}},
		{"other analyte", []json.RawMessage{a, d}, []string{"Observation/a"}, nil},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			f := mapResources(t, tt.in...)
			var got []string
			for _, m := range f.Labs[rules.Sodium] {
				got = append(got, m.Source)
			}
			if strings.Join(got, ",") != strings.Join(tt.wantSources, ",") {
				t.Errorf("sodium sources %v, want %v", got, tt.wantSources)
			}
			if len(f.Rejected) != len(tt.wantRejected) {
				t.Fatalf("rejected %+v, want %+v", f.Rejected, tt.wantRejected)
			}
			for i := range tt.wantRejected {
				if f.Rejected[i] != tt.wantRejected[i] {
					t.Errorf("rejected[%d] %+v, want %+v", i, f.Rejected[i], tt.wantRejected[i])
				}
			}
		})
	}
}

func TestMapSeriesSortedAcrossZones(t *testing.T) {
	// Sodium values are invented; times are given out of order with mixed
	// offsets. As instants: n3 = 2026-11-18T23:00Z, n1 = 2026-11-19T04:30Z,
	// n4 = 2026-11-19T05:00Z, n2 = 2026-11-20T01:00Z.
	in := []json.RawMessage{
		obsSpec{id: "n1", effective: dt("2026-11-19T10:00:00+05:30"), value: vq("121", "mmol/L")}.raw(),
		obsSpec{id: "n2", effective: dt("2026-11-19T20:00:00-05:00"), value: vq("124", "mmol/L")}.raw(),
		obsSpec{id: "n3", effective: dt("2026-11-19T00:00:00+01:00"), value: vq("118", "mmol/L")}.raw(),
		obsSpec{id: "n4", effective: dt("2026-11-19T05:00:00Z"), value: vq("122", "mmol/L")}.raw(),
		// Weight between the sodium values must not disturb their order.
		obsSpec{id: "w", code: "29463-7", effective: dt("2026-11-19T12:00:00Z"), value: vq("62", "kg")}.raw(),
	}
	f := mapResources(t, in...)
	if len(f.Rejected) != 0 {
		t.Fatalf("rejected %+v", f.Rejected)
	}
	want := []struct {
		src string
		at  time.Time
		v   float64
	}{
		{"Observation/n3", time.Date(2026, 11, 18, 23, 0, 0, 0, time.UTC), 118},
		{"Observation/n1", time.Date(2026, 11, 19, 4, 30, 0, 0, time.UTC), 121},
		{"Observation/n4", time.Date(2026, 11, 19, 5, 0, 0, 0, time.UTC), 122},
		{"Observation/n2", time.Date(2026, 11, 20, 1, 0, 0, 0, time.UTC), 124},
	}
	s := f.Labs[rules.Sodium]
	if len(s) != len(want) {
		t.Fatalf("sodium series %+v, want %d values", s, len(want))
	}
	for i, w := range want {
		if s[i].Source != w.src || !s[i].At.Equal(w.at) || s[i].Value != w.v {
			t.Errorf("sodium[%d] = %s %v %v, want %s %v %v", i, s[i].Source, s[i].At, s[i].Value, w.src, w.at, w.v)
		}
	}
	if w := f.Labs[rules.BodyWeight]; len(w) != 1 || w[0].Value != 62 { // invented weight, kg
		t.Errorf("weight series %+v, want one 62 kg", w)
	}
}

func TestMapNonResources(t *testing.T) {
	tests := []struct {
		name string
		raw  string
	}{
		{"number", `42`},
		{"empty object", `{}`},
		{"string", `"Observation"`},
		{"array", `[]`},
		{"null", `null`},
		{"empty resourceType", `{"resourceType":""}`},
		{"resourceType not a string", `{"resourceType":7}`},
		{"truncated", `{"resourceType":"Observation"`},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			good := obsSpec{id: "ok"}.raw()
			in := Input{At: testAt, PatientID: testPatient,
				Entries:      raws(json.RawMessage(tt.raw), good),
				DraftEntries: raws(json.RawMessage(tt.raw))}
			f := Map(in, ruleset(t))
			if len(f.Rejected) != 2 {
				t.Fatalf("rejected %+v, want two (one per list)", f.Rejected)
			}
			for i, want := range []string{"resources[0]", "draftOrders[0]"} {
				r := f.Rejected[i]
				if r.Source != want || !strings.HasPrefix(r.Reason, "not a FHIR resource") {
					t.Errorf("rejection %+v, want source %q and reason \"not a FHIR resource…\"", r, want)
				}
			}
			if s := f.Labs[rules.Sodium]; len(s) != 1 || s[0].Source != "Observation/ok" {
				t.Errorf("the good observation next to it was not read: %+v", s)
			}
		})
	}
}

func TestMapInvalidResourceRejected(t *testing.T) {
	tests := []struct {
		name   string
		raw    string
		source string
		prefix string
	}{
		{"observation with invalid status code", `{"resourceType":"Observation","id":"bad","status":"done","code":{"coding":[{"system":"http://loinc.org","code":"2951-2"}]}}`,
			"Observation/bad", "invalid resource: "},
		{"observation with wrong JSON type", `{"resourceType":"Observation","id":"bad2","status":"final","code":"2951-2"}`,
			"Observation/bad2", "invalid resource: "},
		{"condition with wrong JSON type", `{"resourceType":"Condition","id":"c","subject":"Patient/p1"}`,
			"Condition/c", "invalid resource: "},
		{"medication request with wrong JSON type", `{"resourceType":"MedicationRequest","id":"m","status":"active","intent":"order","dosageInstruction":{}}`,
			"MedicationRequest/m", "invalid resource: "},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			f := mapResources(t, json.RawMessage(tt.raw))
			if len(f.Rejected) != 1 || f.Rejected[0].Source != tt.source || !strings.HasPrefix(f.Rejected[0].Reason, tt.prefix) {
				t.Errorf("rejected %+v, want one from %s with reason %q…", f.Rejected, tt.source, tt.prefix)
			}
		})
	}
}

// TestMapDefectOutsideReadElements: a sodium result whose interpretation
// is malformed (an object where FHIR R4 §Observation has an array of
// CodeableConcept) is still read, since halite reads only status, code,
// subject, effective[x] and valueQuantity; the same defect in code refuses
// it. Likewise a MedicationRequest with a malformed note (an object where
// §MedicationRequest has an array of Annotation) is read.
func TestMapDefectOutsideReadElements(t *testing.T) {
	head := `{"resourceType":"Observation","id":"o1","status":"final","subject":{"reference":"Patient/` + testPatient + `"},` +
		`"effectiveDateTime":"2026-11-19T08:00:00Z","valueQuantity":{"value":131,"unit":"mmol/L","system":"http://unitsofmeasure.org","code":"mmol/L"},`
	sodium := `"code":{"coding":[{"system":"http://loinc.org","code":"2951-2"}]}`
	f := mapResources(t, json.RawMessage(head+sodium+`,"interpretation":{"text":"low"}}`))
	if s := f.Labs[rules.Sodium]; len(s) != 1 || s[0].Value != 131 || len(f.Rejected) != 0 {
		t.Errorf("labs %+v, rejected %+v; want the 131 mmol/L result read", f.Labs, f.Rejected)
	}
	f = mapResources(t, json.RawMessage(head+`"code":{"coding":{"system":"http://loinc.org","code":"2951-2"}}}`))
	if len(f.Rejected) != 1 || !strings.HasPrefix(f.Rejected[0].Reason, "invalid resource: ") {
		t.Errorf("rejected %+v, want one invalid resource", f.Rejected)
	}
	f = mapResources(t, mr("m1", "active", nsConcept+`,"note":{"text":"given with food"}`))
	if len(f.Medications) != 1 || len(f.Rejected) != 0 {
		t.Errorf("medications %+v, rejected %+v; want the active order read", f.Medications, f.Rejected)
	}
}

func TestMapOtherResourceTypesIgnored(t *testing.T) {
	// A Device (as in scenario 07) and a Patient among the search results are
	// not read, and counted by type.
	f := mapResources(t,
		json.RawMessage(`{"resourceType":"Device","id":"pump","status":"active","patient":{"reference":"Patient/p1"}}`),
		json.RawMessage(`{"resourceType":"Patient","id":"p2","gender":"male"}`))
	want := []rules.Rejection{{Source: "1 × Device", Reason: "resource type not read by halite"},
		{Source: "1 × Patient", Reason: "resource type not read by halite"}}
	if !reflect.DeepEqual(f.Rejected, want) || len(f.Medications) != 0 || len(f.Conditions) != 0 || len(f.DraftOrders) != 0 {
		t.Errorf("facts %+v, want nothing read and the types counted", f)
	}
}
