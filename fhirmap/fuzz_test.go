package fhirmap

import (
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"sort"
	"testing"
	"time"

	"github.com/halite-cds/halite/rules"
)

// fuzzSeeds are small hand-written bundles for patient p1.
var fuzzSeeds = []string{
	`{"resourceType":"Bundle","type":"searchset","entry":[
	  {"resource":{"resourceType":"Patient","id":"p1","gender":"female","birthDate":"1980-11-20"}},
	  {"resource":{"resourceType":"Observation","id":"a","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2951-2"}]},"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2026-11-20T06:00:00Z","valueQuantity":{"value":128,"unit":"mmol/L","system":"http://unitsofmeasure.org","code":"mmol/L"}}},
	  {"resource":{"resourceType":"Observation","id":"b","status":"amended","code":{"coding":[{"system":"http://loinc.org","code":"2345-7"}]},"subject":{"reference":"Patient/p1"},"effectiveInstant":"2026-11-20T05:00:00+05:30","valueQuantity":{"value":612,"unit":"mg/dL","system":"http://unitsofmeasure.org","code":"mg/dL"}}},
	  {"resource":{"resourceType":"Observation","id":"c","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"29463-7"}]},"subject":{"reference":"Patient/p1"},"effectivePeriod":{"end":"2026-11-19T06:00:00-05:00"},"valueQuantity":{"value":145.5,"unit":"lb","system":"http://unitsofmeasure.org","code":"[lb_av]"}}}]}`,
	`{"resourceType":"Bundle","entry":[
	  {"resource":{"resourceType":"MedicationRequest","id":"m","status":"draft","intent":"order","subject":{"reference":"Patient/p1"},
	   "contained":[{"resourceType":"Medication","id":"med1","ingredient":[{"itemCodeableConcept":{"text":"NaCl"},"strength":{"numerator":{"value":3,"code":"g"},"denominator":{"value":100,"code":"mL"}}}]}],
	   "medicationReference":{"reference":"#med1"},
	   "dosageInstruction":[{"timing":{"repeat":{"duration":20,"durationUnit":"min","boundsDuration":{"value":8,"code":"h"},"frequency":2,"period":1,"periodUnit":"d"}},
	     "doseAndRate":[{"rateRatio":{"numerator":{"value":1,"code":"L"},"denominator":{"value":8,"code":"h"}}}]}],
	   "dispenseRequest":{"quantity":{"value":500,"code":"mL"}}}},
	  {"resource":{"resourceType":"MedicationRequest","id":"n","status":"active","intent":"order","subject":{"reference":"Patient/p1"},"medicationReference":{"reference":"Medication/x","display":"x"},
	   "dosageInstruction":[{"doseAndRate":[{"rateQuantity":{"value":2,"code":"mL/min"}}]}]}},
	  {"resource":{"resourceType":"Medication","id":"x","code":{"text":"3% saline"}}},
	  {"resource":{"resourceType":"Condition","id":"c","subject":{"reference":"Patient/p1"},"clinicalStatus":{"coding":[{"code":"active"}]},"code":{"text":"hyponatremia"}}}]}`,
	`{"resourceType":"Bundle","type":"collection","link":[{"relation":"next","url":"x"}],"entry":[{"resource":42},{"resource":{}},{"fullUrl":"u"},{"resource":null}]}`,
	`{"resourceType":"Bundle","entry":[{"resource":{"resourceType":"Observation","id":"d","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2160-0"}]},"subject":{"reference":"Patient/p1"},"effectiveDateTime":"2026-11-20","valueQuantity":{"value":1.0,"comparator":"<","code":"mg/dL"}}}]}`,
}

var fuzzAt = time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC) // scenario evaluation time (testdata/scenarios/README.md)

