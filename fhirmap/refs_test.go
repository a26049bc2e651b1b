package fhirmap

import (
	"encoding/json"
	"errors"
	"testing"

	"github.com/halite-cds/halite/rules"
)

// refEntries are the invented entries the resolver tests resolve against.
func refEntries(t testing.TB) []Resource {
	t.Helper()
	var out []Resource
	for _, e := range []BundleEntry{
		{FullURL: "http://example.org/fhir/Patient/p1", Resource: json.RawMessage(`{"resourceType":"Patient","id":"p1"}`)},
		{FullURL: "urn:uuid:9d2c4e1a-0b7f-4f1e-8c3a-5b6d7e8f9a01", Resource: json.RawMessage(`{"resourceType":"Patient"}`)},
		{FullURL: "urn:oid:1.2.3.4.5", Resource: json.RawMessage(`{"resourceType":"Medication","id":"m-oid"}`)},
		{Resource: json.RawMessage(`{"resourceType":"Medication","id":"m-bare"}`)},
		{FullURL: "http://example.org/fhir/Observation/o1", Resource: json.RawMessage(
			`{"resourceType":"Observation","id":"o1","contained":[{"resourceType":"Medication","id":"c1"}]}`)},
		{FullURL: "urn:uuid:0a1b2c3d-0000-4000-8000-000000000001", Resource: json.RawMessage(`{"resourceType":"Observation","id":"o2"}`)},
	} {
		r, err := ReadEntry(e)
		if err != nil {
			t.Fatal(err)
		}
		out = append(out, r)
	}
	return out
}

func TestResolve(t *testing.T) {
	rs := refEntries(t)
	restful, urnObs := rs[4], rs[5]
	tests := []struct {
		name      string
		server    string
		ref       string
		from      Resource
		want      string // Type/id; "" means unresolved
		held      bool
		contained bool
	}{
		{"relative", "", "Patient/p1", urnObs, "Patient/p1", true, false},
		{"relative with version", "", "Patient/p1/_history/3", urnObs, "Patient/p1", true, false},
		{"relative against the referrer's absolute fullUrl", "", "Patient/p1", restful, "Patient/p1", true, false},
		{"relative, not in the data", "", "Patient/p9", restful, "Patient/p9", false, false},
		{"absolute, an entry's fullUrl", "", "http://example.org/fhir/Patient/p1", urnObs, "Patient/p1", true, false},
		{"absolute with _history", "", "http://example.org/fhir/Patient/p1/_history/2", urnObs, "Patient/p1", true, false},
		{"absolute on fhirServer, not in the data", "https://ehr.example.com/r4/", "https://ehr.example.com/r4/Patient/p9", urnObs, "Patient/p9", false, false},
		{"absolute on fhirServer, held without fullUrl", "https://ehr.example.com/r4", "https://ehr.example.com/r4/Medication/m-bare", urnObs, "Medication/m-bare", true, false},
		{"urn:uuid of an entry without id", "", "urn:uuid:9d2c4e1a-0b7f-4f1e-8c3a-5b6d7e8f9a01", urnObs, "Patient/9d2c4e1a-0b7f-4f1e-8c3a-5b6d7e8f9a01", true, false},
		{"urn:oid", "", "urn:oid:1.2.3.4.5", urnObs, "Medication/m-oid", true, false},
		{"contained", "", "#c1", restful, "Medication/c1", true, true},
		{"unresolvable: absolute on another server", "", "http://other.example.net/fhir/Patient/p1", urnObs, "", false, false},
		{"unresolvable: urn:uuid not in the data", "", "urn:uuid:00000000-0000-4000-8000-000000000000", urnObs, "", false, false},
		{"unresolvable: contained id not there", "", "#c2", restful, "", false, false},
		{"unresolvable: conditional reference", "", "Patient?identifier=x|1", urnObs, "", false, false},
		{"unresolvable: empty", "", "", urnObs, "", false, false},
		{"unresolvable: not a type", "", "patient/p1", urnObs, "", false, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := NewReferences(tt.server, rs).Resolve(tt.ref, tt.from)
			if tt.want == "" {
				if !errors.Is(err, ErrUnresolved) {
					t.Errorf("got %+v, %v; want ErrUnresolved with a reason", got, err)
				}
				return
			}
			if err != nil || got.Ref() != tt.want || got.Held() != tt.held || got.Contained != tt.contained {
				t.Errorf("got %s held %v contained %v, %v; want %s held %v contained %v",
					got.Ref(), got.Held(), got.Contained, err, tt.want, tt.held, tt.contained)
			}
		})
	}
}

func TestRefersToPatient(t *testing.T) {
	rs := refEntries(t)
	x := NewReferences("", rs)
	from := rs[5]
	for _, tt := range []struct {
		ref, patient string
		want         bool
	}{
		{"urn:uuid:9d2c4e1a-0b7f-4f1e-8c3a-5b6d7e8f9a01", "9d2c4e1a-0b7f-4f1e-8c3a-5b6d7e8f9a01", true},
		{"urn:uuid:9d2c4e1a-0b7f-4f1e-8c3a-5b6d7e8f9a01", "p1", false},
		{"http://example.org/fhir/Patient/p1", "p1", true},
		{"Patient/p1", "p1", true},
		{"Patient/p1", "", false},
		{"Group/p1", "p1", false},
	} {
		if got := x.RefersToPatient(tt.ref, from, tt.patient); got != tt.want {
			t.Errorf("RefersToPatient(%q, %q) = %v, want %v", tt.ref, tt.patient, got, tt.want)
		}
	}
}

