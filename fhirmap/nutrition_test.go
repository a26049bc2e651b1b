package fhirmap

import (
	"encoding/json"
	"testing"
)

// TestMapNutritionOrder reads a draft NutritionOrder shaped as the FHIR R4
// example nutritionorder-example-cardiacdiet (oralDiet.type SNOMED CT
// 226208002 "Fluid restricted diet"; nutrient "Fluid", SNOMED CT 33463005,
// 1500 mL), and refuses one for another patient or without an oral diet.
func TestMapNutritionOrder(t *testing.T) {
	no := func(id, patient, oral string) json.RawMessage {
		return json.RawMessage(`{"resourceType":"NutritionOrder","id":"` + id + `","status":"draft","intent":"order",` +
			`"patient":{"reference":"` + patient + `"},"dateTime":"2026-11-20T07:00:00Z"` + oral + `}`)
	}
	const oral = `,"oralDiet":{"type":[{"coding":[{"system":"http://snomed.info/sct","code":"226208002","display":"Fluid restricted diet"}],` +
		`"text":"Fluid restricted diet"}],"nutrient":[{"modifier":{"coding":[{"system":"http://snomed.info/sct","code":"33463005","display":"Fluid"}]},` +
		`"amount":{"value":1500,"unit":"milliliter","system":"http://unitsofmeasure.org","code":"mL"}}],"instruction":"1.5 L a day"}`
	f := Map(Input{At: testAt, PatientID: testPatient, DraftEntries: raws(no("fr", "Patient/"+testPatient, oral),
		no("other", "Patient/someone-else", oral), no("empty", "Patient/"+testPatient, ""))}, ruleset(t))
	if len(f.DraftNutrition) != 1 {
		t.Fatalf("draft nutrition %+v", f.DraftNutrition)
	}
	n := f.DraftNutrition[0]
	if n.Reference != "NutritionOrder/fr" || n.TypeText != "Fluid restricted diet" || len(n.Types) != 1 || n.Types[0].Code != "226208002" ||
		len(n.Nutrients) != 1 || n.Nutrients[0].Amount == nil || n.Nutrients[0].Amount.Value != 1500 || n.Nutrients[0].Amount.Unit != "mL" ||
		n.Instruction != "1.5 L a day" || !n.Selected {
		t.Errorf("read %+v", n)
	}
	var reasons []string
	for _, r := range f.Rejected {
		reasons = append(reasons, r.Source+": "+r.Reason)
	}
	if len(reasons) != 2 {
		t.Errorf("rejected %q, want the other patient's and the count of one without an oral diet", reasons)
	}
}
