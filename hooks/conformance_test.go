package hooks

import (
	"encoding/json"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// TestCheckRequestListsEveryProblem feeds a deliberately broken order-select
// request and expects every problem at once, each at its JSON path (CDS
// Hooks 2.0: hookInstance a UUID; fhirAuthorization's five members, token
// type Bearer, integer expires_in, cds-r-1; order-select's userId types,
// selections into draftOrders; the services' prefetch templates).
func TestCheckRequestListsEveryProblem(t *testing.T) {
	body := `{"hook": "order-select", "hookInstance": "not-a-uuid",
	 "fhirAuthorization": {"access_token": "x", "token_type": "bearer", "expires_in": 3.5, "scope": "patient/*.read"},
	 "context": {"userId": "Patient/p1", "patientId": "p1", "extra": 1, "selections": ["MedicationRequest/zz"],
	   "draftOrders": {"resourceType": "Bundle", "entry": [{"resource": {"resourceType": "MedicationRequest", "id": "a",
	     "status": "active", "subject": {"reference": "Patient/other"}}}, {"resource": {"resourceType": "Observation", "id": "o"}}]}},
	 "prefetch": {"patient": {"resourceType": "Observation", "id": "x"},
	   "chemistry": {"resourceType": "Patient", "id": "p1"},
	   "sodium": {"resourceType": "Bundle", "type": "collection", "entry": [{"resource": {"resourceType": "Condition", "id": "c"}},
	     {"resource": {"resourceType": "Observation", "id": "o", "subject": {"reference": "Patient/q"}}}, {}]},
	   "urine": {"resourceType": "OperationOutcome"}, "medications": null, "mystery": {}}}`
	reg := NewRegistry(nil, nil)
	got := CheckRequest([]byte(body), reg.ForHook(HookOrderSelect))
	var paths []string
	for _, p := range got {
		paths = append(paths, string(p.Severity)+" "+p.Path)
	}
	want := []string{
		"error $.fhirAuthorization", // cds-r-1
		"error $.fhirAuthorization.expires_in",
		"error $.fhirAuthorization.subject",
		"error $.context.userId",
		"error $.context.draftOrders.entry[0].resource.subject.reference",
		"error $.context.selections[0]",
		"error $.prefetch.patient.resourceType",
		"error $.prefetch.sodium.entry[0].resource.resourceType",
		"error $.prefetch.sodium.entry[1].resource.subject.reference",
		"error $.prefetch.sodium.entry[2].resource",
		"error $.prefetch.chemistry.resourceType",
		"warning $.hookInstance",
		"warning $.fhirAuthorization.token_type", // "bearer": accepted in any case, RFC 6749
		"warning $.context.draftOrders.entry[0].resource.status",
		"warning $.context.draftOrders.entry[1].resource",
		"warning $.prefetch.sodium.type",
		"warning $.prefetch.urine",
		"warning $.prefetch.bodySize",
		"warning $.prefetch.conditions",
		"warning $.prefetch.administrations",
		"warning $.prefetch.procedures",
		"info $.context.extra",
		"info $.prefetch.medications",
		"info $.prefetch.mystery",
	}
	slices.Sort(paths)
	slices.Sort(want)
	if !slices.Equal(paths, want) {
		t.Errorf("problems:\n%s\nwant:\n%s", strings.Join(paths, "\n"), strings.Join(want, "\n"))
	}
	for i := 1; i < len(got); i++ {
		if severityRank[got[i].Severity] > severityRank[got[i-1].Severity] {
			t.Errorf("problems not ordered by severity at %d", i)
		}
	}
}

// TestCheckRequestMissingMembers: the required members of a request and of
// the hook's context, and a required key that cannot be fetched (the
// service answers 412).
func TestCheckRequestMissingMembers(t *testing.T) {
	reg := NewRegistry(nil, nil)
	for _, tc := range []struct {
		body string
		want []string
	}{
		{`[]`, []string{"error $"}},
		{`{"hook": "order-sign", "context": {"patientId": "p 1"}}`, []string{"error $.hookInstance", "error $.context.userId",
			"error $.context.draftOrders", "error $.context.patientId", "error $.prefetch.patient", "error $.prefetch.sodium"}},
		{`{"hook": "patient-view", "hookInstance": "d1577c69-dfbe-44ad-ba6d-3e05e953b2ea", "fhirServer": "http://ehr.example/fhir",
		  "fhirAuthorization": {"access_token": "t", "token_type": "Bearer", "expires_in": 300, "scope": "s", "subject": "c"},
		  "context": {"userId": "Practitioner/u", "patientId": "p1"}}`, []string{"warning $.fhirServer"}},
		{`{"hook": 7, "hookInstance": "x", "context": []}`, []string{"error $.hook", "error $.context"}},
		// What the server refuses (400) or answers 412, and check-request
		// must not pass: a string expires_in, an encounterId that is a
		// reference, a required key that failed.
		{`{"hook": "patient-view", "hookInstance": "d1577c69-dfbe-44ad-ba6d-3e05e953b2ea", "fhirServer": "https://ehr.example/fhir",
		  "fhirAuthorization": {"access_token": "t", "token_type": "Bearer", "expires_in": "3600", "scope": "s", "subject": "c"},
		  "context": {"userId": "Practitioner/u", "patientId": "p1", "encounterId": "Encounter/9"},
		  "prefetch": {"sodium": {"resourceType": "OperationOutcome"}}}`,
			[]string{"error $.fhirAuthorization.expires_in", "error $.context.encounterId", "error $.prefetch.sodium"}},
	} {
		var svcs []Service
		var head struct {
			Hook string `json:"hook"`
		}
		_ = json.Unmarshal([]byte(tc.body), &head)
		svcs = reg.ForHook(head.Hook)
		var errs []string
		for _, p := range CheckRequest([]byte(tc.body), svcs) {
			if p.Severity != SeverityInfo {
				errs = append(errs, string(p.Severity)+" "+p.Path)
			}
		}
		for _, w := range tc.want {
			if !slices.Contains(errs, w) {
				t.Errorf("%s: lacks %q in %q", tc.body, w, errs)
			}
		}
	}
}

// TestCheckRequestScenarios: the requests halite builds from its own
// scenarios have no errors.
func TestCheckRequestScenarios(t *testing.T) {
	reg := NewRegistry(nil, nil)
	files, _ := filepath.Glob(filepath.Join("..", "testdata", "demo", "*request*.json"))
	if len(files) == 0 {
		t.Fatal("no demo request")
	}
	for _, f := range files {
		body, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		for _, p := range CheckRequest(body, reg.ForHook(HookOrderSign)) {
			if p.Severity == SeverityError {
				t.Errorf("%s: %s %s", f, p.Path, p.Message)
			}
		}
	}
}

// FuzzCheckRequest: the report never panics on any body, and names a path
// for every problem.
func FuzzCheckRequest(f *testing.F) {
	for _, s := range []string{`{}`, `{"hook":"order-sign","context":{"draftOrders":{"resourceType":"Bundle","entry":[{}]}}}`,
		`{"prefetch":{"patient":{"resourceType":"Bundle","entry":[{"resource":null}]}}}`, `{"fhirAuthorization":{"expires_in":"x"}}`, `null`} {
		f.Add([]byte(s))
	}
	svcs := NewRegistry(nil, nil).Services()
	f.Fuzz(func(t *testing.T, body []byte) {
		for _, p := range CheckRequest(body, svcs) {
			if !strings.HasPrefix(p.Path, "$") || p.Message == "" {
				t.Errorf("problem without a path or message: %+v", p)
			}
		}
	})
}
