package fhirmap

import (
	"sort"
	"strings"
	"testing"

	"github.com/halite-cds/halite/rules"
)

// IUPAC standard atomic weights (abridged, 2021), g/mol.
const (
	awC = 12.011 // IUPAC 2021 abridged
	awH = 1.008  // IUPAC 2021 abridged
	awN = 14.007 // IUPAC 2021 abridged
	awO = 15.999 // IUPAC 2021 abridged
)

func TestMolarMassesMatchIUPAC(t *testing.T) {
	tests := []struct {
		name string
		got  float64
		want float64
	}{
		{"glucose C6H12O6", molarMassGlucose, 6*awC + 12*awH + 6*awO}, // IUPAC 2021 abridged weights
		{"urea CH4N2O", molarMassUrea, awC + 4*awH + 2*awN + awO},     // IUPAC 2021 abridged weights
		{"urea nitrogen 2 N", molarMassUreaN, 2 * awN},                // 2 N per urea molecule, IUPAC 2021 = 28.014
		{"creatinine C4H7N3O", molarMassCreatinine, 4*awC + 7*awH + 3*awN + awO},
		{"urate C5H4N4O3", molarMassUrate, 5*awC + 4*awH + 4*awN + 3*awO},
		{"cortisol C21H30O5", molarMassCortisol, 21*awC + 30*awH + 5*awO},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if !near(tt.got, tt.want, 0.01) {
				t.Errorf("codes.go has %.3f g/mol, IUPAC weights give %.3f", tt.got, tt.want)
			}
		})
	}
	// Published check value: glucose MW 180.16 (mg/dL ÷ 18.016 ≈ mmol/L).
	if !near(molarMassGlucose, 180.16, 0.01) {
		t.Errorf("glucose molar mass %.3f, published 180.16", molarMassGlucose)
	}
}

// TestLOINCMolarMass checks which molar mass each mass-convertible code uses:
// urea-nitrogen codes convert on the nitrogen mass, urea codes on urea.
func TestLOINCMolarMass(t *testing.T) {
	tests := []struct {
		code string
		want float64
	}{
		{"2345-7", 180.156},  // glucose, IUPAC 2021 (C6H12O6)
		{"14749-6", 180.156}, // glucose, IUPAC 2021
		{"2339-0", 180.156},  // glucose, IUPAC 2021
		{"15074-8", 180.156}, // glucose, IUPAC 2021
		{"3094-0", 28.014},   // urea nitrogen: 2 N per urea molecule, IUPAC 2021
		{"14937-7", 28.014},  // urea nitrogen: 2 N per urea molecule, IUPAC 2021
		{"6299-2", 28.014},   // urea nitrogen in blood: 2 N per urea molecule, IUPAC 2021
		{"59570-2", 28.014},  // urea nitrogen in blood: 2 N per urea molecule, IUPAC 2021
		{"3091-6", 60.056},   // urea, IUPAC 2021 (CH4N2O)
		{"22664-7", 60.056},  // urea, IUPAC 2021
		{"20977-5", 60.056},  // urea in blood, IUPAC 2021 (CH4N2O)
		{"38483-4", 113.120}, // creatinine in blood, IUPAC 2021 (C4H7N3O)
		{"2160-0", 113.120},  // creatinine, IUPAC 2021 (C4H7N3O)
		{"14682-9", 113.120}, // creatinine, IUPAC 2021
		{"3084-1", 168.112},  // urate, IUPAC 2021 (C5H4N4O3)
		{"14933-6", 168.112}, // urate, IUPAC 2021
		{"2951-2", 0},        // sodium: no mass-unit form (codes.go contract)
	}
	for _, tt := range tests {
		m, ok := loinc[tt.code]
		if !ok {
			t.Errorf("%s is not in the LOINC table", tt.code)
			continue
		}
		if !near(m.molarMass, tt.want, 0.01) {
			t.Errorf("%s molar mass %.3f, want %.3f", tt.code, m.molarMass, tt.want)
		}
	}
}

