package rules

import (
	"testing"
)

const rxnorm = "http://www.nlm.nih.gov/research/umls/rxnorm"

func loadRuleset(t *testing.T) *Ruleset {
	t.Helper()
	rs, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	return rs
}

// TestSaltMolarMasses recomputes each salt's molar mass from IUPAC standard
// atomic weights (abridged, 2021).
func TestSaltMolarMasses(t *testing.T) {
	const na, k, cl, c, h, o = 22.990, 39.098, 35.45, 12.011, 1.008, 15.999
	want := map[string]float64{
		"sodium chloride":           na + cl,
		"potassium chloride":        k + cl,
		"sodium bicarbonate":        na + h + c + 3*o,
		"sodium lactate":            3*c + 5*h + na + 3*o,             // C3H5NaO3
		"sodium acetate":            2*c + 3*h + na + 2*o,             // C2H3NaO2
		"sodium acetate trihydrate": 2*c + 3*h + na + 2*o + 3*(2*h+o), // C2H3NaO2·3H2O
	}
	for _, s := range salts {
		if w := want[s.names[0]]; !near(s.molarMass, w, 0.01) {
			t.Errorf("%s: %.3f g/mol, IUPAC weights give %.3f", s.names[0], s.molarMass, w)
		}
	}
}

func TestInfusateComposition(t *testing.T) {
	rs := loadRuleset(t)
	gPer100mL := func(v float64) *Ratio {
		return &Ratio{Numerator: Quantity{Value: v, Unit: "g"}, Denominator: Quantity{Value: 100, Unit: "mL"}}
	}
	mgPerML := func(v float64) *Ratio {
		return &Ratio{Numerator: Quantity{Value: v, Unit: "mg"}, Denominator: Quantity{Value: 1, Unit: "mL"}}
	}
	ing := func(code, name string, s *Ratio) Ingredient {
		return Ingredient{Codings: []Coding{{System: rxnorm, Code: code}}, Text: name, Strength: s}
	}
	for _, tc := range []struct {
		name  string
		med   Medication
		na, k float64
		tol   float64
	}{
		// Product codes from the RxNorm extract; values from FDA labels [V].
		{"0.9% by SCD 1807639", Medication{Codings: []Coding{{System: rxnorm, Code: "1807639"}}}, 154, 0, 0},
		{"3% by SCD 730781", Medication{Codings: []Coding{{System: rxnorm, Code: "730781"}}}, 513, 0, 0},
		{"lactated Ringer's by SCD 847630", Medication{Codings: []Coding{{System: rxnorm, Code: "847630"}}}, 130, 4, 0},
		// Ingredient strengths [derived: g/L ÷ g/mol]; 3% NaCl agrees with its
		// FDA label value 513 mEq/L [V] to 0.5.
		{"3 g/100 mL sodium chloride", Medication{Ingredients: []Ingredient{ing("9863", "sodium chloride", gPer100mL(3))}}, 513, 0, 0.5},
		{"0.9% NaCl + KCl 20 mmol/L", Medication{Ingredients: []Ingredient{
			ing("9863", "sodium chloride", gPer100mL(0.9)),
			ing("8591", "potassium chloride", &Ratio{Numerator: Quantity{Value: 20, Unit: "mmol"}, Denominator: Quantity{Value: 1000, Unit: "mL"}}),
		}}, 154, 20, 0.1},
		// Lactated Ringer's from its RxNorm strengths (NaCl 6, sodium lactate
		// 3.1, KCl 0.3 mg/mL): agrees with the label's Na 130, K 4 [V] to 0.5.
		{"lactated Ringer's from strengths", Medication{Ingredients: []Ingredient{
			ing("9863", "sodium chloride", mgPerML(6)), ing("56489", "sodium lactate", mgPerML(3.1)),
			ing("8591", "potassium chloride", mgPerML(0.3)), {Text: "calcium chloride", Strength: mgPerML(0.2)},
		}}, 130, 4, 0.5},
		// Fluids wards run (issue 19), by product code from the RxNorm extract
		// and values from their labels (sources in infusates.json).
		{"multiple electrolytes type 1 by SCD 801109", Medication{Codings: []Coding{{System: rxnorm, Code: "801109"}}}, 140, 5, 0},
		{"8.4% bicarbonate by SCD 1868486", Medication{Codings: []Coding{{System: rxnorm, Code: "1868486"}}}, 1000, 0, 0},
		{"4.2% bicarbonate by SCD 2198792", Medication{Codings: []Coding{{System: rxnorm, Code: "2198792"}}}, 500, 0, 0},
		// A premix's potassium is in the table; its RxNorm name states it
		// again and must not be added twice.
		{"0.9% NaCl + KCl 20 premix by SCD 637551 with its RxNorm name", Medication{Codings: []Coding{{System: rxnorm, Code: "637551",
			Display: "1000 ML potassium chloride 0.02 MEQ/ML / sodium chloride 9 MG/ML Injection"}}}, 154, 20, 0},
		{"D5 0.45% NaCl + KCl 20 premix by SCD 1863605", Medication{Codings: []Coding{{System: rxnorm, Code: "1863605"}}}, 77, 20, 0},
		{"name: isotonic bicarbonate", Medication{Text: "isotonic sodium bicarbonate"}, 150, 0, 0},
		{"name: albumin 5%", Medication{Text: "Albumin 5%"}, 145, 0, 0},
		{"name: plasma-lyte 148", Medication{Text: "Plasma-Lyte 148"}, 140, 5, 0},
		// Names (the fluid table, same label values).
		{"name: 3% saline", Medication{Text: "3% Saline"}, 513, 0, 0},
		{"name: NaCl 0.45%", Medication{Text: "NaCl 0.45%"}, 77, 0, 0},
		{"name: D5W", Medication{Text: "D5W"}, 0, 0, 0},
		{"name with KCl additive", Medication{Text: "0.9% sodium chloride with KCl 20 mmol/L"}, 154, 20, 0},
		{"name from coding display", Medication{Codings: []Coding{{System: rxnorm, Code: "0", Display: "Lactated Ringer's"}}}, 130, 4, 0},
		// A coded base fluid keeps potassium chloride added to it, from an
		// ingredient or from the text (0.9% NaCl 154 [V] + KCl as ordered).
		{"coded 0.9% with a KCl ingredient", Medication{Codings: []Coding{{System: rxnorm, Code: "313002"}}, Ingredients: []Ingredient{
			ing("8591", "potassium chloride", &Ratio{Numerator: Quantity{Value: 40, Unit: "mmol"}, Denominator: Quantity{Value: 1, Unit: "L"}}),
		}}, 154, 40, 0},
		// A coded lactated Ringer's that also lists its own strengths is read
		// from the strengths once, not as the table's K plus the listed KCl.
		{"coded LR with its strengths", Medication{Codings: []Coding{{System: rxnorm, Code: "847630"}}, Ingredients: []Ingredient{
			ing("9863", "sodium chloride", mgPerML(6)), ing("56489", "sodium lactate", mgPerML(3.1)), ing("8591", "potassium chloride", mgPerML(0.3)),
		}}, 130, 4, 0.5},
		{"coded 0.9% with KCl in the text", Medication{Codings: []Coding{{System: rxnorm, Code: "313002"}}, Text: "NS with KCl 40 mmol/L"}, 154, 40, 0},
		// Sodium acetate trihydrate, 136.08 g/mol [derived, IUPAC weights]:
		// 6.8 g/L is 50.0 mmol/L, not the 82.9 the anhydrous salt would give.
		{"sodium acetate trihydrate", Medication{Ingredients: []Ingredient{{Text: "sodium acetate trihydrate", Strength: mgPerML(6.8)}}}, 49.97, 0, 0.01},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c, ok := rs.InfusateComposition(tc.med)
			if !ok {
				t.Fatalf("composition unknown")
			}
			if !near(c.Na, tc.na, tc.tol) || !near(c.K, tc.k, tc.tol) || c.Basis == "" || c.Source == "" {
				t.Errorf("got %+v, want Na %g K %g (±%g)", c, tc.na, tc.k, tc.tol)
			}
		})
	}
	for name, med := range map[string]Medication{
		"unknown text":             {Text: "invented drug"},
		"sertraline":               {Codings: []Coding{{System: rxnorm, Code: "36437"}}},
		"salt without strength":    {Ingredients: []Ingredient{{Text: "sodium chloride"}}},
		"strength in odd units":    {Ingredients: []Ingredient{{Text: "sodium chloride", Strength: &Ratio{Numerator: Quantity{Value: 1, Unit: "tablet"}, Denominator: Quantity{Value: 1, Unit: "mL"}}}}},
		"substring is not a salt":  {Ingredients: []Ingredient{{Text: "disodium chlorideX", Strength: mgPerML(1)}}},
		"unlisted sodium salt":     {Ingredients: []Ingredient{ing("9863", "sodium chloride", mgPerML(5)), {Text: "sodium gluconate", Strength: mgPerML(5)}}},
		"KCl per bag, not per L":   {Text: "0.9% sodium chloride with KCl 20 mmol"},
		"coded fluid, KCl per bag": {Codings: []Coding{{System: rxnorm, Code: "313002"}}, Text: "NS 1 L with KCl 40 mmol"},
		"coded fluid, KCl strength unconvertible": {Codings: []Coding{{System: rxnorm, Code: "313002"}},
			Ingredients: []Ingredient{{Text: "potassium chloride", Strength: &Ratio{Numerator: Quantity{Value: 1, Unit: "vial"}, Denominator: Quantity{Value: 1, Unit: "L"}}}}},
	} {
		if c, ok := rs.InfusateComposition(med); ok {
			t.Errorf("%s: got %+v, want unknown (never guessed)", name, c)
		}
	}
}

func TestFluidTableCodesAreUnique(t *testing.T) {
	if _, err := parseFluids([]byte(`{"note":"","fluids":[{"id":"a","rxnorm":["1"],"na":1,"source":"s"},{"id":"b","rxnorm":["1"],"na":1,"source":"s"}]}`)); err == nil {
		t.Error("a code listed twice was accepted")
	}
}
