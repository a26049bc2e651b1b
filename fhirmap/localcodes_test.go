package fhirmap

import (
	"strings"
	"testing"

	"github.com/halite-cds/halite/rules"
)

// siteSystem is an invented site code system for these tests.
const siteSystem = "http://lab.example.org/codes"

func TestReadLocalCodes(t *testing.T) {
	good := `{"codes":[
	  {"system":"` + siteSystem + `","code":"NA-S","analyte":"sodium","unit":"mmol/L","specimen":"serum or plasma","origin":"laboratory","display":"Sodium, serum"},
	  {"system":"` + siteSystem + `","code":"NA-GAS","analyte":"sodium","unit":"mmol/L","specimen":"arterial blood","origin":"blood gas"},
	  {"system":"` + siteSystem + `","code":"BUN","analyte":"urea-nitrogen","unit":"mg/dL","specimen":"serum or plasma","origin":"laboratory"}]}`
	codes, err := ReadLocalCodes([]byte("\xef\xbb\xbf" + good))
	if err != nil {
		t.Fatalf("ReadLocalCodes: %v", err)
	}
	tokens := strings.Join(codes.SearchTokens(rules.Sodium), ",")
	for _, want := range []string{siteSystem + "|NA-S", siteSystem + "|NA-GAS", SystemLOINC + "|2951-2"} {
		if !strings.Contains(tokens, want) {
			t.Errorf("sodium search tokens %s lack %s", tokens, want)
		}
	}
	if urea := strings.Join(codes.SearchTokens(rules.Urea), ","); !strings.Contains(urea, siteSystem+"|BUN") {
		t.Errorf("urea search tokens %s lack the site's BUN", urea)
	}

	entry := func(members string) string {
		return `{"system":"` + siteSystem + `","code":"X","analyte":"sodium","unit":"mmol/L","specimen":"serum or plasma","origin":"laboratory"` + members + `}`
	}
	for _, tt := range []struct{ name, doc, want string }{
		{"not JSON", `[`, "read local lab codes"},
		{"unknown member", `{"codes":[],"extra":1}`, "unknown field"},
		{"relative system", `{"codes":[{"system":"lab","code":"X","analyte":"sodium","unit":"mmol/L","specimen":"s","origin":"laboratory"}]}`, `system "lab" is not an absolute URI`},
		{"empty code", `{"codes":[{"system":"` + siteSystem + `","analyte":"sodium","unit":"mmol/L","specimen":"s","origin":"laboratory"}]}`, "code is empty"},
		{"unknown analyte", `{"codes":[{"system":"` + siteSystem + `","code":"L","analyte":"lactate","unit":"mmol/L","specimen":"s","origin":"laboratory"}]}`, `analyte "lactate" is not one halite reads`},
		{"body weight", `{"codes":[{"system":"` + siteSystem + `","code":"W","analyte":"body-weight","unit":"kg","specimen":"s","origin":"laboratory"}]}`, "LOINC codes only"},
		{"unit that does not fit", `{"codes":[{"system":"` + siteSystem + `","code":"N","analyte":"sodium","unit":"mg/dL","specimen":"s","origin":"laboratory"}]}`, `unit "mg/dL" is not one halite converts for sodium`},
		{"bad origin", `{"codes":[{"system":"` + siteSystem + `","code":"N","analyte":"sodium","unit":"mmol/L","specimen":"s","origin":"courier"}]}`, `origin "courier"`},
		{"no specimen", `{"codes":[{"system":"` + siteSystem + `","code":"N","analyte":"sodium","unit":"mmol/L","origin":"laboratory"}]}`, "specimen is empty"},
		{"a LOINC code halite reads", `{"codes":[{"system":"` + SystemLOINC + `","code":"2951-2","analyte":"potassium","unit":"mmol/L","specimen":"s","origin":"laboratory"}]}`, "LOINC 2951-2 is already read by halite as sodium"},
		{"listed twice", `{"codes":[` + entry("") + `,` + entry("") + `]}`, "codes[1]: " + siteSystem + "|X is listed twice"},
	} {
		t.Run(tt.name, func(t *testing.T) {
			if _, err := ReadLocalCodes([]byte(tt.doc)); err == nil || !strings.Contains(err.Error(), tt.want) {
				t.Errorf("error %v, want one with %q", err, tt.want)
			}
		})
	}
	// Every problem is named at once.
	_, err = ReadLocalCodes([]byte(`{"codes":[{"system":"lab"},{"system":"` + siteSystem + `","code":"Y","analyte":"x"}]}`))
	if err == nil || !strings.Contains(err.Error(), "codes[0]") || !strings.Contains(err.Error(), "codes[1]") {
		t.Errorf("error %v, want codes[0] and codes[1] named", err)
	}
}

func TestMapLocalCodes(t *testing.T) {
	codes, err := NewCodes([]LocalCode{
		{System: siteSystem, Code: "NA-GAS", Analyte: "sodium", Unit: "mmol/L", Specimen: "arterial blood", Origin: "blood gas"},
		{System: siteSystem, Code: "BUN", Analyte: "urea-nitrogen", Unit: "mg/dL", Specimen: "serum or plasma", Origin: "laboratory"},
		{System: siteSystem, Code: "URIC", Analyte: "urate", Unit: "mg/dL", Specimen: "serum or plasma", Origin: "laboratory"},
	})
	if err != nil {
		t.Fatal(err)
	}
	gas := obsSpec{id: "gas", system: siteSystem, code: "NA-GAS", value: `"valueQuantity":{"value":126}`}.raw()
	bun := obsSpec{id: "bun", system: siteSystem, code: "BUN", value: vq("14", "mg/dL")}.raw()
	// The same coding under another system is not the site's code.
	other := obsSpec{id: "other", system: "http://other.example.org", code: "NA-GAS", value: vq("120", "mmol/L")}.raw()
	uric := obsSpec{id: "uric", system: siteSystem, code: "URIC", value: vq("4", "mg/dL")}.raw()
	in := Input{At: testAt, PatientID: testPatient, Entries: raws(gas, bun, other, uric), Codes: codes}
	f := Map(in, ruleset(t))

	na := f.Labs[rules.Sodium]
	// A result without a unit is read in the unit the site declared.
	if len(na) != 1 || na[0].Value != 126 || na[0].Origin != rules.BloodGas || na[0].Code != siteSystem+"|NA-GAS" || na[0].Specimen != "arterial blood" {
		t.Errorf("sodium %+v, want one blood-gas 126 by the site's NA-GAS", na)
	}
	// Urea nitrogen converts on the nitrogen mass (28.014 g/mol, as 6299-2
	// does; units_test.go): 14 mg/dL × 10 / 28.014 = 4.998 mmol/L urea.
	if u := f.Labs[rules.Urea]; len(u) != 1 || !near(u[0].Value, 14*10/28.014, 1e-9) {
		t.Errorf("urea %+v, want 4.998 mmol/L", u)
	}
	// Uric acid converts on urate's molar mass (168.112 g/mol, units_test.go):
	// 4 mg/dL = 237.9 µmol/L.
	if u := f.Labs[rules.Urate]; len(u) != 1 || !near(u[0].Value, 4*10/168.112*1000, 1e-6) {
		t.Errorf("urate %+v, want 237.9 µmol/L", u)
	}
	// Without the table, none of them is read.
	in.Codes = nil
	if f := Map(in, ruleset(t)); len(f.Labs[rules.Sodium])+len(f.Labs[rules.Urea]) != 0 {
		t.Errorf("built-in table read a site's codes: %+v", f.Labs)
	}
}
