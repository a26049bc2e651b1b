// Package fhirmap turns FHIR R4 JSON into rules facts: it recognises
// observations by LOINC, normalises their units through UCUM codes, keeps only
// usable results (and says why the others were rejected), and reads patients,
// medication orders, medications and conditions. It reads raw JSON wherever
// the fhir-models structs would lose or invent data.
package fhirmap

import (
	"sort"

	"github.com/halite-cds/halite/rules"
)

// Code systems halite recognises.
const (
	SystemLOINC  = "http://loinc.org"
	SystemUCUM   = "http://unitsofmeasure.org"
	SystemRxNorm = "http://www.nlm.nih.gov/research/umls/rxnorm"
	SystemATC    = "http://www.whocc.no/atc"
)

// measure describes how a LOINC code maps: to which analyte, from which
// specimen, and on which basis mass units convert to moles.
type measure struct {
	analyte  rules.Analyte
	specimen string
	// molarMass in g/mol converts mg/dL to mmol/L (or µmol/L for creatinine);
	// zero means the code has no mass-unit form halite converts.
	molarMass float64
	display   string
}

// Molar masses from IUPAC standard atomic weights (abridged, 2021: C 12.011,
// H 1.008, N 14.007, O 15.999), computed in units_test.go.
const (
	molarMassGlucose    = 180.156 // C6H12O6
	molarMassUrea       = 60.056  // CH4N2O
	molarMassUreaN      = 28.014  // the two N atoms of one urea molecule: BUN is reported as nitrogen mass
	molarMassCreatinine = 113.120 // C4H7N3O
)

// loinc maps the LOINC codes halite reads. Sources for codes and long names:
// LOINC (Regenstrief), as listed with their verification in halite's clinical
// reference notes (§8). Codes marked "from memory" there are kept out.
var loinc = map[string]measure{
	"2951-2":  {rules.Sodium, "serum or plasma", 0, "Sodium [Moles/volume] in Serum or Plasma"},
	"2947-0":  {rules.Sodium, "blood", 0, "Sodium [Moles/volume] in Blood"},
	"32717-1": {rules.Sodium, "arterial blood", 0, "Sodium [Moles/volume] in Arterial blood"},
	"39791-9": {rules.Sodium, "venous blood", 0, "Sodium [Moles/volume] in Venous blood"},
	"2823-3":  {rules.Potassium, "serum or plasma", 0, "Potassium [Moles/volume] in Serum or Plasma"},
	"6298-4":  {rules.Potassium, "blood", 0, "Potassium [Moles/volume] in Blood"},
	"2345-7":  {rules.Glucose, "serum or plasma", molarMassGlucose, "Glucose [Mass/volume] in Serum or Plasma"},
	"14749-6": {rules.Glucose, "serum or plasma", molarMassGlucose, "Glucose [Moles/volume] in Serum or Plasma"},
	"2339-0":  {rules.Glucose, "blood", molarMassGlucose, "Glucose [Mass/volume] in Blood"},
	"15074-8": {rules.Glucose, "blood", molarMassGlucose, "Glucose [Moles/volume] in Blood"},
	"3094-0":  {rules.Urea, "serum or plasma", molarMassUreaN, "Urea nitrogen [Mass/volume] in Serum or Plasma"},
	// 14937-7 is "Urea nitrogen [Moles/volume]"; in mmol/L it is numerically
	// urea in mmol/L (one urea molecule per two nitrogen atoms reported as
	// one mole of urea) — common practice in laboratories reporting SI units.
	"14937-7": {rules.Urea, "serum or plasma", molarMassUreaN, "Urea nitrogen [Moles/volume] in Serum or Plasma"},
	"3091-6":  {rules.Urea, "serum or plasma", molarMassUrea, "Urea [Mass/volume] in Serum or Plasma"},
	"22664-7": {rules.Urea, "serum or plasma", molarMassUrea, "Urea [Moles/volume] in Serum or Plasma"},
	"2160-0":  {rules.Creatinine, "serum or plasma", molarMassCreatinine, "Creatinine [Mass/volume] in Serum or Plasma"},
	"14682-9": {rules.Creatinine, "serum or plasma", molarMassCreatinine, "Creatinine [Moles/volume] in Serum or Plasma"},
	"2692-2":  {rules.SerumOsmolality, "serum or plasma", 0, "Osmolality of Serum or Plasma"},
	"2695-5":  {rules.UrineOsmolality, "urine", 0, "Osmolality of Urine"},
	"2955-3":  {rules.UrineSodium, "urine", 0, "Sodium [Moles/volume] in Urine"},
	"2828-2":  {rules.UrinePotassium, "urine", 0, "Potassium [Moles/volume] in Urine"},
	"29463-7": {rules.BodyWeight, "", 0, "Body weight"},
	"8302-2":  {rules.BodyHeight, "", 0, "Body height"},
}

// LOINCCodes returns the LOINC codes that map to analyte a, sorted, for
// building search queries.
func LOINCCodes(a rules.Analyte) []string {
	var out []string
	for code, m := range loinc {
		if m.analyte == a {
			out = append(out, code)
		}
	}
	sort.Strings(out)
	return out
}
