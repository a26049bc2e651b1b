package deid

import (
	"encoding/json"
	"strings"
	"testing"
	"time"
)

// TestRequest: one invented request through the session: the token and
// names go, references keep pointing at the renamed resources (relative,
// absolute, contained), dates move by the patient's whole-day offset with
// their precision and zone, and the replay time moves with them.
func TestRequest(t *testing.T) {
	s, err := NewSession()
	if err != nil {
		t.Fatal(err)
	}
	body := `{"hook": "order-sign", "hookInstance": "d1577c69-dfbe-44ad-ba6d-3e05e953b2ea", "fhirServer": "https://ehr.example/fhir",
	 "fhirAuthorization": {"access_token": "secret-token", "token_type": "Bearer", "expires_in": 300, "scope": "s", "subject": "c"},
	 "context": {"userId": "Practitioner/dr-who", "patientId": "pt-1", "selections": ["MedicationRequest/mr-1"],
	  "draftOrders": {"resourceType": "Bundle", "entry": [{"fullUrl": "https://ehr.example/fhir/MedicationRequest/mr-1",
	   "resource": {"resourceType": "MedicationRequest", "id": "mr-1", "status": "draft", "subject": {"reference": "Patient/pt-1", "display": "Jane Roe"},
	    "contained": [{"resourceType": "Medication", "id": "m1", "code": {"coding": [{"system": "http://www.nlm.nih.gov/research/umls/rxnorm", "code": "3251", "display": "desmopressin"}]}}],
	    "medicationReference": {"reference": "#m1"}, "authoredOn": "2026-11-20T07:30:00+01:00", "note": [{"text": "call her daughter"}]}}]}},
	 "prefetch": {"patient": {"resourceType": "Patient", "id": "pt-1", "name": [{"family": "Roe"}], "birthDate": "1950-03-01",
	   "identifier": [{"value": "MRN-42"}], "text": {"div": "<div>Jane Roe</div>"}}}}`
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	out, replay, err := s.Request([]byte(body), at)
	if err != nil {
		t.Fatal(err)
	}
	text := string(out)
	for _, gone := range []string{"secret-token", "Jane", "Roe", "MRN-42", "dr-who", "pt-1", "mr-1", "daughter", "ehr.example", "d1577c69", "1950-03-01", "2026-11-20T07:30"} {
		if strings.Contains(text, gone) {
			t.Errorf("%q survived:\n%s", gone, text)
		}
	}
	var req struct {
		Context struct {
			PatientID   string   `json:"patientId"`
			Selections  []string `json:"selections"`
			DraftOrders struct {
				Entry []struct {
					Resource struct {
						ID                  string `json:"id"`
						AuthoredOn          string `json:"authoredOn"`
						Subject             struct{ Reference, Display string }
						MedicationReference struct{ Reference string }
						Contained           []struct {
							ID   string
							Code struct {
								Coding []struct{ Code, Display string }
							}
						}
					} `json:"resource"`
				} `json:"entry"`
			} `json:"draftOrders"`
		} `json:"context"`
		Prefetch struct {
			Patient struct{ ID, BirthDate string } `json:"patient"`
		} `json:"prefetch"`
	}
	if err := json.Unmarshal(out, &req); err != nil {
		t.Fatal(err)
	}
	r := req.Context.DraftOrders.Entry[0].Resource
	shift := s.Offset("pt-1")
	days := -shift.Hours() / 24
	switch {
	case days < 30 || days > 395 || shift%(24*time.Hour) != 0:
		t.Errorf("offset %v is not 30-395 whole days", shift)
	case req.Prefetch.Patient.ID != req.Context.PatientID || r.Subject.Reference != "Patient/"+req.Context.PatientID || r.Subject.Display != "":
		t.Errorf("patient renamed inconsistently: %+v %+v", req.Prefetch.Patient, r.Subject)
	case req.Context.Selections[0] != "MedicationRequest/"+r.ID:
		t.Errorf("selection %q, draft %q", req.Context.Selections[0], r.ID)
	case r.MedicationReference.Reference != "#"+r.Contained[0].ID || r.Contained[0].Code.Coding[0].Display != "desmopressin":
		t.Errorf("contained medication: %+v %+v", r.MedicationReference, r.Contained)
	case r.AuthoredOn != time.Date(2026, 11, 20, 7, 30, 0, 0, time.FixedZone("", 3600)).Add(shift).Format(time.RFC3339):
		t.Errorf("authoredOn %q, want 07:30+01:00 shifted by %v", r.AuthoredOn, shift)
	case req.Prefetch.Patient.BirthDate != time.Date(1950, 3, 1, 0, 0, 0, 0, time.UTC).Add(shift).Format("2006-01-02"):
		t.Errorf("birthDate %q", req.Prefetch.Patient.BirthDate)
	case !replay.Equal(at.Add(shift)):
		t.Errorf("replay at %v, want %v", replay, at.Add(shift))
	}
	if _, _, err := s.Request([]byte(`[1]`), at); err == nil {
		t.Error("an array was de-identified")
	}
}