func TestSearchTokens(t *testing.T) {
	codes := BuiltinCodes()
	for _, a := range rules.Analytes() {
		tokens := codes.SearchTokens(a)
		if a == rules.Copeptin {
			// no LOINC code for copeptin was verified: a site's own codes only
			if len(tokens) != 0 {
				t.Errorf("SearchTokens(copeptin) = %v without site codes", tokens)
			}
			continue
		}
		if len(tokens) == 0 {
			t.Errorf("SearchTokens(%s) is empty", a)
		}
		if !sort.StringsAreSorted(tokens) {
			t.Errorf("SearchTokens(%s) = %v, not sorted", a, tokens)
		}
	}
	// LOINC sodium codes (Regenstrief), verified in halite's clinical
	// reference notes §8 (source V-B): 2951-2 serum/plasma, 2947-0 blood,
	// 32717-1 arterial blood, 39791-9 venous blood; and in the VSAC Sodium
	// Lab Test value set (codes.go): 41657-8 mixed venous blood, 77139-4
	// serum, plasma or blood.
	var want []string
	for _, c := range []string{"2947-0", "2951-2", "32717-1", "39791-9", "41657-8", "77139-4"} {
		want = append(want, SystemLOINC+"|"+c)
	}
	if got := codes.SearchTokens(rules.Sodium); strings.Join(got, ",") != strings.Join(want, ",") {
		t.Fatalf("SearchTokens(sodium) = %v, want %v", got, want)
	}
}

// TestUrateAndHaematocritUnits: uric acid 4 mg/dL is 0.24 mmol/L, the
// pair in the SIADH supplemental criteria (NDT Plus 2009;2(Suppl 3):iii5,
// Table 1, as in the reference notes §4.3), and 238 µmol/L by the molar
// mass; a haematocrit of 0.45 L/L is 45 %.
func TestUrateAndHaematocritUnits(t *testing.T) {
	for _, c := range []struct {
		code, unit string
		v, want    float64
	}{
		{"3084-1", "mg/dL", 4, 237.94},
		{"14933-6", "umol/L", 240, 240},
		{"14933-6", "mmol/L", 0.24, 240},
		{"20570-8", "%", 45, 45},
		{"4544-3", "L/L", 0.45, 45},
	} {
		got, err := toCanonical(loinc[c.code], c.v, c.unit)
		if err != nil || !near(got, c.want, 0.01) {
			t.Errorf("%s %g %s: %g %v, want %g", c.code, c.v, c.unit, got, err, c.want)
		}
	}
	if near(4*10/molarMassUrate, 0.24, 0.005) == false {
		t.Errorf("4 mg/dL of uric acid is %.3f mmol/L, the criteria pair it with 0.24", 4*10/molarMassUrate)
	}
	if _, err := toCanonical(loinc["20570-8"], 45, "mmol/L"); err == nil {
		t.Error("a haematocrit in mmol/L was accepted")
	}
}

// TestWorkUpUnits checks the conversions of the results added for the
// work-up of water disorders against published factors: the MIRACUM LOINC
// conversion table (miracum/loinc-conversion data/conversion.tsv) pairs
// cortisol 2143-6 ug/dL with 14675-3 nmol/L at 27.586, urine creatinine
// 2161-8 mg/dL with 14683-7 mmol/L at 11.31 and urine urate 3086-6 mg/dL
// with 14934-4 umol/L at 0.01681; TSH in mIU/L equals µIU/mL (UCUM: m = 10⁻³,
// u = 10⁻⁶, L = 10³ mL).
func TestWorkUpUnits(t *testing.T) {
	for _, c := range []struct {
		code, unit   string
		v, want, tol float64
	}{
		{"2143-6", "ug/dL", 14.2, 14.2 * 27.586, 0.2},
		{"2143-6", "µg/dL", 10, 275.86, 0.1},
		{"14675-3", "nmol/L", 400, 400, 1e-9},
		{"2161-8", "mg/dL", 100, 100 / 11.31, 0.005},
		{"14683-7", "mmol/L", 8.8, 8.8, 1e-9},
		{"14683-7", "umol/L", 8800, 8.8, 1e-9},
		{"3086-6", "mg/dL", 40, 40 / 0.01681, 0.5},
		{"14934-4", "umol/L", 2400, 2400, 1e-9},
		{"3016-3", "mIU/L", 2.1, 2.1, 1e-9},
		{"3016-3", "u[IU]/mL", 2.1, 2.1, 1e-9},
		{"2965-2", "", 1.004, 1.004, 1e-9},
		{"2965-2", "1", 1.025, 1.025, 1e-9},
	} {
		got, err := toCanonical(loinc[c.code], c.v, c.unit)
		if err != nil || !near(got, c.want, c.tol) {
			t.Errorf("%s %g %q: %g %v, want %g", c.code, c.v, c.unit, got, err, c.want)
		}
	}
	for _, bad := range []struct{ code, unit string }{{"2143-6", "mmol/L"}, {"3016-3", "mg/dL"}, {"2965-2", "g/mL"}, {"2161-8", "%"}} {
		if _, err := toCanonical(loinc[bad.code], 1, bad.unit); err == nil {
			t.Errorf("%s in %s was accepted", bad.code, bad.unit)
		}
	}
	if _, err := toCanonical(loinc["2951-2"], 140, ""); err == nil {
		t.Error("a sodium without a unit was accepted (only specific gravity is unitless)")
	}
}
