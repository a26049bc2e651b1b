package hooks

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/santhosh-tekuri/jsonschema/v6"
)

// fhirSchemaID is the id of the official FHIR R4 JSON schema
// (testdata/fhir/README.md gives its provenance).
const fhirSchemaID = "http://hl7.org/fhir/json-schema/4.0"

// fhirValidator validates resources against one definition of the FHIR R4
// JSON schema, by resourceType.
type fhirValidator struct {
	c       *jsonschema.Compiler
	schemas map[string]*jsonschema.Schema
}

func newFHIRValidator(t *testing.T) *fhirValidator {
	t.Helper()
	data, err := os.ReadFile(filepath.Join("..", "testdata", "fhir", "fhir.schema.json"))
	if err != nil {
		t.Fatal(err)
	}
	doc, err := jsonschema.UnmarshalJSON(bytes.NewReader(data))
	if err != nil {
		t.Fatal(err)
	}
	c := jsonschema.NewCompiler()
	if err := c.AddResource(fhirSchemaID, doc); err != nil {
		t.Fatal(err)
	}
	return &fhirValidator{c: c, schemas: map[string]*jsonschema.Schema{}}
}

// validate checks a resource against the schema definition its
// resourceType names.
func (v *fhirValidator) validate(t *testing.T, raw json.RawMessage) error {
	t.Helper()
	var head struct {
		ResourceType string `json:"resourceType"`
	}
	if err := json.Unmarshal(raw, &head); err != nil || head.ResourceType == "" {
		t.Fatalf("not a FHIR resource: %s", raw)
	}
	s, ok := v.schemas[head.ResourceType]
	if !ok {
		var err error
		if s, err = v.c.Compile(fhirSchemaID + "#/definitions/" + head.ResourceType); err != nil {
			t.Fatalf("compile %s: %v", head.ResourceType, err)
		}
		v.schemas[head.ResourceType] = s
	}
	inst, err := jsonschema.UnmarshalJSON(bytes.NewReader(raw))
	if err != nil {
		t.Fatal(err)
	}
	return s.Validate(inst)
}

// TestFHIRSchema loads the schema once (it is large) and runs its checks.
func TestFHIRSchema(t *testing.T) {
	v := newFHIRValidator(t)
	t.Run("validator rejects broken resources", func(t *testing.T) { validatorRejects(t, v) })
	t.Run("suggested resources validate", func(t *testing.T) { suggestedResourcesValidate(t, v) })
}

// suggestedResourcesValidate runs every scenario through the order-hook
// services on both order hooks and validates every resource a suggestion
// carries against the official FHIR R4 JSON schema.
func suggestedResourcesValidate(t *testing.T, v *fhirValidator) {
	e := testEngine(t, nil)
	files, err := filepath.Glob(filepath.Join("..", "testdata", "scenarios", "*.json"))
	if err != nil {
		t.Fatal(err)
	}
	kinds := map[string]int{}
	for _, file := range files {
		name := filepath.Base(file)
		for _, call := range [][2]string{{"sodium-infusion-check", HookOrderSelect}, {"sodium-infusion-check", HookOrderSign},
			{"sodium-drug-risk", HookOrderSelect}, {"sodium-drug-risk", HookOrderSign}, {"sodium-chart-review", HookPatientView}} {
			svc, hook := call[0], call[1]
			// In an encounter, so that suggested requests carry one too.
			req, err := BuildRequest(loadScenario(t, name), mustService(t, svc),
				RequestOptions{Hook: hook, UserID: "Practitioner/test-user", EncounterID: "enc-test"})
			if err != nil {
				continue // a scenario without draft orders cannot make an order-hook call
			}
			out, err := e.Handle(t.Context(), svc, mustMarshal(t, req), scenarioAt)
			if err != nil {
				t.Fatalf("%s %s: %v", name, hook, err)
			}
			for _, c := range out.Response.Cards {
				for _, s := range c.Suggestions {
					for _, a := range s.Actions {
						kinds[a.Type]++
						if a.Type == "delete" {
							if a.Resource != nil || !strings.HasPrefix(a.ResourceID, "MedicationRequest/") {
								t.Errorf("%s %s: delete %+v", name, hook, a)
							}
							continue
						}
						if a.Type == "create" && !strings.Contains(string(a.Resource), `"encounter":{"reference":"Encounter/enc-test"}`) {
							t.Errorf("%s %s: %s carries no encounter: %s", name, hook, s.Label, a.Resource)
						}
						if err := v.validate(t, a.Resource); err != nil {
							t.Errorf("%s %s: %s %s does not validate: %v\n%s", name, hook, a.Type, s.Label, err, a.Resource)
						}
					}
				}
			}
		}
	}
	// The scenarios must exercise every kind of action, or this test proves little.
	for _, k := range []string{"create", "update", "delete"} {
		if kinds[k] == 0 {
			t.Errorf("no %s action in any scenario (%v)", k, kinds)
		}
	}
	t.Logf("validated actions: %v", kinds)
}

// validatorRejects shows the validator catches a broken resource, so the
// scenario check can fail.
func validatorRejects(t *testing.T, v *fhirValidator) {
	good := `{"resourceType":"ServiceRequest","status":"draft","intent":"order","subject":{"reference":"Patient/p"}}`
	if err := v.validate(t, json.RawMessage(good)); err != nil {
		t.Fatalf("a minimal valid ServiceRequest was refused: %v", err)
	}
	for name, bad := range map[string]string{
		"status not a code": `{"resourceType":"ServiceRequest","status":"draft  order","intent":"order","subject":{"reference":"Patient/p"}}`,
		"missing subject":   `{"resourceType":"ServiceRequest","status":"draft","intent":"order"}`,
		"unknown element":   `{"resourceType":"ServiceRequest","status":"draft","intent":"order","subject":{"reference":"Patient/p"},"rate":1}`,
		"bad rate value":    `{"resourceType":"MedicationRequest","status":"draft","intent":"order","subject":{"reference":"Patient/p"},"medicationCodeableConcept":{"text":"x"},"dosageInstruction":[{"doseAndRate":[{"rateQuantity":{"value":"fast"}}]}]}`,
	} {
		if err := v.validate(t, json.RawMessage(bad)); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
}