// FuzzRequest: any body gives an error or valid JSON, never a panic.
func FuzzRequest(f *testing.F) {
	for _, s := range []string{`{}`, `{"context":{"patientId":7,"selections":[1,"A/b"]}}`, `{"prefetch":{"a":{"resourceType":"X","contained":[{"id":1}]}}}`,
		`{"prefetch":{"d":"2026-02-30T25:00:00Z","reference":"#"}}`} {
		f.Add([]byte(s))
	}
	s, err := NewSession()
	if err != nil {
		f.Fatal(err)
	}
	f.Fuzz(func(t *testing.T, body []byte) {
		out, _, err := s.Request(body, time.Unix(0, 0))
		if err == nil && !json.Valid(out) {
			t.Errorf("invalid JSON out of %q", body)
		}
	})
}

// TestRequestAdversarial: PHI placed where real EHRs put it — extensions,
// unknown members, free-text values and instructions, transaction URLs,
// meta, attachments, identifiers of other resource types, operation
// outcome diagnostics, partial and invalid dates, an age above 89 — does
// not survive; what halite reads does.
func TestRequestAdversarial(t *testing.T) {
	s, err := NewSession()
	if err != nil {
		t.Fatal(err)
	}
	body := `{"hook": "order-sign", "hookInstance": "x", "user": "Practitioner/dr-smith-42", "extension": {"com.ehr.user": "Dr John Smith"},
	 "context": {"userId": "Practitioner/u", "patientId": "pt-1", "dispatchedOrders": ["ServiceRequest/sr-99"], "extension": {"x": "MRN12345"},
	  "draftOrders": {"resourceType": "Bundle", "type": "collection", "entry": [{"fullUrl": "urn:uuid:0a7d8e5c-1111-4e57-9a15-4f0a1d5b0001",
	   "request": {"method": "PUT", "url": "Patient/MRN12345"}, "response": {"location": "Patient/MRN12345/_history/1"},
	   "resource": {"resourceType": "NutritionOrder", "id": "no-1", "status": "draft", "intent": "order", "patient": {"reference": "Patient/pt-1"},
	    "oralDiet": {"instruction": "deliver to 12 Elm St", "nutrient": [{"amount": {"value": 1000, "unit": "mL"}}]}}}]}},
	 "prefetch": {
	  "patient": {"resourceType": "Patient", "id": "pt-1", "birthDate": "1920-01-01", "deceasedDateTime": "2024", "meta": {"source": "https://ehr.hospital.org/#MRN12345"}},
	  "sodium": {"resourceType": "Bundle", "type": "searchset", "link": [{"relation": "next", "url": "https://ehr/fhir/Observation?patient=MRN12345"}],
	   "entry": [{"resource": {"resourceType": "Observation", "id": "o1", "status": "final", "valueString": "pt Jane Roe called from 555-1234",
	    "code": {"text": "Sodium", "coding": [{"system": "http://loinc.org", "code": "2951-2", "display": "Sodium"}]},
	    "effectivePeriod": {"start": "2024-03", "end": "2024-03-15"}, "issued": "2024-02-30T10:00:00Z", "note": [{"text": "Jane asked"}],
	    "subject": {"reference": "Patient/pt-1", "display": "Jane Roe"}, "valueQuantity": {"value": 131, "unit": "mmol/L"}}},
	    {"resource": {"resourceType": "OperationOutcome", "issue": [{"severity": "information", "code": "informational", "diagnostics": "searched MRN12345 for Jane Roe"}]}},
	    {"resource": {"resourceType": "DocumentReference", "id": "d1", "content": [{"attachment": {"data": "SmFuZSBSb2U=", "title": "Jane Roe letter"}}]}},
	    {"resource": {"resourceType": "Coverage", "id": "c1", "subscriberId": "SUB-778899"}}]}}}`
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	out, replay, err := s.Request([]byte(body), at)
	if err != nil {
		t.Fatal(err)
	}
	text := string(out)
	for _, gone := range []string{"dr-smith", "John Smith", "MRN12345", "sr-99", "Elm St", "Jane", "Roe", "555-1234", "SmFuZSBSb2U", "SUB-778899",
		"hospital.org", "2024-03-15", "\"2024\"", "2024-02-30", "1920-01-01", "0a7d8e5c", "dispatchedOrders", "\"user\"", "extension"} {
		if strings.Contains(text, gone) {
			t.Errorf("%q survived:\n%s", gone, text)
		}
	}
	for _, kept := range []string{`"value": 131`, `"code": "2951-2"`, `"text": "Sodium"`, `"value": 1000`, `"status": "final"`, `"severity": "information"`} {
		if !strings.Contains(text, kept) {
			t.Errorf("%s was not kept:\n%s", kept, text)
		}
	}
	shift := s.Offset("pt-1")
	if want := time.Date(2024, 3, 1, 0, 0, 0, 0, time.UTC).Add(shift).Format("2006-01"); !strings.Contains(text, `"start": "`+want+`"`) {
		t.Errorf("a year-month start is not shifted to %s:\n%s", want, text)
	}
	if want := replay.AddDate(-90, 0, 0).Format("2006-01-02"); !strings.Contains(text, `"birthDate": "`+want+`"`) {
		t.Errorf("an age above 89 is not given as 90 (%s):\n%s", want, text)
	}
}
