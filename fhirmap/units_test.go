package fhirmap

import (
	"sort"
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

func TestLOINCCodes(t *testing.T) {
	for _, a := range rules.Analytes() {
		codes := LOINCCodes(a)
		if len(codes) == 0 {
			t.Errorf("LOINCCodes(%s) is empty", a)
		}
		if !sort.StringsAreSorted(codes) {
			t.Errorf("LOINCCodes(%s) = %v, not sorted", a, codes)
		}
	}
	// LOINC sodium codes (Regenstrief), verified in halite's clinical
	// reference notes §8 (source V-B): 2951-2 serum/plasma, 2947-0 blood,
	// 32717-1 arterial blood, 39791-9 venous blood; and in the VSAC Sodium
	// Lab Test value set (codes.go): 41657-8 mixed venous blood, 77139-4
	// serum, plasma or blood.
	want := []string{"2947-0", "2951-2", "32717-1", "39791-9", "41657-8", "77139-4"}
	got := LOINCCodes(rules.Sodium)
	if len(got) != len(want) {
		t.Fatalf("LOINCCodes(sodium) = %v, want %v", got, want)
	}
	for i := range want {
		if got[i] != want[i] {
			t.Fatalf("LOINCCodes(sodium) = %v, want %v", got, want)
		}
	}
}

func TestToCanonicalAccepted(t *testing.T) {
	sodium := []string{"2951-2", "2947-0", "32717-1", "39791-9", "41657-8", "77139-4"}
	potassium := []string{"2823-3", "6298-4", "32713-0", "39789-3", "41656-0", "77142-8"}
	glucose := []string{"2345-7", "14749-6", "2339-0", "15074-8", "74774-1", "77135-2", "41651-1", "39481-7",
		"41652-9", "39480-9", "104655-6", "100746-7", "32016-8", "51596-5", "41653-7", "14743-9",
		"104597-0", "104598-8", "2340-8", "72516-8", "2341-6"}
	bun := []string{"3094-0", "14937-7", "6299-2", "59570-2", "12961-9", "12962-7", "12963-5"}
	urea := []string{"3091-6", "22664-7", "20977-5"}
	creatinine := []string{"2160-0", "14682-9", "38483-4", "59826-8", "77140-2", "21232-4", "101475-2"}
	tests := []struct {
		name  string
		codes []string
		unit  string
		in    float64
		want  float64
		tol   float64
	}{
		// Electrolytes: meq/L = mmol/L for monovalent ions (UCUM).
		{"Na mmol/L", sodium, "mmol/L", 140, 140, 1e-9},                // identity, UCUM
		{"Na meq/L", sodium, "meq/L", 140, 140, 1e-9},                  // meq/L = mmol/L monovalent, UCUM
		{"Na mEq/L synonym", sodium, "mEq/L", 140, 140, 1e-9},          // meq/L = mmol/L monovalent, UCUM
		{"Na meq/l synonym", sodium, "meq/l", 140, 140, 1e-9},          // meq/L = mmol/L monovalent, UCUM
		{"Na mmol/l synonym", sodium, "mmol/l", 140, 140, 1e-9},        // identity, UCUM
		{"K mmol/L", potassium, "mmol/L", 4.2, 4.2, 1e-9},              // identity, UCUM
		{"K mEq/L", potassium, "mEq/L", 4.2, 4.2, 1e-9},                // meq/L = mmol/L monovalent, UCUM
		{"urine Na meq/L", []string{"2955-3"}, "meq/L", 48, 48, 1e-9},  // meq/L = mmol/L, UCUM
		{"urine K mmol/L", []string{"2828-2"}, "mmol/L", 30, 30, 1e-9}, // identity, UCUM
		{"urine K mEq/L", []string{"2828-2"}, "mEq/L", 30, 30, 1e-9},   // meq/L = mmol/L, UCUM

		// Glucose.
		{"glucose mmol/L", glucose, "mmol/L", 14.2, 14.2, 1e-9},                     // identity, UCUM
		{"glucose mg/dL", glucose, "mg/dL", 612, 33.97, 0.005},                      // 612×10/180.156 (IUPAC molar mass)
		{"glucose mg/dl synonym", glucose, "mg/dl", 612, 33.97, 0.005},              // 612×10/180.156 (IUPAC)
		{"glucose 100 mg/dL published", glucose, "mg/dL", 100, 100 / 18.016, 0.001}, // published check value ÷18.016
		{"glucose 100 mg/dL MIRACUM", glucose, "mg/dL", 100, 100 / 18.02, 0.002},    // MIRACUM loinc-conversion data/conversion.tsv factor 18.02
		{"glucose 180.156 mg/dL is 10 mmol/L", glucose, "mg/dL", 180.156, 10, 1e-9}, // definition of molar mass (IUPAC)

		// Urea nitrogen (BUN) and urea; canonical is mmol/L of urea.
		{"BUN mg/dL", bun, "mg/dL", 28, 9.995, 0.0005},                 // 28×10/28.014 (2 N per urea, IUPAC)
		{"BUN mg/dL published", bun, "mg/dL", 28, 28 / 2.801, 0.005},   // published check value 1 mmol/L urea = 2.801 mg/dL BUN
		{"BUN mg/dl synonym", bun, "mg/dl", 28, 9.995, 0.0005},         // 28×10/28.014 (IUPAC)
		{"BUN mmol/L", bun, "mmol/L", 10, 10, 1e-9},                    // SI urea reporting, common practice (codes.go comment)
		{"urea mg/dL published", urea, "mg/dL", 60, 60 / 6.006, 0.005}, // published check value 6.006 mg/dL per mmol/L
		{"urea mg/dL", urea, "mg/dL", 60.056, 10, 1e-9},                // definition of molar mass, IUPAC 60.056
		{"urea mmol/L", urea, "mmol/L", 7.1, 7.1, 1e-9},                // identity, UCUM

		// Creatinine, canonical µmol/L.
		{"creatinine mg/dL", creatinine, "mg/dL", 1.0, 88.40, 0.005},              // published 88.4 µmol/L per mg/dL
		{"creatinine mg/dL MIRACUM", creatinine, "mg/dL", 1.0, 1 / 0.01131, 0.05}, // MIRACUM loinc-conversion data/conversion.tsv: 0.01131 mg/dL per µmol/L
		{"creatinine umol/L", creatinine, "umol/L", 80, 80, 1e-9},                 // identity, UCUM
		{"creatinine µmol/L synonym", creatinine, "µmol/L", 80, 80, 1e-9},         // µ = micro, UCUM code "u"
		{"creatinine umol/l synonym", creatinine, "umol/l", 80, 80, 1e-9},         // identity, UCUM
		{"creatinine mmol/L", creatinine, "mmol/L", 0.08, 80, 1e-9},               // 1 mmol = 1000 µmol, UCUM prefixes

		// Osmolality, canonical mosm/kg.
		{"serum osm mosm/kg", []string{"2692-2"}, "mosm/kg", 290, 290, 1e-9},           // identity, UCUM
		{"serum osm mOsm/kg", []string{"2692-2"}, "mOsm/kg", 290, 290, 1e-9},           // same unit, case variant (common practice)
		{"serum osm mmol/kg", []string{"2692-2"}, "mmol/kg", 290, 290, 1e-9},           // osmole of ideal solutes = mole, common practice
		{"serum osm mosm/kg{H2O}", []string{"2692-2"}, "mosm/kg{H2O}", 290, 290, 1e-9}, // UCUM annotation {H2O} has no value
		{"urine osm mOsm/kg{H2O}", []string{"2695-5"}, "mOsm/kg{H2O}", 420, 420, 1e-9}, // UCUM annotation {H2O} has no value
		{"urine osm mosm/kg", []string{"2695-5"}, "mosm/kg", 180, 180, 1e-9},           // identity, UCUM

		// Body weight, canonical kg.
		{"weight kg", []string{"29463-7"}, "kg", 62, 62, 1e-9},                                // identity, UCUM
		{"weight g", []string{"29463-7"}, "g", 21000, 21, 1e-9},                               // 1 kg = 1000 g, UCUM prefixes
		{"weight [lb_av]", []string{"29463-7"}, "[lb_av]", 145.5, 65.9977, 0.00005},           // UCUM: 1 [lb_av] = 0.45359237 kg
		{"weight 1 [lb_av]", []string{"29463-7"}, "[lb_av]", 1, 7000 * 64.79891 / 1e6, 1e-12}, // UCUM: 7000 [gr] × 64.79891 mg

		// Body height, canonical cm.
		{"height cm", []string{"8302-2"}, "cm", 178, 178, 1e-9},           // identity, UCUM
		{"height m", []string{"8302-2"}, "m", 1.16, 116, 1e-9},            // 1 m = 100 cm, UCUM prefixes
		{"height mm", []string{"8302-2"}, "mm", 1650, 165, 1e-9},          // 10 mm = 1 cm, UCUM prefixes
		{"height [in_i]", []string{"8302-2"}, "[in_i]", 64, 162.56, 1e-9}, // UCUM: [in_i] = 2.54 cm
	}
	covered := map[string]bool{}
	for _, tt := range tests {
		for _, code := range tt.codes {
			covered[code] = true
			t.Run(tt.name+"/"+code, func(t *testing.T) {
				m, ok := loinc[code]
				if !ok {
					t.Fatalf("LOINC %s is not in the table", code)
				}
				got, err := toCanonical(m, tt.in, tt.unit)
				if err != nil {
					t.Fatalf("toCanonical(%s, %v %q): %v", code, tt.in, tt.unit, err)
				}
				if !near(got, tt.want, tt.tol) {
					t.Errorf("toCanonical(%s, %v %q) = %.6f, want %.6f ± %g", code, tt.in, tt.unit, got, tt.want, tt.tol)
				}
			})
		}
	}
	// Every LOINC code halite reads must have at least one conversion case.
	for code := range loinc {
		if !covered[code] {
			t.Errorf("LOINC %s has no toCanonical case", code)
		}
	}
}

func TestToCanonicalRejected(t *testing.T) {
	tests := []struct {
		name    string
		code    string
		unit    string
		wantErr string
	}{
		{"sodium mg/dL", "2951-2", "mg/dL", `unit "mg/dL" is not one halite converts for sodium`},
		{"sodium mmol/dL", "2951-2", "mmol/dL", `unit "mmol/dL" is not one halite converts for sodium`}, // scenario 07 bad unit
		{"sodium empty unit", "2951-2", "", "no unit"},
		{"sodium MMOL/L case", "2951-2", "MMOL/L", `unit "MMOL/L" is not one halite converts for sodium`}, // UCUM is case-sensitive
		{"sodium mEq/dL", "2951-2", "mEq/dL", `unit "mEq/dL" is not one halite converts for sodium`},
		{"potassium mg/dL", "2823-3", "mg/dL", `unit "mg/dL" is not one halite converts for potassium`},
		{"glucose umol/L", "2345-7", "umol/L", `unit "umol/L" is not one halite converts for glucose`},
		{"glucose g/L", "2345-7", "g/L", `unit "g/L" is not one halite converts for glucose`},
		{"glucose empty unit", "2345-7", "", "no unit"},
		{"urea meq/L", "3094-0", "meq/L", `unit "meq/L" is not one halite converts for urea`},
		{"creatinine meq/L", "2160-0", "meq/L", `unit "meq/L" is not one halite converts for creatinine`},
		{"serum osm mosm/L", "2692-2", "mosm/L", `unit "mosm/L" is not one halite converts for serum-osmolality`}, // osmolarity is not osmolality
		{"weight lb (not UCUM)", "29463-7", "lb", `unit "lb" is not one halite converts for body-weight`},
		{"weight [LB_AV] case", "29463-7", "[LB_AV]", `unit "[LB_AV]" is not one halite converts for body-weight`},
		{"weight cm", "29463-7", "cm", `unit "cm" is not one halite converts for body-weight`},
		{"height in (not UCUM)", "8302-2", "in", `unit "in" is not one halite converts for body-height`},
		{"height kg", "8302-2", "kg", `unit "kg" is not one halite converts for body-height`},
		{"height empty", "8302-2", "", "no unit"},
		{"urine Na mg/dL", "2955-3", "mg/dL", `unit "mg/dL" is not one halite converts for urine-sodium`},
		{"urine Na 24-h amount", "2955-3", "mmol/(24.h)", `unit "mmol/(24.h)" is not one halite converts for urine-sodium`}, // amount per day, not a concentration
		{"arterial K mg/dL", "32713-0", "mg/dL", `unit "mg/dL" is not one halite converts for potassium`},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := toCanonical(loinc[tt.code], 1, tt.unit)
			if err == nil {
				t.Fatalf("toCanonical(%s, 1 %q) = %v, want error %q", tt.code, tt.unit, got, tt.wantErr)
			}
			if err.Error() != tt.wantErr {
				t.Errorf("error %q, want %q", err, tt.wantErr)
			}
		})
	}
}
