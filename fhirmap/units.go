package fhirmap

import (
	"fmt"

	"github.com/halite-cds/halite/rules"
)

// UCUM definitions used below (UCUM specification, Schadow G, McDonald CJ,
// Regenstrief Institute, table of customary units): [lb_av] = 7000 [gr],
// [gr] = 64.79891 mg, so 1 [lb_av] = 0.45359237 kg exactly; [in_i] = 2.54 cm
// exactly. meq/L equals mmol/L for monovalent ions (Na+, K+).
const (
	kgPerPound = 0.45359237
	cmPerInch  = 2.54
)

// unitSynonyms maps unit strings seen in practice to the UCUM code they mean.
// UCUM codes are case-sensitive; "mEq/L" and "mOsm/kg" are not valid UCUM but
// are what many laboratory systems send in Quantity.unit.
var unitSynonyms = map[string]string{
	"mmol/l":       "mmol/L",
	"meq/l":        "meq/L",
	"mEq/L":        "meq/L",
	"umol/l":       "umol/L",
	"µmol/L":       "umol/L", // U+00B5 micro sign
	"μmol/L":       "umol/L", // U+03BC Greek small mu
	"mg/dl":        "mg/dL",
	"mOsm/kg":      "mosm/kg",
	"mosm/kg{H2O}": "mosm/kg",
	"mOsm/kg{H2O}": "mosm/kg",
	"mIU/L":        "m[IU]/L",
	"mU/L":         "m[IU]/L",
	"uIU/mL":       "u[IU]/mL",
	"µIU/mL":       "u[IU]/mL",
	"μIU/mL":       "u[IU]/mL",
	"ug/dl":        "ug/dL",
	"µg/dL":        "ug/dL",
	"μg/dL":        "ug/dL",
}

// toCanonical converts value v in UCUM unit u, for LOINC measure m, to the
// analyte's canonical unit. It fails for units that do not fit the analyte.
func toCanonical(m measure, v float64, u string) (float64, error) {
	if s, ok := unitSynonyms[u]; ok {
		u = s
	}
	switch m.analyte {
	case rules.Sodium, rules.Potassium, rules.UrineSodium, rules.UrinePotassium:
		switch u {
		case "mmol/L", "meq/L":
			return v, nil
		}
	case rules.Glucose, rules.Urea:
		switch u {
		case "mmol/L":
			return v, nil
		case "mg/dL":
			// mg/dL → mg/L (×10) → mmol/L (÷ g/mol)
			return v * 10 / m.molarMass, nil
		}
	case rules.Haematocrit:
		switch u {
		case "%":
			return v, nil
		case "L/L", "1":
			return v * 100, nil
		}
	case rules.UrineCreatinine:
		switch u {
		case "mmol/L":
			return v, nil
		case "umol/L":
			return v / 1000, nil
		case "mg/dL":
			return v * 10 / m.molarMass, nil
		}
	case rules.UrineSpecificGravity:
		switch u {
		case "1", "{SG}", "":
			return v, nil
		}
	case rules.TSH:
		switch u {
		case "m[IU]/L", "u[IU]/mL":
			return v, nil
		}
	case rules.Cortisol:
		switch u {
		case "nmol/L":
			return v, nil
		case "ug/dL":
			// µg/dL → µg/L (×10) → µmol/L (÷ g/mol) → nmol/L (×1000)
			return v * 10 / m.molarMass * 1000, nil
		}
	case rules.Copeptin:
		switch u {
		case "pmol/L":
			return v, nil
		}
	case rules.Creatinine, rules.Urate, rules.UrineUrate:
		switch u {
		case "umol/L":
			return v, nil
		case "mmol/L":
			return v * 1000, nil
		case "mg/dL":
			return v * 10 / m.molarMass * 1000, nil
		}
	case rules.SerumOsmolality, rules.UrineOsmolality:
		switch u {
		case "mosm/kg", "mmol/kg":
			return v, nil
		}
	case rules.UrineVolume:
		switch u {
		case "mL":
			return v, nil
		case "L":
			return v * 1000, nil
		}
	case rules.BodyWeight:
		switch u {
		case "kg":
			return v, nil
		case "g":
			return v / 1000, nil
		case "[lb_av]":
			return v * kgPerPound, nil
		}
	case rules.BodyHeight:
		switch u {
		case "cm":
			return v, nil
		case "m":
			return v * 100, nil
		case "mm":
			return v / 10, nil
		case "[in_i]":
			return v * cmPerInch, nil
		}
	}
	if u == "" {
		return 0, fmt.Errorf("no unit")
	}
	return 0, fmt.Errorf("unit %q is not one halite converts for %s", u, m.analyte)
}
