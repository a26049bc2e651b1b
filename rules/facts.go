// Package rules is halite's clinical domain: the facts a hook call is judged on,
// the policy data (thresholds, plausibility bounds) with its revision, and the
// rule families that turn facts into findings. It knows nothing of HTTP, FHIR
// or telemetry; fhirmap builds its facts and hooks renders its findings.
package rules

import (
	"math"
	"time"
)

// Analyte names a quantity halite reads from the chart.
type Analyte string

// The analytes halite maps. Values are held in the canonical unit that
// CanonicalUnit returns for each.
const (
	Sodium          Analyte = "sodium"           // serum, plasma or blood
	Potassium       Analyte = "potassium"        // serum, plasma or blood
	Glucose         Analyte = "glucose"          // serum, plasma or blood
	Urea            Analyte = "urea"             // as urea, from urea or urea-nitrogen results
	Creatinine      Analyte = "creatinine"       // serum or plasma
	SerumOsmolality Analyte = "serum-osmolality" // measured
	UrineOsmolality Analyte = "urine-osmolality"
	UrineSodium     Analyte = "urine-sodium"
	UrinePotassium  Analyte = "urine-potassium"
	// UrineVolume is urine output over a charted period (Measurement.PeriodHours).
	UrineVolume Analyte = "urine-volume"
	BodyWeight  Analyte = "body-weight"
	BodyHeight  Analyte = "body-height"
	// Urate is serum or plasma uric acid; Haematocrit the blood's volume
	// fraction of red cells: both bear on volume status (SIADH against
	// salt wasting).
	Urate       Analyte = "urate"
	Haematocrit Analyte = "haematocrit"
	// UrineUrate and UrineCreatinine, with their serum values, give the
	// fractional excretion of urate.
	UrineUrate      Analyte = "urine-urate"
	UrineCreatinine Analyte = "urine-creatinine"
	// UrineSpecificGravity is dimensionless (water = 1.000).
	UrineSpecificGravity Analyte = "urine-specific-gravity"
	// TSH and Cortisol are the thyroid and adrenal results the SIADH
	// criteria ask for; Copeptin the vasopressin surrogate (read only
	// through a site's own codes: no LOINC code for it was verified).
	TSH      Analyte = "tsh"
	Cortisol Analyte = "cortisol"
	Copeptin Analyte = "copeptin"
)

// analyteOrder is the order Analytes reports.
var analyteOrder = [...]Analyte{Sodium, Potassium, Glucose, Urea, Creatinine, SerumOsmolality,
	UrineOsmolality, UrineSodium, UrinePotassium, UrineVolume, BodyWeight, BodyHeight, Urate, Haematocrit,
	UrineUrate, UrineCreatinine, UrineSpecificGravity, TSH, Cortisol, Copeptin}

// Analytes returns every analyte halite maps, in a stable order.
func Analytes() []Analyte { return analyteOrder[:] }

// CanonicalUnit is the UCUM unit in which values of a are held.
func CanonicalUnit(a Analyte) string {
	switch a {
	case Creatinine, Urate, UrineUrate:
		return "umol/L"
	case UrineSpecificGravity:
		return "1"
	case TSH:
		return "m[IU]/L"
	case Cortisol:
		return "nmol/L"
	case Copeptin:
		return "pmol/L"
	case Haematocrit:
		return "%"
	case SerumOsmolality, UrineOsmolality:
		return "mosm/kg"
	case BodyWeight:
		return "kg"
	case UrineVolume:
		return "mL"
	case BodyHeight:
		return "cm"
	default:
		return "mmol/L"
	}
}

// Measurement is one accepted result, in its analyte's canonical unit.
type Measurement struct {
	Analyte  Analyte
	Value    float64
	At       time.Time
	Source   string // resource reference, e.g. "Observation/na-1"
	Code     string // the LOINC code it was recognised by, or a site's "system|code"
	Specimen string // "serum or plasma", "blood", "arterial blood", "urine", …
	// Original is the value and unit as sent, e.g. "136 meq/L", for audit.
	Original string
	// PeriodHours is the period a volume was collected over (urine
	// output); 0 for a measurement at one time. At is then the period's end.
	PeriodHours float64
	Origin      Origin     // laboratory, blood gas or point of care
	Status      string     // the result's status: final, amended or corrected
	Issued      *time.Time // when the result was released, if stated
	// SameTime, when not nil, holds the results of the analyte taken at the
	// same time with other values, and why this one counts (see
	// SameTimePolicy).
	SameTime *Conflict
}

// Rejection records a resource that was read but not used, and why.
type Rejection struct {
	Source  string // resource reference, e.g. "Observation/na-9"
	Analyte Analyte
	Reason  string
}

// Sex is administrative sex as recorded (FHIR AdministrativeGender).
type Sex string

// Recorded sexes; SexMissing means the chart has none.
const (
	SexMissing Sex = ""
	SexMale    Sex = "male"
	SexFemale  Sex = "female"
	SexOther   Sex = "other"
	SexUnknown Sex = "unknown"
)

// Patient holds the demographic facts the rules use. A nil BirthDate or
// SexMissing means the chart did not say; nothing is defaulted.
type Patient struct {
	Reference string
	BirthDate *time.Time
	Sex       Sex
}

