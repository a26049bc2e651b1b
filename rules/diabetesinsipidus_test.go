package rules

import (
	"strings"
	"testing"
	"time"
)

// TestDiabetesInsipidusPattern walks the concentrating-defect card's
// definitions on invented facts: dilute urine by osmolality below 300 or,
// without one, a specific gravity below 1.005 (de Vries F et al., Pituitary
// 2021;24:284-291); polyuria above 3 L/day for an adult and 2 L/m²/day for
// a child (Mosteller body-surface area), or above 300 mL/h for 3 h after
// neurosurgery (de Vries 2021); a sodium above 145, or rising 3 in 24 h
// with polyuria; and the phase of the course after pituitary surgery.
func TestDiabetesInsipidusPattern(t *testing.T) {
	rs := loadRuleset(t)
	const adult, child = "1970-01-10", "2018-06-15"
	pituitary := func(daysAgo float64) []Procedure {
		return []Procedure{{Reference: "Procedure/tss", Codings: []Coding{{System: "http://snomed.info/sct", Code: "45368001"}},
			At: chartAt.Add(-time.Duration(daysAgo * 24 * float64(time.Hour)))}}
	}
	hourly := func(ml ...float64) []Measurement { // newest first, 1-h periods ending 0.5 h ago and before
		var out []Measurement
		for i, v := range ml {
			out = append([]Measurement{urineVolume(v, 1, 0.5+float64(i))}, out...)
		}
		return out
	}
	for _, tc := range []struct {
		name  string
		f     Facts
		want  bool
		lines []string
	}{
		{"specific gravity 1.003, no osmolality", chartFacts(t, adult, map[float64]float64{2: 149}, lab(UrineSpecificGravity, 1.003, 1)), true,
			[]string{"Urine specific gravity 1.003", "below 1.005", "specific gravity 1.003"}},
		{"specific gravity 1.010", chartFacts(t, adult, map[float64]float64{2: 149}, lab(UrineSpecificGravity, 1.010, 1)), false, nil},
		{"osmolality wins over specific gravity", chartFacts(t, adult, map[float64]float64{2: 149}, lab(UrineOsmolality, 450, 1),
			lab(UrineSpecificGravity, 1.003, 1)), false, nil},
		// 25 kg, 125 cm: √(125·25/3600) = 0.93 m²; 2 × 360 mL over 6 h =
		// 120 mL/h = 2880 mL/day = 3091 mL/m²/day > 2000.
		{"child above 2 L/m²/day", chartFacts(t, child, map[float64]float64{2: 149}, lab(UrineOsmolality, 150, 1), lab(BodyWeight, 25, 5),
			lab(BodyHeight, 125, 5), urineVolume(360, 3, 3.5), urineVolume(360, 3, 0.5)), true,
			[]string{"3091 mL/m²/day for 0.93 m²", "polyuria for a child"}},
		// 2 × 180 mL over 6 h = 1440 mL/day = 1546 mL/m²/day.
		{"child below 2 L/m²/day", chartFacts(t, child, map[float64]float64{2: 149}, lab(UrineOsmolality, 150, 1), lab(BodyWeight, 25, 5),
			lab(BodyHeight, 125, 5), urineVolume(180, 3, 3.5), urineVolume(180, 3, 0.5)), true,
			[]string{"1546 mL/m²/day", "not polyuria for a child"}},
		{"child without a height", chartFacts(t, child, map[float64]float64{2: 149}, lab(UrineOsmolality, 150, 1), lab(BodyWeight, 25, 5),
			urineVolume(360, 3, 3.5), urineVolume(360, 3, 0.5)), true, []string{"needs a recent height"}},
		// Day 1 after pituitary surgery: 350, 340, 320 mL in the last three
		// hours, all above 300; sodium 140 → 144 (+4 in 24 h), dilute urine.
		{"rising sodium, sustained output after pituitary surgery", func() Facts {
			f := chartFacts(t, adult, map[float64]float64{20: 140, 1: 144}, append(hourly(350, 340, 320), lab(UrineOsmolality, 120, 1))...)
			f.Procedures = pituitary(1)
			return f
		}(), true, []string{"above 300 mL/h in every charted period of the last 3.0 h", "rising 4.0 in 24 h", "first, polyuric phase"}},
		// The middle hour at 250 breaks the run: the adult day definition
		// still applies ((350 + 250 + 320)/3 × 24 = 7360 mL/day).
		{"broken run", func() Facts {
			f := chartFacts(t, adult, map[float64]float64{20: 140, 1: 144}, append(hourly(350, 250, 320), lab(UrineOsmolality, 120, 1))...)
			f.Procedures = pituitary(1)
			return f
		}(), true, []string{"polyuria, above 3000 mL/day"}},
		{"rising sodium without polyuria", func() Facts {
			f := chartFacts(t, adult, map[float64]float64{20: 140, 1: 144}, append(hourly(80, 90, 70), lab(UrineOsmolality, 120, 1))...)
			f.Procedures = pituitary(1)
			return f
		}(), false, nil},
		{"rising from a hyponatremia is not diabetes insipidus", func() Facts {
			f := chartFacts(t, adult, map[float64]float64{30: 128, 20: 136, 1: 140}, append(hourly(350, 340, 320), lab(UrineOsmolality, 120, 1))...)
			return f
		}(), false, nil},
		{"polyuric on day 12: third phase", func() Facts {
			f := chartFacts(t, adult, map[float64]float64{2: 147}, lab(UrineOsmolality, 150, 1))
			f.Procedures = pituitary(12)
			return f
		}(), true, []string{"day 12", "third phase"}},
		{"rising on day 1 is possible DI", func() Facts {
			f := chartFacts(t, adult, map[float64]float64{20: 140, 1: 144}, append(hourly(350, 340, 320), lab(UrineOsmolality, 120, 1))...)
			f.Procedures = pituitary(1)
			return f
		}(), true, []string{"possible diabetes insipidus", "excretion of fluids given"}},
		{"high sodium: no deprivation test advised", chartFacts(t, adult, map[float64]float64{2: 149}, lab(UrineOsmolality, 150, 1)), true,
			[]string{"deprivation is not needed", "!supervised water deprivation test"}},
		{"polyuric on day 8: in the retention days", func() Facts {
			f := chartFacts(t, adult, map[float64]float64{2: 147}, lab(UrineOsmolality, 150, 1))
			f.Procedures = pituitary(8)
			return f
		}(), true, []string{"falls in the days when water retention typically occurs"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var card *Finding
			for _, fd := range rs.Evaluate(ChartReview, tc.f) {
				if fd.Rule == RuleConcentratingDefect {
					card = &fd
				}
			}
			if (card != nil) != tc.want {
				t.Fatalf("card %v, want %v", card, tc.want)
			}
			for _, l := range tc.lines {
				text := card.Detail + card.Summary
				if absent, ok := strings.CutPrefix(l, "!"); ok {
					if strings.Contains(text, absent) {
						t.Errorf("card has %q:\n%s\n%s", absent, card.Summary, card.Detail)
					}
				} else if !strings.Contains(text, l) {
					t.Errorf("card lacks %q:\n%s\n%s", l, card.Summary, card.Detail)
				}
			}
		})
	}
}

