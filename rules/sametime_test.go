package rules

import (
	"strings"
	"testing"
	"time"
)

// The same-time policy is halite's own (common practice, policy.json
// sameTime.source); these cases check that it is applied as documented.
func TestResolveSameTime(t *testing.T) {
	rs, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	p := rs.Policy().SameTime
	t0 := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	issued := func(min int) *time.Time { v := t0.Add(time.Duration(min) * time.Minute); return &v }
	r := func(id string, a Analyte, v float64, min int, o Origin, status string) Measurement {
		return Measurement{Analyte: a, Value: v, At: t0.Add(time.Duration(min) * time.Minute), Source: "Observation/" + id, Origin: o, Status: status}
	}
	na := func(id string, v float64, min int, o Origin) Measurement { return r(id, Sodium, v, min, o, "final") }
	withIssued := func(m Measurement, min int) Measurement { m.Issued = issued(min); return m }

	tests := []struct {
		name       string
		in         []Measurement
		want       []string // kept sources, oldest first
		wantValues []float64
		rejected   []string // rejected sources
		reason     string   // a fragment of the first rejection's reason
		tied       bool     // the kept result holds tied values
		note       string   // a fragment of the one note; "" for none
	}{
		{"one result", []Measurement{na("a", 128, 0, Laboratory)}, []string{"Observation/a"}, []float64{128}, nil, "", false, ""},
		{"identical values merge quietly", []Measurement{na("a", 128, 0, Laboratory), na("b", 128.00001, 0, Laboratory)},
			[]string{"Observation/a"}, []float64{128}, []string{"Observation/b"}, "duplicate of Observation/a", false, ""},
		{"laboratory over blood gas", []Measurement{na("gas", 138, 0, BloodGas), na("lab", 131, 0, Laboratory)},
			[]string{"Observation/lab"}, []float64{131}, []string{"Observation/gas"}, "laboratory over blood gas", false, "131 is counted (laboratory over blood gas)"},
		{"blood gas over point of care", []Measurement{r("poc", Glucose, 9, 0, PointOfCare, "final"), r("gas", Glucose, 12, 2, BloodGas, "final")},
			[]string{"Observation/gas"}, []float64{12}, []string{"Observation/poc"}, "blood gas over point of care", false, "glucose results taken at the same time"},
		{"corrected over final", []Measurement{na("final", 131, 0, Laboratory), na("corr", 125, 0, Laboratory)},
			nil, nil, nil, "", false, ""}, // filled below
		{"issued later", []Measurement{withIssued(na("early", 131, 0, Laboratory), 30), withIssued(na("late", 129, 0, Laboratory), 90)},
			[]string{"Observation/late"}, []float64{129}, []string{"Observation/early"}, "issued later", false, "issued later"},
		{"sodium tie below 140: the lower stands", []Measurement{na("a", 131, 0, Laboratory), na("b", 124, 0, Laboratory)},
			[]string{"Observation/b"}, []float64{124}, []string{"Observation/a"}, "neither ranks higher", true, "the value farther from 140"},
		{"sodium tie above 140: the higher stands", []Measurement{na("a", 151, 0, Laboratory), na("b", 147, 0, Laboratory)},
			[]string{"Observation/a"}, []float64{151}, []string{"Observation/b"}, "neither ranks higher", true, "farther from 140"},
		{"potassium tie: the lower stands", []Measurement{r("a", Potassium, 3.1, 0, Laboratory, "final"), r("b", Potassium, 4.2, 0, Laboratory, "final")},
			[]string{"Observation/a"}, []float64{3.1}, []string{"Observation/b"}, "neither ranks higher", true, "a low potassium"},
		{"glucose tie: none is used", []Measurement{r("a", Glucose, 10, 0, Laboratory, "final"), r("b", Glucose, 25, 0, Laboratory, "final")},
			nil, nil, []string{"Observation/a", "Observation/b"}, "none is used", false, "none is used"},
		{"within the tolerance", []Measurement{na("a", 131, 0, Laboratory), na("b", 125, 4, Laboratory)},
			[]string{"Observation/b"}, []float64{125}, []string{"Observation/a"}, "neither ranks higher", true, "taken at the same time"},
		{"beyond the tolerance: a change", []Measurement{na("a", 131, 0, Laboratory), na("b", 125, 6, Laboratory)},
			[]string{"Observation/a", "Observation/b"}, []float64{131, 125}, nil, "", false, ""},
	}
	tests[4].want, tests[4].wantValues, tests[4].rejected, tests[4].reason, tests[4].note =
		[]string{"Observation/corr"}, []float64{125}, []string{"Observation/final"}, "a corrected result over a final one", "125 is counted"
	tests[4].in[1].Status = "corrected"

	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			kept, rejected, notes := ResolveSameTime(tt.in, p)
			var got []string
			for i, m := range kept {
				got = append(got, m.Source)
				if i < len(tt.wantValues) && m.Value != tt.wantValues[i] {
					t.Errorf("kept[%d] = %g, want %g", i, m.Value, tt.wantValues[i])
				}
			}
			if strings.Join(got, ",") != strings.Join(tt.want, ",") {
				t.Errorf("kept %v, want %v", got, tt.want)
			}
			var gotRej []string
			for _, r := range rejected {
				gotRej = append(gotRej, r.Source)
			}
			if strings.Join(gotRej, ",") != strings.Join(tt.rejected, ",") {
				t.Errorf("rejected %v, want %v", rejected, tt.rejected)
			}
			if tt.reason != "" && (len(rejected) == 0 || !strings.Contains(rejected[0].Reason, tt.reason)) {
				t.Errorf("rejected %+v, want a reason with %q", rejected, tt.reason)
			}
			if tt.tied != (len(kept) == 1 && kept[0].SameTime != nil && len(kept[0].SameTime.Tied) > 0) {
				t.Errorf("tied = %v, want %v (%+v)", !tt.tied, tt.tied, kept)
			}
			switch {
			case tt.note == "" && len(notes) != 0:
				t.Errorf("notes %q, want none", notes)
			case tt.note != "" && (len(notes) != 1 || !strings.Contains(notes[0], tt.note)):
				t.Errorf("notes %q, want one with %q", notes, tt.note)
			}
		})
	}
}