func FuzzMap(f *testing.F) {
	files, err := filepath.Glob("../testdata/scenarios/*.json")
	if err != nil {
		f.Fatal(err)
	}
	if len(files) == 0 {
		f.Fatal("no scenario files found")
	}
	for _, p := range files {
		data, err := os.ReadFile(p)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(data)
	}
	for _, s := range fuzzSeeds {
		f.Add([]byte(s))
	}
	rs := ruleset(f)
	bounds := rs.Policy().Plausibility
	f.Fuzz(func(t *testing.T, data []byte) {
		b, err := ParseBundle(data)
		if err != nil {
			return
		}
		var all []json.RawMessage
		var patient json.RawMessage
		for _, e := range b.Entries {
			all = append(all, e.Resource)
			if r, err := ReadResource(e.Resource); err == nil && r.Type == "Patient" && patient == nil {
				patient = e.Resource
			}
		}
		in := Input{At: fuzzAt, PatientID: "p1", Patient: patient, Entries: raws(all...), DraftEntries: raws(all...)}
		facts := Map(in, rs)
		for a, s := range facts.Labs {
			bd, ok := bounds[a]
			if !ok {
				t.Fatalf("series for %s, which has no plausibility bounds", a)
			}
			for _, m := range s {
				if m.Analyte != a {
					t.Errorf("measurement %+v in the %s series", m, a)
				}
				if math.IsNaN(m.Value) || m.Value < bd.Min || m.Value > bd.Max {
					t.Errorf("%s value %v outside plausibility bounds %v–%v (%s)", a, m.Value, bd.Min, bd.Max, m.Source)
				}
				if m.At.After(in.At) {
					t.Errorf("%s at %v is after the evaluation time %v (%s)", a, m.At, in.At, m.Source)
				}
			}
			if !sort.SliceIsSorted(s, func(i, j int) bool { return s[i].At.Before(s[j].At) }) {
				t.Errorf("%s series not oldest first", a)
			}
		}
		for _, o := range facts.DraftOrders {
			if !o.Draft || !o.Selected {
				t.Errorf("draft order %s: draft %v selected %v, want both (nil selections)", o.Reference, o.Draft, o.Selected)
			}
		}
		for _, o := range facts.Medications {
			if o.Status != "active" || o.Draft {
				t.Errorf("medication %s: status %q draft %v", o.Reference, o.Status, o.Draft)
			}
		}
	})
}

func FuzzParseDateTime(f *testing.F) {
	for _, s := range []string{
		"2026-11-20T08:00:00Z", "2026-11-20T08:00:00.123+05:30", "2026-11-20T08:00:00-05:00",
		"2026-11-20", "2026-11", "2026", "2026-11-20T08:00:00", "", "0000", "9999-12-31T23:59:59.999999999Z",
	} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		got, hasTime, err := ParseDateTime(s)
		if err != nil {
			if hasTime || !got.IsZero() {
				t.Errorf("ParseDateTime(%q) = %v, %v with error %v", s, got, hasTime, err)
			}
			return
		}
		want, rerr := time.Parse(time.RFC3339, s)
		if hasTime {
			if rerr != nil {
				t.Fatalf("ParseDateTime(%q) has a time but RFC 3339 parsing fails: %v", s, rerr)
			}
			if !got.Equal(want) {
				t.Errorf("ParseDateTime(%q) = %v, RFC 3339 gives %v", s, got, want)
			}
			return
		}
		if rerr == nil {
			t.Errorf("ParseDateTime(%q) says no time of day, but it is an RFC 3339 time", s)
		}
		if n := len(s); n != 4 && n != 7 && n != 10 {
			t.Errorf("ParseDateTime(%q) accepted a date of length %d; FHIR date forms are 4, 7 or 10 characters", s, n)
		}
		if got.Location() != time.UTC || got.Hour() != 0 || got.Minute() != 0 || got.Second() != 0 || got.Nanosecond() != 0 {
			t.Errorf("ParseDateTime(%q) = %v, want UTC midnight", s, got)
		}
	})
}

// FuzzReadLocalCodes: a site's codes file never panics the reader, and a
// table it accepts answers lookups.
func FuzzReadLocalCodes(f *testing.F) {
	f.Add([]byte(`{"codes":[{"system":"http://lab.example.org/codes","code":"NA","analyte":"sodium","unit":"mmol/L","specimen":"serum","origin":"laboratory"}]}`))
	f.Add([]byte(`{"codes":[{"system":"lab","code":""}]}`))
	f.Add([]byte("\xef\xbb\xbf{\"codes\":[]}"))
	f.Fuzz(func(t *testing.T, data []byte) {
		codes, err := ReadLocalCodes(data)
		if err != nil {
			return
		}
		for _, a := range rules.Analytes() {
			codes.SearchTokens(a)
		}
	})
}