// AgeYears is the patient's completed age in whole years at t, and whether the
// birth date is known.
func (p Patient) AgeYears(t time.Time) (int, bool) {
	if p.BirthDate == nil {
		return 0, false
	}
	b := *p.BirthDate
	years := t.Year() - b.Year()
	if t.Month() < b.Month() || (t.Month() == b.Month() && t.Day() < b.Day()) {
		years--
	}
	if years < 0 {
		return 0, false
	}
	return years, true
}

// Coding is a code from a code system.
type Coding struct {
	System  string
	Code    string
	Display string
}

// Quantity is a value with its UCUM unit.
type Quantity struct {
	Value float64
	Unit  string
}

// Ratio is a numerator over a denominator, as in an ingredient strength.
type Ratio struct {
	Numerator   Quantity
	Denominator Quantity
}

// Ingredient is one ingredient of a medication, with its strength when known.
type Ingredient struct {
	Codings  []Coding
	Text     string
	Strength *Ratio
}

// MedicationSource says where a medication's identity was read from.
type MedicationSource string

// Medication identity sources.
const (
	FromCodeableConcept MedicationSource = "codeable-concept"
	FromContained       MedicationSource = "contained-medication"
	FromReferenced      MedicationSource = "referenced-medication"
	FromUnresolved      MedicationSource = "unresolved-reference"
)

// Medication is what an order is for: its codes, text and ingredients.
type Medication struct {
	Source      MedicationSource
	Codings     []Coding
	Text        string
	Form        string
	Ingredients []Ingredient
}

// MedicationOrder is a MedicationRequest reduced to what the rules read.
// Pointers are nil when the order did not say.
type MedicationOrder struct {
	Reference  string // "MedicationRequest/id"
	Status     string
	Intent     string
	AuthoredOn *time.Time
	Medication Medication
	Route      []Coding
	RouteText  string
	Dose       *Quantity
	// RateMlPerHour is the infusion rate normalised to mL/h, when the order's
	// rate unit allows it; Rate keeps the rate as written.
	RateMlPerHour *float64
	Rate          string
	// Duration is the duration of one administration (timing.repeat.duration).
	Duration *Quantity
	// Bounds is the total course (timing.repeat.boundsDuration).
	Bounds *Quantity
	// EndsAt is when the order stops (timing.repeat.boundsPeriod.end).
	EndsAt *time.Time
	// ForRequest, for an administration, is the order it carries out
	// (MedicationAdministration.request).
	ForRequest string
	// GivenAt, for a completed administration, is when the dose was given.
	GivenAt *time.Time
	// Replaces is the order this one replaces (priorPrescription, as
	// "MedicationRequest/id" when the data holds it).
	Replaces         string
	Frequency        *int // administrations per Period
	Period           *Quantity
	DispenseQuantity *Quantity
	Draft            bool // carried in context.draftOrders
	Selected         bool // named in order-select's selections
}

// Condition is a problem-list or encounter diagnosis.
type Condition struct {
	Reference          string
	Codings            []Coding
	Text               string
	ClinicalStatus     string
	VerificationStatus string
	// Onset is the condition's onset (onsetDateTime, or onsetPeriod's
	// start), or failing that its recordedDate; nil when neither is given.
	Onset *time.Time
}

// Procedure is a completed Procedure reduced to what the rules read: its
// codes and when it was performed (a date alone is midnight UTC).
type Procedure struct {
	Reference string
	Codings   []Coding
	Text      string
	At        time.Time
}

// NutritionOrder is a draft NutritionOrder reduced to what the rules read
// of its oral diet: the diet types and the nutrients with their amounts
// (a fluid restriction is a type or a fluid nutrient the policy lists).
type NutritionOrder struct {
	Reference   string
	Types       []Coding
	TypeText    string
	Nutrients   []Nutrient
	Instruction string
	Selected    bool // named in order-select's selections (all at order-sign)
}

// Nutrient is one oralDiet.nutrient: what (modifier) and how much.
type Nutrient struct {
	Codings []Coding
	Amount  *Quantity
}

// DataGap records a source of facts halite could not read, so findings can
// say what they could not check.
type DataGap struct {
	Source string // a prefetch key, e.g. "chemistry"
	Reason string
}

// Facts is everything one hook call is judged on.
type Facts struct {
	At          time.Time
	Patient     Patient
	Labs        map[Analyte][]Measurement // each series ordered by time, oldest first
	Rejected    []Rejection
	Medications []MedicationOrder // active orders already on the chart
	// Infusing are in-progress MedicationAdministrations: what runs now.
	Infusing []MedicationOrder
	// Given are completed MedicationAdministrations: doses given, each
	// with its time.
	Given       []MedicationOrder
	DraftOrders []MedicationOrder // orders being selected or signed
	// DraftNutrition are the draft NutritionOrders of the call.
	DraftNutrition []NutritionOrder
	Conditions     []Condition
	Procedures     []Procedure
	Gaps           []DataGap
	Notes          []string // data-quality notes that are not rejections
}

// everyOrder is every order of the facts: active orders, in-progress
// administrations, then draft orders.
func (f Facts) everyOrder() []MedicationOrder {
	out := make([]MedicationOrder, 0, len(f.Medications)+len(f.Infusing)+len(f.DraftOrders))
	out = append(append(append(out, f.Medications...), f.Infusing...), f.DraftOrders...)
	return out
}

// Round rounds v to the given number of decimals, for display.
func Round(v float64, decimals int) float64 {
	p := math.Pow(10, float64(decimals))
	return math.Round(v*p) / p
}