// Review findings: a result that ranked lower never comes back through a
// tie, and a result without an issued time does not break the ranking.
func TestSameTimeRankingIsAnOrder(t *testing.T) {
	rs, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	p := rs.Policy().SameTime
	t0 := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	at := func(min int) *time.Time { v := t0.Add(time.Duration(min) * time.Minute); return &v }
	na := func(id string, v float64, o Origin, issued *time.Time) Measurement {
		return Measurement{Analyte: Sodium, Value: v, At: t0, Source: "Observation/" + id, Origin: o, Status: "final", Issued: issued}
	}
	// Lab 130 and 133 tie; point of care 120 ranks lower and must not be
	// the nadir the tie offers.
	kept, _, _ := ResolveSameTime([]Measurement{na("a", 130, Laboratory, nil), na("b", 133, Laboratory, nil), na("poc", 120, PointOfCare, nil)}, p)
	if len(kept) != 1 || kept[0].Lowest().Value != 130 || kept[0].Highest().Value != 133 {
		t.Errorf("kept %+v: lowest %v highest %v, want 130 and 133", kept, kept[0].Lowest().Value, kept[0].Highest().Value)
	}
	// Issued 08:30, none, 09:30: issued times do not rank this group (one
	// lacks it), so the three tie and sodium keeps the value farthest from 140.
	kept, _, _ = ResolveSameTime([]Measurement{na("x", 125, Laboratory, at(30)), na("y", 131, Laboratory, nil), na("z", 129, Laboratory, at(90))}, p)
	if len(kept) != 1 || kept[0].Value != 125 || len(kept[0].SameTime.Tied) != 2 {
		t.Errorf("kept %+v, want 125 standing for a three-way tie", kept)
	}
	// With every issued time stated, the latest issued wins outright.
	kept, _, _ = ResolveSameTime([]Measurement{na("x", 125, Laboratory, at(30)), na("y", 131, Laboratory, at(60)), na("z", 129, Laboratory, at(90))}, p)
	if len(kept) != 1 || kept[0].Value != 129 || len(kept[0].SameTime.Tied) != 0 {
		t.Errorf("kept %+v, want 129 (issued last)", kept)
	}
}

