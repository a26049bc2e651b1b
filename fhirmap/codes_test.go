package fhirmap

import (
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/rules"
)

// TestLOINCTable checks every entry against the LOINC long common name
// confirmed for it (sources as in codes.go: §8 = clinical reference notes §8;
// VSAC = canvas-medical/canvas-plugins canvas_sdk/value_set/v2026/
// laboratory_test.py, eCQM Update 2025-05-08; SSIDL = SSIDL/ssidl-ig
// input/fsh/terminologies/pl-lab-loincServiceCode-VS.fsh), and its analyte,
// specimen, molar mass and source.
func TestLOINCTable(t *testing.T) {
	tests := []struct {
		code      string
		display   string
		analyte   rules.Analyte
		specimen  string
		molarMass float64
		origin    rules.Origin
	}{
		{"2951-2", "Sodium [Moles/volume] in Serum or Plasma", rules.Sodium, "serum or plasma", 0, rules.Laboratory},                // §8, VSAC
		{"2947-0", "Sodium [Moles/volume] in Blood", rules.Sodium, "blood", 0, rules.Laboratory},                                    // §8, VSAC
		{"32717-1", "Sodium [Moles/volume] in Arterial blood", rules.Sodium, "arterial blood", 0, rules.BloodGas},                   // §8, VSAC; blood gas: common practice
		{"39791-9", "Sodium [Moles/volume] in Venous blood", rules.Sodium, "venous blood", 0, rules.BloodGas},                       // §8, VSAC; blood gas: common practice
		{"41657-8", "Sodium [Moles/volume] in Mixed venous blood", rules.Sodium, "mixed venous blood", 0, rules.BloodGas},           // VSAC; blood gas: common practice
		{"77139-4", "Sodium [Moles/volume] in Serum, Plasma or Blood", rules.Sodium, "serum, plasma or blood", 0, rules.Laboratory}, // VSAC

		{"2823-3", "Potassium [Moles/volume] in Serum or Plasma", rules.Potassium, "serum or plasma", 0, rules.Laboratory},                // §8, VSAC
		{"6298-4", "Potassium [Moles/volume] in Blood", rules.Potassium, "blood", 0, rules.Laboratory},                                    // §8, VSAC
		{"32713-0", "Potassium [Moles/volume] in Arterial blood", rules.Potassium, "arterial blood", 0, rules.BloodGas},                   // VSAC
		{"39789-3", "Potassium [Moles/volume] in Venous blood", rules.Potassium, "venous blood", 0, rules.BloodGas},                       // VSAC
		{"41656-0", "Potassium [Moles/volume] in Mixed venous blood", rules.Potassium, "mixed venous blood", 0, rules.BloodGas},           // VSAC
		{"77142-8", "Potassium [Moles/volume] in Serum, Plasma or Blood", rules.Potassium, "serum, plasma or blood", 0, rules.Laboratory}, // VSAC

		{"2345-7", "Glucose [Mass/volume] in Serum or Plasma", rules.Glucose, "serum or plasma", 180.156, rules.Laboratory},                  // §8, VSAC; IUPAC 2021
		{"14749-6", "Glucose [Moles/volume] in Serum or Plasma", rules.Glucose, "serum or plasma", 180.156, rules.Laboratory},                // §8, VSAC
		{"2339-0", "Glucose [Mass/volume] in Blood", rules.Glucose, "blood", 180.156, rules.Laboratory},                                      // §8, VSAC
		{"15074-8", "Glucose [Moles/volume] in Blood", rules.Glucose, "blood", 180.156, rules.Laboratory},                                    // §8, VSAC
		{"74774-1", "Glucose [Mass/volume] in Serum, Plasma or Blood", rules.Glucose, "serum, plasma or blood", 180.156, rules.Laboratory},   // VSAC
		{"77135-2", "Glucose [Moles/volume] in Serum, Plasma or Blood", rules.Glucose, "serum, plasma or blood", 180.156, rules.Laboratory},  // VSAC
		{"41651-1", "Glucose [Mass/volume] in Arterial blood", rules.Glucose, "arterial blood", 180.156, rules.BloodGas},                     // VSAC
		{"39481-7", "Glucose [Moles/volume] in Arterial blood", rules.Glucose, "arterial blood", 180.156, rules.BloodGas},                    // VSAC
		{"41652-9", "Glucose [Mass/volume] in Venous blood", rules.Glucose, "venous blood", 180.156, rules.BloodGas},                         // VSAC
		{"39480-9", "Glucose [Moles/volume] in Venous blood", rules.Glucose, "venous blood", 180.156, rules.BloodGas},                        // VSAC
		{"104655-6", "Glucose [Mass/volume] in Mixed venous blood", rules.Glucose, "mixed venous blood", 180.156, rules.BloodGas},            // VSAC
		{"100746-7", "Glucose [Moles/volume] in Mixed venous blood", rules.Glucose, "mixed venous blood", 180.156, rules.BloodGas},           // VSAC
		{"32016-8", "Glucose [Mass/volume] in Capillary blood", rules.Glucose, "capillary blood", 180.156, rules.Laboratory},                 // VSAC; no method in the name
		{"51596-5", "Glucose [Moles/volume] in Capillary blood", rules.Glucose, "capillary blood", 180.156, rules.Laboratory},                // VSAC; no method in the name
		{"41653-7", "Glucose [Mass/volume] in Capillary blood by Glucometer", rules.Glucose, "capillary blood", 180.156, rules.PointOfCare},  // VSAC
		{"14743-9", "Glucose [Moles/volume] in Capillary blood by Glucometer", rules.Glucose, "capillary blood", 180.156, rules.PointOfCare}, // VSAC
		{"104597-0", "Glucose [Mass/volume] in Venous blood by Glucometer", rules.Glucose, "venous blood", 180.156, rules.PointOfCare},       // VSAC
		{"104598-8", "Glucose [Mass/volume] in Arterial blood by Glucometer", rules.Glucose, "arterial blood", 180.156, rules.PointOfCare},   // VSAC
		{"2340-8", "Glucose [Mass/volume] in Blood by Automated test strip", rules.Glucose, "blood", 180.156, rules.PointOfCare},             // VSAC
		{"72516-8", "Glucose [Moles/volume] in Blood by Automated test strip", rules.Glucose, "blood", 180.156, rules.PointOfCare},           // VSAC
		{"2341-6", "Glucose [Mass/volume] in Blood by Test strip manual", rules.Glucose, "blood", 180.156, rules.PointOfCare},                // VSAC

		{"3094-0", "Urea nitrogen [Mass/volume] in Serum or Plasma", rules.Urea, "serum or plasma", 28.014, rules.Laboratory},    // §8, VSAC; 2 N, IUPAC 2021
		{"14937-7", "Urea nitrogen [Moles/volume] in Serum or Plasma", rules.Urea, "serum or plasma", 28.014, rules.Laboratory},  // §8, VSAC
		{"6299-2", "Urea nitrogen [Mass/volume] in Blood", rules.Urea, "blood", 28.014, rules.Laboratory},                        // VSAC
		{"59570-2", "Urea nitrogen [Moles/volume] in Blood", rules.Urea, "blood", 28.014, rules.Laboratory},                      // VSAC
		{"12961-9", "Urea nitrogen [Mass/volume] in Arterial blood", rules.Urea, "arterial blood", 28.014, rules.BloodGas},       // VSAC
		{"12962-7", "Urea nitrogen [Mass/volume] in Venous blood", rules.Urea, "venous blood", 28.014, rules.BloodGas},           // VSAC
		{"12963-5", "Urea nitrogen [Mass/volume] in Peripheral blood", rules.Urea, "peripheral blood", 28.014, rules.Laboratory}, // VSAC
		{"3091-6", "Urea [Mass/volume] in Serum or Plasma", rules.Urea, "serum or plasma", 60.056, rules.Laboratory},             // §8; CH4N2O, IUPAC 2021
		{"22664-7", "Urea [Moles/volume] in Serum or Plasma", rules.Urea, "serum or plasma", 60.056, rules.Laboratory},           // §8
		{"20977-5", "Urea [Mass/volume] in Blood", rules.Urea, "blood", 60.056, rules.Laboratory},                                // SSIDL

		{"2160-0", "Creatinine [Mass/volume] in Serum or Plasma", rules.Creatinine, "serum or plasma", 113.120, rules.Laboratory},                 // §8, VSAC; IUPAC 2021
		{"14682-9", "Creatinine [Moles/volume] in Serum or Plasma", rules.Creatinine, "serum or plasma", 113.120, rules.Laboratory},               // §8, VSAC
		{"38483-4", "Creatinine [Mass/volume] in Blood", rules.Creatinine, "blood", 113.120, rules.Laboratory},                                    // VSAC
		{"59826-8", "Creatinine [Moles/volume] in Blood", rules.Creatinine, "blood", 113.120, rules.Laboratory},                                   // VSAC
		{"77140-2", "Creatinine [Moles/volume] in Serum, Plasma or Blood", rules.Creatinine, "serum, plasma or blood", 113.120, rules.Laboratory}, // VSAC
		{"21232-4", "Creatinine [Mass/volume] in Arterial blood", rules.Creatinine, "arterial blood", 113.120, rules.BloodGas},                    // VSAC
		{"101475-2", "Creatinine [Moles/volume] in Venous blood", rules.Creatinine, "venous blood", 113.120, rules.BloodGas},                      // VSAC

		{"2692-2", "Osmolality of Serum or Plasma", rules.SerumOsmolality, "serum or plasma", 0, rules.Laboratory},              // §8
		{"2695-5", "Osmolality of Urine", rules.UrineOsmolality, "urine", 0, rules.Laboratory},                                  // §8
		{"2955-3", "Sodium [Moles/volume] in Urine", rules.UrineSodium, "urine", 0, rules.Laboratory},                           // §8
		{"2828-2", "Potassium [Moles/volume] in Urine", rules.UrinePotassium, "urine", 0, rules.Laboratory},                     // §8
		{"9187-6", "Urine output", rules.UrineVolume, "urine", 0, rules.Laboratory},                                             // OMOP concept table (LOINC concept 3014315)
		{"3167-4", "Volume of 24 hour Urine", rules.UrineVolume, "24 hour urine", 0, rules.Laboratory},                          // HL7 Order Catalog IG example
		{"29463-7", "Body weight", rules.BodyWeight, "", 0, ""},                                                                 // §8
		{"8302-2", "Body height", rules.BodyHeight, "", 0, ""},                                                                  // §8
		{"3084-1", "Urate [Mass/volume] in Serum or Plasma", rules.Urate, "serum or plasma", 168.112, rules.Laboratory},         // §8 (V-A)
		{"14933-6", "Urate [Moles/volume] in Serum or Plasma", rules.Urate, "serum or plasma", 168.112, rules.Laboratory},       // §8 (V-A)
		{"4544-3", "Hematocrit [Volume Fraction] of Blood by Automated count", rules.Haematocrit, "blood", 0, rules.Laboratory}, // §8 (V-B, LOINC's older name)
		{"20570-8", "Hematocrit [Volume Fraction] of Blood", rules.Haematocrit, "blood", 0, rules.Laboratory},                   // §8 (V-B)
		{"3086-6", "Urate [Mass/volume] in Urine", rules.UrineUrate, "urine", 168.112, rules.Laboratory},                        // §8 (V-A/V-C)
		{"14934-4", "Urate [Moles/volume] in Urine", rules.UrineUrate, "urine", 168.112, rules.Laboratory},                      // §8 (V-A pair)
		{"2161-8", "Creatinine [Mass/volume] in Urine", rules.UrineCreatinine, "urine", 113.120, rules.Laboratory},              // §8 (V-B)
		{"14683-7", "Creatinine [Moles/volume] in Urine", rules.UrineCreatinine, "urine", 113.120, rules.Laboratory},            // MIRACUM loinc-conversion data/conversion.tsv pair of 2161-8
		{"2965-2", "Specific gravity of Urine", rules.UrineSpecificGravity, "urine", 0, rules.Laboratory},                       // public lab-code tables (several)
		{"5811-5", "Specific gravity of Urine by Test strip", rules.UrineSpecificGravity, "urine", 0, rules.PointOfCare},        // a public urinalysis table; long name from memory
		{"3016-3", "Thyrotropin [Units/volume] in Serum or Plasma", rules.TSH, "serum or plasma", 0, rules.Laboratory},          // several public LOINC mappings
		{"2143-6", "Cortisol [Mass/volume] in Serum or Plasma", rules.Cortisol, "serum or plasma", 362.466, rules.Laboratory},   // MIRACUM pair 14675-3; public mappings
		{"14675-3", "Cortisol [Moles/volume] in Serum or Plasma", rules.Cortisol, "serum or plasma", 362.466, rules.Laboratory}, // MIRACUM pair of 2143-6; long name from memory
	}
	seen := map[string]bool{}
	for _, tt := range tests {
		seen[tt.code] = true
		t.Run(tt.code, func(t *testing.T) {
			m, ok := loinc[tt.code]
			if !ok {
				t.Fatalf("%s is not in the LOINC table", tt.code)
			}
			if m.display == "" || m.display != tt.display {
				t.Errorf("display %q, want %q", m.display, tt.display)
			}
			if m.analyte != tt.analyte || m.specimen != tt.specimen || m.origin != tt.origin {
				t.Errorf("got %s/%q/%q, want %s/%q/%q", m.analyte, m.specimen, m.origin, tt.analyte, tt.specimen, tt.origin)
			}
			if !near(m.molarMass, tt.molarMass, 0.001) {
				t.Errorf("molar mass %.3f, want %.3f", m.molarMass, tt.molarMass)
			}
		})
	}
	for code := range loinc {
		if !seen[code] {
			t.Errorf("LOINC %s has no confirmed row in this test", code)
		}
	}
	if _, ok := loinc["2956-1"]; ok {
		t.Error("2956-1 (24-h urine sodium, Moles/time) must not be read as a concentration")
	}
}

