// Package fhirmap turns FHIR R4 JSON into rules facts: it recognises
// observations by LOINC, normalises their units through UCUM codes, keeps only
// usable results (and says why the others were rejected), and reads patients,
// medication orders, medications and conditions. It reads raw JSON wherever
// the fhir-models structs would lose or invent data.
package fhirmap

import (
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
// specimen, on which basis mass units convert to moles, and where such a
// result usually comes from.
type measure struct {
	analyte  rules.Analyte
	specimen string
	// molarMass in g/mol converts mg/dL to mmol/L (or µmol/L for creatinine);
	// zero means the code has no mass-unit form halite converts.
	molarMass float64
	display   string
	origin    rules.Origin
}

// Molar masses from IUPAC standard atomic weights (abridged, 2021: C 12.011,
// H 1.008, N 14.007, O 15.999), computed in units_test.go.
const (
	molarMassGlucose    = 180.156 // C6H12O6
	molarMassUrea       = 60.056  // CH4N2O
	molarMassUreaN      = 28.014  // the two N atoms of one urea molecule: BUN is reported as nitrogen mass
	molarMassCreatinine = 113.120 // C4H7N3O
	molarMassUrate      = 168.112 // C5H4N4O3
	molarMassCortisol   = 362.466 // C21H30O5
)

// Sources of the codes and long names below, as noted beside each entry:
//
//	§8      halite's clinical reference notes §8 (verified there, V-A/V-B)
//	VSAC    VSAC eCQM value sets (expansion "eCQM Update 2025-05-08") as
//	        committed in canvas-medical/canvas-plugins,
//	        canvas_sdk/value_set/v2026/laboratory_test.py at 40bb077, with the
//	        value set named: SodiumLabTest, PotassiumLabTest, GlucoseLabTest,
//	        BloodUreaNitrogenLabTest, CreatinineLabTest
//	SSIDL   SSIDL/ssidl-ig, input/fsh/terminologies/pl-lab-loincServiceCode-VS.fsh
//
// Timing- or state-qualified variants (fasting, baseline, pre-meal, nth
// specimen, pre/post dialysis) and 24-h urine amounts (Moles/time, e.g.
// 2956-1, 2829-0: not concentrations) are left out on purpose.

// loinc maps the LOINC codes halite reads (LOINC, Regenstrief).
var loinc = map[string]measure{
	"2951-2":  {rules.Sodium, "serum or plasma", 0, "Sodium [Moles/volume] in Serum or Plasma", rules.Laboratory},               // §8; VSAC SodiumLabTest
	"2947-0":  {rules.Sodium, "blood", 0, "Sodium [Moles/volume] in Blood", rules.Laboratory},                                   // §8; VSAC SodiumLabTest
	"32717-1": {rules.Sodium, "arterial blood", 0, "Sodium [Moles/volume] in Arterial blood", rules.BloodGas},                   // §8; VSAC SodiumLabTest
	"39791-9": {rules.Sodium, "venous blood", 0, "Sodium [Moles/volume] in Venous blood", rules.BloodGas},                       // §8; VSAC SodiumLabTest
	"41657-8": {rules.Sodium, "mixed venous blood", 0, "Sodium [Moles/volume] in Mixed venous blood", rules.BloodGas},           // VSAC SodiumLabTest
	"77139-4": {rules.Sodium, "serum, plasma or blood", 0, "Sodium [Moles/volume] in Serum, Plasma or Blood", rules.Laboratory}, // VSAC SodiumLabTest

	"2823-3":  {rules.Potassium, "serum or plasma", 0, "Potassium [Moles/volume] in Serum or Plasma", rules.Laboratory},               // §8; VSAC PotassiumLabTest
	"6298-4":  {rules.Potassium, "blood", 0, "Potassium [Moles/volume] in Blood", rules.Laboratory},                                   // §8; VSAC PotassiumLabTest
	"32713-0": {rules.Potassium, "arterial blood", 0, "Potassium [Moles/volume] in Arterial blood", rules.BloodGas},                   // VSAC PotassiumLabTest
	"39789-3": {rules.Potassium, "venous blood", 0, "Potassium [Moles/volume] in Venous blood", rules.BloodGas},                       // VSAC PotassiumLabTest
	"41656-0": {rules.Potassium, "mixed venous blood", 0, "Potassium [Moles/volume] in Mixed venous blood", rules.BloodGas},           // VSAC PotassiumLabTest
	"77142-8": {rules.Potassium, "serum, plasma or blood", 0, "Potassium [Moles/volume] in Serum, Plasma or Blood", rules.Laboratory}, // VSAC PotassiumLabTest

	"2345-7":   {rules.Glucose, "serum or plasma", molarMassGlucose, "Glucose [Mass/volume] in Serum or Plasma", rules.Laboratory},                 // §8; VSAC GlucoseLabTest
	"14749-6":  {rules.Glucose, "serum or plasma", molarMassGlucose, "Glucose [Moles/volume] in Serum or Plasma", rules.Laboratory},                // §8; VSAC GlucoseLabTest
	"2339-0":   {rules.Glucose, "blood", molarMassGlucose, "Glucose [Mass/volume] in Blood", rules.Laboratory},                                     // §8; VSAC GlucoseLabTest
	"15074-8":  {rules.Glucose, "blood", molarMassGlucose, "Glucose [Moles/volume] in Blood", rules.Laboratory},                                    // §8; VSAC GlucoseLabTest
	"74774-1":  {rules.Glucose, "serum, plasma or blood", molarMassGlucose, "Glucose [Mass/volume] in Serum, Plasma or Blood", rules.Laboratory},   // VSAC GlucoseLabTest
	"77135-2":  {rules.Glucose, "serum, plasma or blood", molarMassGlucose, "Glucose [Moles/volume] in Serum, Plasma or Blood", rules.Laboratory},  // VSAC GlucoseLabTest
	"41651-1":  {rules.Glucose, "arterial blood", molarMassGlucose, "Glucose [Mass/volume] in Arterial blood", rules.BloodGas},                     // VSAC GlucoseLabTest
	"39481-7":  {rules.Glucose, "arterial blood", molarMassGlucose, "Glucose [Moles/volume] in Arterial blood", rules.BloodGas},                    // VSAC GlucoseLabTest
	"41652-9":  {rules.Glucose, "venous blood", molarMassGlucose, "Glucose [Mass/volume] in Venous blood", rules.BloodGas},                         // VSAC GlucoseLabTest
	"39480-9":  {rules.Glucose, "venous blood", molarMassGlucose, "Glucose [Moles/volume] in Venous blood", rules.BloodGas},                        // VSAC GlucoseLabTest
	"104655-6": {rules.Glucose, "mixed venous blood", molarMassGlucose, "Glucose [Mass/volume] in Mixed venous blood", rules.BloodGas},             // VSAC GlucoseLabTest
	"100746-7": {rules.Glucose, "mixed venous blood", molarMassGlucose, "Glucose [Moles/volume] in Mixed venous blood", rules.BloodGas},            // VSAC GlucoseLabTest
	"32016-8":  {rules.Glucose, "capillary blood", molarMassGlucose, "Glucose [Mass/volume] in Capillary blood", rules.Laboratory},                 // VSAC GlucoseLabTest
	"51596-5":  {rules.Glucose, "capillary blood", molarMassGlucose, "Glucose [Moles/volume] in Capillary blood", rules.Laboratory},                // VSAC GlucoseLabTest
	"41653-7":  {rules.Glucose, "capillary blood", molarMassGlucose, "Glucose [Mass/volume] in Capillary blood by Glucometer", rules.PointOfCare},  // VSAC GlucoseLabTest
	"14743-9":  {rules.Glucose, "capillary blood", molarMassGlucose, "Glucose [Moles/volume] in Capillary blood by Glucometer", rules.PointOfCare}, // VSAC GlucoseLabTest
	"104597-0": {rules.Glucose, "venous blood", molarMassGlucose, "Glucose [Mass/volume] in Venous blood by Glucometer", rules.PointOfCare},        // VSAC GlucoseLabTest
	"104598-8": {rules.Glucose, "arterial blood", molarMassGlucose, "Glucose [Mass/volume] in Arterial blood by Glucometer", rules.PointOfCare},    // VSAC GlucoseLabTest
	"2340-8":   {rules.Glucose, "blood", molarMassGlucose, "Glucose [Mass/volume] in Blood by Automated test strip", rules.PointOfCare},            // VSAC GlucoseLabTest
	"72516-8":  {rules.Glucose, "blood", molarMassGlucose, "Glucose [Moles/volume] in Blood by Automated test strip", rules.PointOfCare},           // VSAC GlucoseLabTest
	"2341-6":   {rules.Glucose, "blood", molarMassGlucose, "Glucose [Mass/volume] in Blood by Test strip manual", rules.PointOfCare},               // VSAC GlucoseLabTest

	// Urea nitrogen codes convert on the nitrogen mass (molarMassUreaN), urea
	// codes on urea (molarMassUrea); see the MIRACUM warning in §8.
	"3094-0": {rules.Urea, "serum or plasma", molarMassUreaN, "Urea nitrogen [Mass/volume] in Serum or Plasma", rules.Laboratory}, // §8; VSAC BloodUreaNitrogenLabTest
	// 14937-7 is "Urea nitrogen [Moles/volume]"; in mmol/L it is numerically
	// urea in mmol/L (one urea molecule per two nitrogen atoms reported as
	// one mole of urea) — common practice in laboratories reporting SI units.
	// The same holds for 59570-2 in blood.
	"14937-7": {rules.Urea, "serum or plasma", molarMassUreaN, "Urea nitrogen [Moles/volume] in Serum or Plasma", rules.Laboratory},  // §8; VSAC BloodUreaNitrogenLabTest
	"6299-2":  {rules.Urea, "blood", molarMassUreaN, "Urea nitrogen [Mass/volume] in Blood", rules.Laboratory},                       // VSAC BloodUreaNitrogenLabTest
	"59570-2": {rules.Urea, "blood", molarMassUreaN, "Urea nitrogen [Moles/volume] in Blood", rules.Laboratory},                      // VSAC BloodUreaNitrogenLabTest
	"12961-9": {rules.Urea, "arterial blood", molarMassUreaN, "Urea nitrogen [Mass/volume] in Arterial blood", rules.BloodGas},       // VSAC BloodUreaNitrogenLabTest
	"12962-7": {rules.Urea, "venous blood", molarMassUreaN, "Urea nitrogen [Mass/volume] in Venous blood", rules.BloodGas},           // VSAC BloodUreaNitrogenLabTest
	"12963-5": {rules.Urea, "peripheral blood", molarMassUreaN, "Urea nitrogen [Mass/volume] in Peripheral blood", rules.Laboratory}, // VSAC BloodUreaNitrogenLabTest
	"3091-6":  {rules.Urea, "serum or plasma", molarMassUrea, "Urea [Mass/volume] in Serum or Plasma", rules.Laboratory},             // §8
	"22664-7": {rules.Urea, "serum or plasma", molarMassUrea, "Urea [Moles/volume] in Serum or Plasma", rules.Laboratory},            // §8
	"20977-5": {rules.Urea, "blood", molarMassUrea, "Urea [Mass/volume] in Blood", rules.Laboratory},                                 // SSIDL

	"2160-0":   {rules.Creatinine, "serum or plasma", molarMassCreatinine, "Creatinine [Mass/volume] in Serum or Plasma", rules.Laboratory},                // §8; VSAC CreatinineLabTest
	"14682-9":  {rules.Creatinine, "serum or plasma", molarMassCreatinine, "Creatinine [Moles/volume] in Serum or Plasma", rules.Laboratory},               // §8; VSAC CreatinineLabTest
	"38483-4":  {rules.Creatinine, "blood", molarMassCreatinine, "Creatinine [Mass/volume] in Blood", rules.Laboratory},                                    // VSAC CreatinineLabTest
	"59826-8":  {rules.Creatinine, "blood", molarMassCreatinine, "Creatinine [Moles/volume] in Blood", rules.Laboratory},                                   // VSAC CreatinineLabTest
	"77140-2":  {rules.Creatinine, "serum, plasma or blood", molarMassCreatinine, "Creatinine [Moles/volume] in Serum, Plasma or Blood", rules.Laboratory}, // VSAC CreatinineLabTest
	"21232-4":  {rules.Creatinine, "arterial blood", molarMassCreatinine, "Creatinine [Mass/volume] in Arterial blood", rules.BloodGas},                    // VSAC CreatinineLabTest
	"101475-2": {rules.Creatinine, "venous blood", molarMassCreatinine, "Creatinine [Moles/volume] in Venous blood", rules.BloodGas},                       // VSAC CreatinineLabTest

	"2692-2": {rules.SerumOsmolality, "serum or plasma", 0, "Osmolality of Serum or Plasma", rules.Laboratory}, // §8
	"2695-5": {rules.UrineOsmolality, "urine", 0, "Osmolality of Urine", rules.Laboratory},                     // §8
	"2955-3": {rules.UrineSodium, "urine", 0, "Sodium [Moles/volume] in Urine", rules.Laboratory},              // §8
	"2828-2": {rules.UrinePotassium, "urine", 0, "Potassium [Moles/volume] in Urine", rules.Laboratory},        // §8
	// Urine volumes over a collection period (the Observation's
	// effectivePeriod; 3167-4 is 24 h by its name).
	"9187-6":  {rules.UrineVolume, "urine", 0, "Urine output", rules.Laboratory},                                                      // OMOP vocabulary (concept 3014315 "Urine output", LOINC), as mapped in a public concept table; from memory otherwise
	"3167-4":  {rules.UrineVolume, "24 hour urine", 0, "Volume of 24 hour Urine", rules.Laboratory},                                   // HL7 Order Catalog IG, example ObservationDefinition (code loinc#3167-4 "Volume of 24 hour Urine")
	"3084-1":  {rules.Urate, "serum or plasma", molarMassUrate, "Urate [Mass/volume] in Serum or Plasma", rules.Laboratory},           // §8 (V-A)
	"14933-6": {rules.Urate, "serum or plasma", molarMassUrate, "Urate [Moles/volume] in Serum or Plasma", rules.Laboratory},          // §8 (V-A)
	"4544-3":  {rules.Haematocrit, "blood", 0, "Hematocrit [Volume Fraction] of Blood by Automated count", rules.Laboratory},          // §8 (V-B; LOINC's older name)
	"20570-8": {rules.Haematocrit, "blood", 0, "Hematocrit [Volume Fraction] of Blood", rules.Laboratory},                             // §8 (V-B)
	"3086-6":  {rules.UrineUrate, "urine", molarMassUrate, "Urate [Mass/volume] in Urine", rules.Laboratory},                          // §8 (V-A/V-C)
	"14934-4": {rules.UrineUrate, "urine", molarMassUrate, "Urate [Moles/volume] in Urine", rules.Laboratory},                         // §8 (V-A pair of 3086-6)
	"2161-8":  {rules.UrineCreatinine, "urine", molarMassCreatinine, "Creatinine [Mass/volume] in Urine", rules.Laboratory},           // §8 (V-B)
	"14683-7": {rules.UrineCreatinine, "urine", molarMassCreatinine, "Creatinine [Moles/volume] in Urine", rules.Laboratory},          // MIRACUM conversion.tsv pair of 2161-8 (factor 11.31)
	"2965-2":  {rules.UrineSpecificGravity, "urine", 0, "Specific gravity of Urine", rules.Laboratory},                                // several public lab-code tables (unit "1")
	"5811-5":  {rules.UrineSpecificGravity, "urine", 0, "Specific gravity of Urine by Test strip", rules.PointOfCare},                 // a public urinalysis code table ("Specific Gravity"); long name from memory
	"3016-3":  {rules.TSH, "serum or plasma", 0, "Thyrotropin [Units/volume] in Serum or Plasma", rules.Laboratory},                   // several public LOINC mappings agree on the long name
	"2143-6":  {rules.Cortisol, "serum or plasma", molarMassCortisol, "Cortisol [Mass/volume] in Serum or Plasma", rules.Laboratory},  // MIRACUM conversion.tsv (pair 14675-3) and several public mappings
	"14675-3": {rules.Cortisol, "serum or plasma", molarMassCortisol, "Cortisol [Moles/volume] in Serum or Plasma", rules.Laboratory}, // MIRACUM conversion.tsv pair of 2143-6; long name from memory
	"29463-7": {rules.BodyWeight, "", 0, "Body weight", ""},                                                                           // §8
	"8302-2":  {rules.BodyHeight, "", 0, "Body height", ""},                                                                           // §8
}