// Results at one time are never a change; a tie counts each figure on its
// safer side. The case is the one seen on synthetic data: two sodium values
// 7 mmol/L apart with one timestamp read as a 7.0 mmol/L rise.
func TestWindowCountsTiesOnTheSaferSide(t *testing.T) {
	rs, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 11, 20, 12, 0, 0, 0, time.UTC)
	na := func(id string, hoursAgo, v float64) Measurement {
		return Measurement{Analyte: Sodium, Value: v, At: at.Add(-time.Duration(hoursAgo * float64(time.Hour))), Source: "Observation/" + id, Origin: Laboratory, Status: "final"}
	}
	resolve := func(in ...Measurement) []Measurement {
		out, _, _ := ResolveSameTime(in, rs.Policy().SameTime)
		return out
	}
	tests := []struct {
		name               string
		series             []Measurement
		rise, fall         float64
		nadir, riseTo      float64
		peak, fallTo       float64
		latestStandsForTie float64
	}{
		{"tie alone: no change", resolve(na("a", 1, 131), na("b", 1, 138)), 0, 0, 131, 138, 131, 131, 131},
		{"tie after a nadir: the rise to the higher", resolve(na("n", 10, 125), na("a", 1, 131), na("b", 1, 138)), 13, 0, 125, 138, 131, 131, 131},
		{"tie at the nadir: the nadir at the lower", resolve(na("a", 10, 124), na("b", 10, 127), na("l", 1, 130)), 6, 0, 124, 130, 130, 130, 130},
		{"tie after a peak: the fall to the lower", resolve(na("p", 10, 152), na("a", 1, 146), na("b", 1, 149)), 0, 6, 149, 149, 152, 146, 149},
		{"no tie: plain nadir and latest", resolve(na("n", 10, 125), na("l", 1, 131)), 6, 0, 125, 131, 131, 131, 131},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			w := AnalyseSodium(tt.series, at).Window24h
			if w == nil {
				t.Fatal("no 24-h window")
			}
			if w.RiseFromNadir != tt.rise || w.FallFromPeak != tt.fall {
				t.Errorf("rise %g fall %g, want %g and %g", w.RiseFromNadir, w.FallFromPeak, tt.rise, tt.fall)
			}
			if w.Nadir.Value != tt.nadir || w.RiseTo.Value != tt.riseTo || w.Peak.Value != tt.peak || w.FallTo.Value != tt.fallTo {
				t.Errorf("nadir %g → %g, peak %g → %g; want %g → %g, %g → %g",
					w.Nadir.Value, w.RiseTo.Value, w.Peak.Value, w.FallTo.Value, tt.nadir, tt.riseTo, tt.peak, tt.fallTo)
			}
			if w.Latest.Value != tt.latestStandsForTie {
				t.Errorf("latest %g, want %g", w.Latest.Value, tt.latestStandsForTie)
			}
		})
	}
}

func TestSameTimePolicyValidation(t *testing.T) {
	for name, override := range map[string]string{
		"negative tolerance": `{"sameTime":{"toleranceMinutes":-1}}`,
		"unknown origin":     `{"sameTime":{"originPrecedence":["laboratory","courier"]}}`,
		"origin twice":       `{"sameTime":{"originPrecedence":["laboratory","laboratory"]}}`,
		"unknown analyte":    `{"sameTime":{"unresolved":{"lactate":{"take":"lowest","why":"x"}}}}`,
		"unknown choice":     `{"sameTime":{"unresolved":{"glucose":{"take":"mean","why":"x"}}}}`,
		"choice without why": `{"sameTime":{"unresolved":{"glucose":{"take":"highest"}}}}`,
	} {
		if _, err := LoadWithOverride([]byte(override)); err == nil || !strings.Contains(err.Error(), "sameTime") {
			t.Errorf("%s: error %v, want one naming sameTime", name, err)
		}
	}
}

// A card says where the sodium it shows was measured when that is not a
// laboratory, and names a same-time conflict beside it.
func TestCardNamesOriginAndConflict(t *testing.T) {
	rs, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	gas := Measurement{Analyte: Sodium, Value: 123, At: at.Add(-time.Hour), Source: "Observation/gas", Origin: BloodGas, Status: "final"}
	poc := gas
	poc.Source, poc.Origin, poc.Value = "Observation/poc", PointOfCare, 127
	series, _, _ := ResolveSameTime([]Measurement{gas, poc}, rs.Policy().SameTime)
	f := Facts{At: at, Labs: map[Analyte][]Measurement{Sodium: series}}
	var details []string
	for _, fd := range rs.Evaluate(ChartReview, f) {
		details = append(details, fd.Detail)
	}
	all := strings.Join(details, "\n")
	for _, want := range []string{
		"Latest sodium: 123 mmol/L (blood gas, 2026-11-20 07:00 UTC, Observation/gas)",
		"Results taken at the same time differ: 123 mmol/L, blood gas (Observation/gas) and 127 mmol/L, point of care (Observation/poc); 123 is counted (blood gas over point of care)",
	} {
		if !strings.Contains(all, want) {
			t.Errorf("chart review details lack %q:\n%s", want, all)
		}
	}
}
