package hooks

import (
	"errors"
	"strings"
	"testing"
)

func TestDecodeCallValid(t *testing.T) {
	for _, tc := range []struct{ scenario, service, hook string }{
		{"01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSign},
		{"01-chronic-hypona-3pct-infusion.json", "sodium-infusion-check", HookOrderSelect},
		{"02-ssri-new-start-mild-hypona.json", "sodium-drug-risk", HookOrderSign},
		{"09-rapid-correction-high-risk.json", "sodium-chart-review", HookPatientView},
	} {
		t.Run(tc.service+"/"+tc.hook, func(t *testing.T) {
			m := requestMap(t, tc.scenario, tc.service, tc.hook)
			m["extension"] = map[string]any{"org.example.unknown": map[string]any{"x": 1}}
			// RFC 6749 §5.1: the token type is case-insensitive.
			m["fhirServer"] = "https://ehr.example.org/fhir"
			m["fhirAuthorization"] = map[string]any{"access_token": "t", "token_type": "bearer", "expires_in": 300,
				"scope": "patient/*.read", "subject": "halite"}
			m["someFutureField"] = "tolerated"
			c, err := DecodeCall(mustService(t, tc.service), mustMarshal(t, m))
			if err != nil {
				t.Fatalf("DecodeCall: %v", err)
			}
			if c.Context.PatientID == "" || c.ContextTokens["patientId"] != c.Context.PatientID {
				t.Errorf("patientId %q, token %q", c.Context.PatientID, c.ContextTokens["patientId"])
			}
			if tc.hook != HookPatientView && len(c.DraftEntries) == 0 {
				t.Error("no draft orders decoded")
			}
		})
	}
}

// TestDecodeCallErrors breaks one field at a time; each must give a 400
// naming that field (CDS Hooks 2.0 §Calling a CDS Service; hook contexts
// from the CDS Hooks Library).
func TestDecodeCallErrors(t *testing.T) {
	const scenario = "01-chronic-hypona-3pct-infusion.json"
	ctx := func(m map[string]any) map[string]any { return m["context"].(map[string]any) }
	for _, tc := range []struct {
		name, hook, field string
		edit              func(m map[string]any)
	}{
		{"hook missing", HookOrderSign, "hook", func(m map[string]any) { delete(m, "hook") }},
		{"hook not served", HookOrderSign, "hook", func(m map[string]any) { m["hook"] = "patient-view" }},
		{"hookInstance missing", HookOrderSign, "hookInstance", func(m map[string]any) { delete(m, "hookInstance") }},
		{"hookInstance wrong type", HookOrderSign, "hookInstance", func(m map[string]any) { m["hookInstance"] = 7 }},
		{"context missing", HookOrderSign, "context", func(m map[string]any) { delete(m, "context") }},
		{"context not object", HookOrderSign, "context", func(m map[string]any) { m["context"] = "x" }},
		{"userId missing", HookOrderSign, "context.userId", func(m map[string]any) { delete(ctx(m), "userId") }},
		{"userId patient on order-sign", HookOrderSign, "context.userId",
			func(m map[string]any) { ctx(m)["userId"] = "Patient/p1" }},
		{"userId not a reference", HookOrderSign, "context.userId", func(m map[string]any) { ctx(m)["userId"] = "abc" }},
		{"patientId missing", HookOrderSign, "context.patientId", func(m map[string]any) { delete(ctx(m), "patientId") }},
		{"patientId not an id", HookOrderSign, "context.patientId",
			func(m map[string]any) { ctx(m)["patientId"] = "Patient/x y" }},
		{"encounterId not an id", HookOrderSign, "context.encounterId",
			func(m map[string]any) { ctx(m)["encounterId"] = "" }},
		{"draftOrders missing", HookOrderSign, "context.draftOrders",
			func(m map[string]any) { delete(ctx(m), "draftOrders") }},
		{"draftOrders not a Bundle", HookOrderSign, "context.draftOrders",
			func(m map[string]any) { ctx(m)["draftOrders"] = map[string]any{"resourceType": "Patient"} }},
		{"draftOrders entry not a resource", HookOrderSign, "context.draftOrders.entry[0].resource",
			func(m map[string]any) {
				ctx(m)["draftOrders"] = map[string]any{"resourceType": "Bundle", "entry": []any{map[string]any{"resource": 5}}}
			}},
		{"selections missing", HookOrderSelect, "context.selections",
			func(m map[string]any) { delete(ctx(m), "selections") }},
		{"selections empty", HookOrderSelect, "context.selections", func(m map[string]any) { ctx(m)["selections"] = []any{} }},
		{"selections wrong type", HookOrderSelect, "context.selections",
			func(m map[string]any) { ctx(m)["selections"] = "MedicationRequest/x" }},
		{"selection not in draftOrders", HookOrderSelect, "context.selections[0]",
			func(m map[string]any) { ctx(m)["selections"] = []any{"MedicationRequest/nope"} }},
		{"fhirAuthorization without fhirServer", HookOrderSign, "fhirServer", func(m map[string]any) {
			m["fhirAuthorization"] = map[string]any{"access_token": "t", "token_type": "Bearer", "expires_in": 300,
				"scope": "patient/*.read", "subject": "halite"}
		}},
		{"fhirServer not a URL", HookOrderSign, "fhirServer", func(m map[string]any) { m["fhirServer"] = "ftp://x" }},
		{"token_type not Bearer", HookOrderSign, "fhirAuthorization.token_type", func(m map[string]any) {
			m["fhirServer"] = "https://ehr.example.org/fhir"
			m["fhirAuthorization"] = map[string]any{"access_token": "t", "token_type": "MAC", "expires_in": 300,
				"scope": "patient/*.read", "subject": "halite"}
		}},
		{"access_token missing", HookOrderSign, "fhirAuthorization.access_token", func(m map[string]any) {
			m["fhirServer"] = "https://ehr.example.org/fhir"
			m["fhirAuthorization"] = map[string]any{"token_type": "Bearer", "expires_in": 300,
				"scope": "patient/*.read", "subject": "halite"}
		}},
		{"prefetch value not a resource", HookOrderSign, "prefetch.sodium",
			func(m map[string]any) { m["prefetch"].(map[string]any)["sodium"] = []any{1} }},
		{"case variant of patientId", HookOrderSign, "context.PatientId",
			func(m map[string]any) { ctx(m)["PatientId"] = "someone-else" }},
		{"fhirAuthorization.patient differs", HookOrderSign, "fhirAuthorization.patient", func(m map[string]any) {
			m["fhirServer"] = "https://ehr.example.org/fhir"
			m["fhirAuthorization"] = map[string]any{"access_token": "t", "token_type": "Bearer", "expires_in": 300,
				"scope": "patient/*.read", "subject": "halite", "patient": "someone-else"}
		}},
		{"extension not an object", HookOrderSign, "extension", func(m map[string]any) { m["extension"] = []any{1} }},
	} {
		t.Run(tc.name, func(t *testing.T) {
			m := requestMap(t, scenario, "sodium-infusion-check", tc.hook)
			tc.edit(m)
			_, err := DecodeCall(mustService(t, "sodium-infusion-check"), mustMarshal(t, m))
			var e *Error
			if !errors.As(err, &e) || e.Kind != KindBadRequest {
				t.Fatalf("got %v, want a bad request", err)
			}
			if e.Field != tc.field {
				t.Errorf("field %q, want %q (error %v)", e.Field, tc.field, err)
			}
		})
	}
}

func TestDecodeCallNotJSON(t *testing.T) {
	svc := mustService(t, "sodium-drug-risk")
	for _, body := range []string{"", "   ", "{", "[]", `"x"`, "null"} {
		_, err := DecodeCall(svc, []byte(body))
		if KindOf(err) != KindBadRequest {
			t.Errorf("%q: got %v, want a bad request", body, err)
		}
	}
}

func TestRenderTemplate(t *testing.T) {
	c := &Call{Context: HookContext{UserID: "PractitionerRole/r-9"},
		ContextTokens: map[string]string{"patientId": "p-1", "userId": "PractitionerRole/r-9"}}
	for _, tc := range []struct {
		tmpl, want string
		ok         bool
	}{
		{"Patient/{{context.patientId}}", "Patient/p-1", true},
		{"Observation?patient={{ context.patientId }}&code=http://loinc.org|2951-2", "Observation?patient=p-1&code=http://loinc.org|2951-2", true},
		{"PractitionerRole/{{userPractitionerRoleId}}", "PractitionerRole/r-9", true},
		{"Practitioner/{{userPractitionerId}}", "Practitioner/", false},
		{"Encounter/{{context.encounterId}}", "Encounter/", false},
		{"{{context.userId}}", "PractitionerRole/r-9", true},
	} {
		got, ok := RenderTemplate(tc.tmpl, c)
		if got != tc.want || ok != tc.ok {
			t.Errorf("RenderTemplate(%q) = %q, %v; want %q, %v", tc.tmpl, got, ok, tc.want, tc.ok)
		}
	}
}

// TestTemplatesUseRestrictedSyntax checks every prefetch template against
// CDS Hooks 2.0 §Prefetch query restrictions: reads, or searches with a
// resource reference, token parameters by equality, _sort and _count.
func TestTemplatesUseRestrictedSyntax(t *testing.T) {
	allowed := map[string]bool{"patient": true, "code": true, "status": true, "clinical-status": true,
		"_sort": true, "_count": true}
	for _, s := range NewRegistry(nil, nil).Services() {
		for _, k := range s.Prefetch {
			path, query, isSearch := strings.Cut(k.Template, "?")
			if !isSearch {
				if strings.Count(path, "/") != 1 {
					t.Errorf("%s/%s: %q is neither a read nor a search", s.ID, k.Key, k.Template)
				}
				continue
			}
			for _, p := range strings.Split(query, "&") {
				name, value, _ := strings.Cut(p, "=")
				if !allowed[name] {
					t.Errorf("%s/%s: parameter %q is outside the restricted syntax", s.ID, k.Key, name)
				}
				if strings.Contains(name, ":") {
					t.Errorf("%s/%s: modifier in %q", s.ID, k.Key, name)
				}
				if name == "patient" && value != "{{context.patientId}}" {
					t.Errorf("%s/%s: patient=%q", s.ID, k.Key, value)
				}
			}
		}
	}
}

// TestDecodeCallEncodingsAndVersions: a UTF-8 byte-order mark is accepted
// (RFC 8259 §8.1 lets a parser ignore it); a document that is not an
// object is refused in plain words, with no Go type name; a draft order of
// an earlier FHIR version is refused as not R4.
func TestDecodeCallEncodingsAndVersions(t *testing.T) {
	svc := mustService(t, "sodium-drug-risk")
	valid := mustMarshal(t, requestMap(t, "02-ssri-new-start-mild-hypona.json", "sodium-drug-risk", HookOrderSign))
	if _, err := DecodeCall(svc, append([]byte("\xEF\xBB\xBF"), valid...)); err != nil {
		t.Errorf("a body with a byte-order mark: %v", err)
	}
	stu3 := requestMap(t, "02-ssri-new-start-mild-hypona.json", "sodium-drug-risk", HookOrderSign)
	stu3["context"].(map[string]any)["draftOrders"] = map[string]any{"resourceType": "Bundle", "type": "collection",
		"entry": []any{map[string]any{"resource": map[string]any{"resourceType": "MedicationOrder", "id": "old",
			"patient": map[string]any{"reference": "Patient/pt-birch"}}}}}
	for _, tc := range []struct {
		name string
		body []byte
		want string
	}{
		{"top-level array", []byte(`[` + string(valid) + `]`), "the document is a JSON array"},
		{"hook of the wrong type", []byte(`{"hook": 7}`), "expected a JSON string, got JSON number"},
		{"DSTU2 draft order", mustMarshal(t, stu3), "FHIR R4 expected: this is a DSTU2 MedicationOrder"},
	} {
		_, err := DecodeCall(svc, tc.body)
		if err == nil || !strings.Contains(err.Error(), tc.want) || strings.Contains(err.Error(), "hooks.") || strings.Contains(err.Error(), "Go value") {
			t.Errorf("%s: error %v; want one saying %q and no Go type", tc.name, err, tc.want)
		}
	}
}