// TestMapNewLOINCCodes maps one Observation per code added for issue 18
// through Map, from its usual unit to the analyte's canonical unit.
func TestMapNewLOINCCodes(t *testing.T) {
	tests := []struct {
		code  string
		value string
		unit  string
		want  float64
		tol   float64
	}{
		{"41657-8", "138", "mmol/L", 138, 1e-9}, // identity, UCUM
		{"77139-4", "138", "meq/L", 138, 1e-9},  // meq/L = mmol/L for Na+, UCUM
		{"32713-0", "4.1", "mmol/L", 4.1, 1e-9}, // identity, UCUM
		{"39789-3", "4.1", "mEq/L", 4.1, 1e-9},  // meq/L = mmol/L for K+, UCUM
		{"41656-0", "4.1", "mmol/L", 4.1, 1e-9}, // identity, UCUM
		{"77142-8", "4.1", "mmol/L", 4.1, 1e-9}, // identity, UCUM
		// Glucose: 180.156 mg/dL is 10 mmol/L (IUPAC atomic weights, C6H12O6).
		{"74774-1", "180.156", "mg/dL", 10, 1e-9},
		{"77135-2", "10", "mmol/L", 10, 1e-9},
		{"41651-1", "180.156", "mg/dL", 10, 1e-9},
		{"39481-7", "10", "mmol/L", 10, 1e-9},
		{"41652-9", "180.156", "mg/dL", 10, 1e-9},
		{"39480-9", "10", "mmol/L", 10, 1e-9},
		{"104655-6", "180.156", "mg/dL", 10, 1e-9},
		{"100746-7", "10", "mmol/L", 10, 1e-9},
		{"32016-8", "180.156", "mg/dL", 10, 1e-9},
		{"51596-5", "10", "mmol/L", 10, 1e-9},
		{"41653-7", "100", "mg/dL", 100 / 18.016, 0.001}, // published check value ÷18.016
		{"14743-9", "10", "mmol/L", 10, 1e-9},
		{"104597-0", "180.156", "mg/dL", 10, 1e-9},
		{"104598-8", "180.156", "mg/dL", 10, 1e-9},
		{"2340-8", "180.156", "mg/dL", 10, 1e-9},
		{"72516-8", "10", "mmol/L", 10, 1e-9},
		{"2341-6", "180.156", "mg/dL", 10, 1e-9},
		// BUN: 14 mg/dL of urea nitrogen = 14×10/(2×14.007) = 4.998 mmol/L of
		// urea (IUPAC atomic weights: N 14.007, 2 N per urea molecule).
		{"6299-2", "14", "mg/dL", 5.0, 0.005},
		{"6299-2", "14", "mg/dL", 14 * 10 / (2 * awN), 1e-9},
		{"59570-2", "5", "mmol/L", 5, 1e-9}, // SI urea reporting, common practice (codes.go)
		{"12961-9", "14", "mg/dL", 14 * 10 / (2 * awN), 1e-9},
		{"12962-7", "14", "mg/dL", 14 * 10 / (2 * awN), 1e-9},
		{"12963-5", "14", "mg/dL", 14 * 10 / (2 * awN), 1e-9},
		// Urea: 30 mg/dL = 30×10/60.056 mmol/L (IUPAC atomic weights, CH4N2O).
		{"20977-5", "30", "mg/dL", 30 * 10 / (awC + 4*awH + 2*awN + awO), 1e-6},
		// Creatinine: 1.0 mg/dL = 88.4 µmol/L (IUPAC atomic weights, C4H7N3O:
		// 10/113.12×1000 = 88.40).
		{"38483-4", "1.0", "mg/dL", 88.4, 0.005},
		{"59826-8", "88", "umol/L", 88, 1e-9},
		{"77140-2", "88", "umol/L", 88, 1e-9},
		{"21232-4", "1.0", "mg/dL", 88.4, 0.005},
		{"101475-2", "88", "umol/L", 88, 1e-9},
	}
	for _, tt := range tests {
		t.Run(tt.code+"/"+tt.unit, func(t *testing.T) {
			m := loinc[tt.code]
			f := mapResources(t, obsSpec{id: "o", code: tt.code, value: vq(tt.value, tt.unit)}.raw())
			if len(f.Rejected) != 0 {
				t.Fatalf("rejected: %+v", f.Rejected)
			}
			got := f.Labs[m.analyte]
			if len(got) != 1 {
				t.Fatalf("%s series %+v, want one value", m.analyte, got)
			}
			if !near(got[0].Value, tt.want, tt.tol) {
				t.Errorf("%s %s %s → %.6f, want %.6f ± %g", tt.code, tt.value, tt.unit, got[0].Value, tt.want, tt.tol)
			}
			if got[0].Code != tt.code || got[0].Specimen != m.specimen {
				t.Errorf("code %q specimen %q, want %q %q", got[0].Code, got[0].Specimen, tt.code, m.specimen)
			}
		})
	}
}