// TestSustainedOutput: periods must follow on (within 15 minutes) and each
// be above the rate.
func TestSustainedOutput(t *testing.T) {
	at := func(h float64) time.Time { return chartAt.Add(-time.Duration(h * float64(time.Hour))) }
	vol := func(ml, hours, endedAgo float64) Measurement {
		return Measurement{Value: ml, PeriodHours: hours, At: at(endedAgo)}
	}
	for _, tc := range []struct {
		name string
		v    []Measurement
		want float64
	}{
		{"three hours", []Measurement{vol(320, 1, 0), vol(310, 1, 1), vol(400, 1, 2)}, 3},
		{"a gap of an hour", []Measurement{vol(320, 1, 0), vol(310, 1, 2)}, 1},
		{"a gap of ten minutes", []Measurement{vol(320, 1, 0), vol(310, 1, 1.1667)}, 2},
		{"newest below", []Measurement{vol(200, 1, 0), vol(400, 1, 1)}, 0},
		{"a two-hour period", []Measurement{vol(700, 2, 0), vol(350, 1, 2)}, 3},
	} {
		if got, _ := sustainedOutput(tc.v, 300); Round(got, 2) != tc.want {
			t.Errorf("%s: %g h, want %g", tc.name, got, tc.want)
		}
	}
}
