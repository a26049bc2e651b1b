package fhirmap

import (
	"strings"

	"github.com/halite-cds/halite/rules"
	"github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// nutritionOrderFields are the NutritionOrder elements halite reads (FHIR
// R4 NutritionOrder: patient, oralDiet.type, oralDiet.nutrient,
// oralDiet.instruction).
type nutritionOrderFields struct {
	Patient  fhir.Reference `json:"patient"`
	OralDiet *struct {
		Type     []fhir.CodeableConcept `json:"type"`
		Nutrient []struct {
			Modifier *fhir.CodeableConcept `json:"modifier"`
			Amount   *fhir.Quantity        `json:"amount"`
		} `json:"nutrient"`
		Instruction *string `json:"instruction"`
	} `json:"oralDiet"`
}

// nutritionOrder reads a draft NutritionOrder's oral diet; ok is false, with
// the reason recorded, for one that does not decode, is another patient's
// or has no oral diet.
func (m *mapper) nutritionOrder(r Resource) (rules.NutritionOrder, bool) {
	var n nutritionOrderFields
	if err := DecodeJSON(r.Raw, &n); err != nil {
		m.reject(r, "", "invalid resource: "+err.Error())
		return rules.NutritionOrder{}, false
	}
	if !m.refersToPatient(str(n.Patient.Reference), r) {
		m.reject(r, "", "patient is not the patient in context")
		return rules.NutritionOrder{}, false
	}
	if n.OralDiet == nil {
		m.unused[[2]string{r.Type, "no oralDiet"}]++
		return rules.NutritionOrder{}, false
	}
	out := rules.NutritionOrder{Reference: r.Ref(), Instruction: str(n.OralDiet.Instruction)}
	var texts []string
	for _, t := range n.OralDiet.Type {
		cs, text := codings(&t)
		out.Types = append(out.Types, cs...)
		if text != "" {
			texts = append(texts, text)
		}
	}
	out.TypeText = strings.Join(texts, "; ")
	for _, nu := range n.OralDiet.Nutrient {
		var x rules.Nutrient
		if nu.Modifier != nil {
			x.Codings, _ = codings(nu.Modifier)
		}
		x.Amount = quantity(nu.Amount)
		out.Nutrients = append(out.Nutrients, x)
	}
	return out, true
}