// TestMapTimedUrineAmountIgnored: a 24-h urine sodium amount (LOINC 2956-1,
// "Sodium [Moles/time] in 24 hour Urine", §8) is not a concentration and is
// not read as urine sodium.
func TestMapTimedUrineAmountIgnored(t *testing.T) {
	f := mapResources(t, obsSpec{id: "u", code: "2956-1", value: vq("150", "mmol/(24.h)")}.raw())
	if len(f.Labs[rules.UrineSodium]) != 0 || len(f.Rejected) != 0 {
		t.Errorf("urine sodium %+v, rejected %+v; want neither", f.Labs[rules.UrineSodium], f.Rejected)
	}
}

// A urine volume is read with its collection period (FHIR R4
// Observation.effectivePeriod): its rate needs both ends; At is the end.
func TestMapUrineVolume(t *testing.T) {
	period := func(start, end string) string {
		return fmt.Sprintf(`"effectivePeriod":{"start":%q,"end":%q}`, start, end)
	}
	f := mapResources(t,
		obsSpec{id: "uo-1", code: "9187-6", effective: period("2026-11-20T00:00:00Z", "2026-11-20T06:00:00Z"), value: vq("900", "mL")}.raw(),
		obsSpec{id: "uo-24", code: "3167-4", effective: period("2026-11-19T06:00:00Z", "2026-11-20T06:00:00+00:00"), value: vq("2.4", "L")}.raw(),
		obsSpec{id: "uo-noperiod", code: "9187-6", effective: dt("2026-11-20T06:00:00Z"), value: vq("300", "mL")}.raw(),
		obsSpec{id: "uo-backwards", code: "9187-6", effective: period("2026-11-20T06:00:00Z", "2026-11-20T05:00:00Z"), value: vq("300", "mL")}.raw(),
	)
	got := f.Labs[rules.UrineVolume]
	// Same end (06:00): one 6-h period, one 24-h; 2.4 L is 2400 mL (UCUM).
	if len(got) != 2 {
		t.Fatalf("urine volumes %+v, rejected %+v", got, f.Rejected)
	}
	for _, m := range got {
		want := map[string][2]float64{"Observation/uo-1": {900, 6}, "Observation/uo-24": {2400, 24}}[m.Source]
		if m.Value != want[0] || m.PeriodHours != want[1] || !m.At.Equal(time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC)) {
			t.Errorf("%s: %g mL over %g h ending %v, want %v", m.Source, m.Value, m.PeriodHours, m.At, want)
		}
	}
	reasons := map[string]string{}
	for _, r := range f.Rejected {
		reasons[r.Source] = r.Reason
	}
	if !strings.Contains(reasons["Observation/uo-noperiod"], "collection period") || !strings.Contains(reasons["Observation/uo-backwards"], "ends at or before") {
		t.Errorf("rejections %v", reasons)
	}
}