// FuzzResolve checks that the resolver never panics, and that what it
// resolves is a Type/id with a held resource where it says so.
func FuzzResolve(f *testing.F) {
	for _, s := range [][2]string{
		{"Patient/p1", ""}, {"Patient/p1/_history/1", "http://example.org/fhir/Observation/o1"},
		{"http://example.org/fhir/Patient/p1/_history/2", ""}, {"urn:uuid:9d2c4e1a-0b7f-4f1e-8c3a-5b6d7e8f9a01", ""},
		{"urn:oid:1.2.3.4.5", ""}, {"#c1", "http://example.org/fhir/Observation/o1"}, {"#", ""},
		{"http://x/Patient/", ""}, {"://", "://"}, {"a/b/c/d/_history/", "http:///"}, {"Patient?identifier=a|b", ""},
	} {
		f.Add(s[0], s[1])
	}
	rs := refEntries(f)
	x := NewReferences("https://ehr.example.com/r4", rs)
	f.Fuzz(func(t *testing.T, ref, fullURL string) {
		from := rs[4]
		from.FullURL = fullURL
		got, err := x.Resolve(ref, from)
		if err != nil {
			if !errors.Is(err, ErrUnresolved) {
				t.Fatalf("error %v does not wrap ErrUnresolved", err)
			}
			return
		}
		if !typePattern.MatchString(got.Type) {
			t.Fatalf("resolved %q to type %q", ref, got.Type)
		}
		if got.Held() && (got.Resource.Type != got.Type || got.Resource.ID != got.ID) {
			t.Fatalf("resolved %q to %s holding %s", ref, got.Ref(), got.Resource.Ref())
		}
		again, err := x.Resolve(ref, from)
		if err != nil || again.Ref() != got.Ref() {
			t.Fatalf("resolving %q twice gave %s and %s (%v)", ref, got.Ref(), again.Ref(), err)
		}
	})
}

// TestMapURNReferences reads a transaction Bundle's shape: the Patient
// known only by its urn:uuid fullUrl, subjects and a medicationReference as
// urn:uuid, an Encounter counted as not read.
func TestMapURNReferences(t *testing.T) {
	const pt = "urn:uuid:9d2c4e1a-0b7f-4f1e-8c3a-5b6d7e8f9a01"
	const ptID = "9d2c4e1a-0b7f-4f1e-8c3a-5b6d7e8f9a01"
	obs := func(id, subject, at string) json.RawMessage {
		return json.RawMessage(`{"resourceType":"Observation","id":"` + id + `","status":"final",
		 "code":{"coding":[{"system":"http://loinc.org","code":"2951-2"}]},"subject":{"reference":"` + subject + `"},
		 "effectiveDateTime":"` + at + `","valueQuantity":{"value":128,"unit":"mmol/L","system":"http://unitsofmeasure.org","code":"mmol/L"}}`)
	}
	draft := json.RawMessage(`{"resourceType":"MedicationRequest","id":"d1","status":"draft","intent":"order",
	 "subject":{"reference":"` + pt + `"},"medicationReference":{"reference":"urn:uuid:0a1b2c3d-0000-4000-8000-0000000000aa"}}`)
	med := json.RawMessage(`{"resourceType":"Medication",` + med3pct + `}`)
	for _, tt := range []struct {
		name      string
		patientID string
		wantLabs  int
		wantOther int // rejected as not the patient in context
	}{
		{"the patient in context", ptID, 2, 0},
		{"another patient in context", "p-other", 0, 3},
	} {
		t.Run(tt.name, func(t *testing.T) {
			f := Map(Input{At: testAt, PatientID: tt.patientID,
				Patient: json.RawMessage(`{"resourceType":"Patient","gender":"female"}`), PatientFullURL: pt,
				Entries: []BundleEntry{
					{FullURL: "urn:uuid:0a1b2c3d-0000-4000-8000-000000000001", Resource: obs("na1", pt, "2026-11-20T02:00:00Z")},
					{FullURL: "urn:uuid:0a1b2c3d-0000-4000-8000-000000000002", Resource: obs("na2", "Patient/"+ptID, "2026-11-20T06:00:00Z")},
					{FullURL: "urn:uuid:0a1b2c3d-0000-4000-8000-000000000003", Resource: json.RawMessage(
						`{"resourceType":"Encounter","id":"e1","status":"finished","subject":{"reference":"` + pt + `"}}`)},
				},
				DraftEntries: []BundleEntry{
					{FullURL: "urn:uuid:0a1b2c3d-0000-4000-8000-0000000000d1", Resource: draft},
					{FullURL: "urn:uuid:0a1b2c3d-0000-4000-8000-0000000000aa", Resource: med},
				}}, ruleset(t))
			other := 0
			for _, r := range f.Rejected {
				if r.Reason == "subject is not the patient in context" {
					other++
				}
			}
			if len(f.Labs["sodium"]) != tt.wantLabs || other != tt.wantOther {
				t.Errorf("sodium %d, %d not the patient; want %d, %d: %+v", len(f.Labs["sodium"]), other, tt.wantLabs, tt.wantOther, f.Rejected)
			}
			counts := DropCounts(f)
			if counts[DropTypeNotRead] != 1 {
				t.Errorf("drop counts %v, want the Encounter as type-not-read", counts)
			}
			if tt.wantOther == 0 {
				if len(f.DraftOrders) != 1 || f.DraftOrders[0].Medication.Source != rules.FromReferenced || len(f.DraftOrders[0].Medication.Ingredients) != 1 {
					t.Errorf("drafts %+v, want one with its urn:uuid Medication read", f.DraftOrders)
				}
				if f.Patient.Sex != "female" {
					t.Errorf("patient %+v, want the urn:uuid Patient read", f.Patient)
				}
			}
		})
	}
}
