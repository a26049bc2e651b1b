package rules

import (
	"math"
	"strings"
	"testing"
	"time"
)

// TestFractionalExcretion checks the clearance-ratio formula (common
// practice: FE_x = U_x·P_cr / (P_x·U_cr) × 100) on hand computations with
// invented values: urate 2400·70/(180·7000)·100 = 13.33 %, and a FENa of
// 80·80/(125·8000)·100 = 0.64 %, below the 1 % of the SIADH supplemental
// criteria (reference notes §4.3).
func TestFractionalExcretion(t *testing.T) {
	for _, c := range []struct{ ux, px, ucr, pcr, want float64 }{
		{2400, 180, 7000, 70, 13.333}, // urate: 168000/1260000 × 100
		{80, 125, 8000, 80, 0.64},
		{300, 300, 10000, 100, 1},
	} {
		if got := FractionalExcretion(c.ux, c.px, c.ucr, c.pcr); math.Abs(got-c.want) > 0.001 {
			t.Errorf("FE(%v) = %.4f, want %.4f", c, got, c.want)
		}
	}
	if !math.IsNaN(FractionalExcretion(1, 0, 1, 1)) || !math.IsNaN(FractionalExcretion(1, 1, 0, 1)) {
		t.Error("a zero denominator gave a number")
	}
}

// TestSIADHInBrainInjury reads the SIADH pattern card in a brain-injury
// context (an active ICD-10-CM S06 intracranial injury of 5 days) on invented
// facts: the weight and sodium moving together or apart, a rising
// haematocrit and a high urea-to-creatinine ratio lean towards salt
// wasting (Maesaka 2009; reference notes §4.5), and then no restriction
// volume is given; after a subarachnoid haemorrhage none is given at all
// (AHA/ASA aSAH guideline 2023, from memory).
func TestSIADHInBrainInjury(t *testing.T) {
	rs := loadRuleset(t)
	const adult = "1970-01-10"
	onset := chartAt.Add(-5 * 24 * time.Hour)
	tbi := Condition{Reference: "Condition/tbi", ClinicalStatus: "active", Onset: &onset, Codings: []Coding{{System: "http://hl7.org/fhir/sid/icd-10-cm", Code: "S06.5X0A"}}}
	base := func(extra ...Measurement) Facts {
		labs := append([]Measurement{lab(Glucose, 5, 2), lab(Urea, 3, 2), lab(Creatinine, 60, 2), lab(UrineOsmolality, 480, 1),
			lab(UrineSodium, 80, 1), lab(UrinePotassium, 30, 1)}, extra...)
		f := chartFacts(t, adult, map[float64]float64{60: 134, 30: 131, 2: 127}, labs...)
		f.Conditions = []Condition{tbi}
		return f
	}
	for _, tc := range []struct {
		name       string
		f          Facts
		saltLean   bool
		wantDetail []string
	}{
		{"weight falls with sodium", base(lab(BodyWeight, 72, 60), lab(BodyWeight, 70.5, 3)), true,
			[]string{"both falling", "lean: towards salt wasting", "no restriction volume is given: in a brain-injury context"}},
		{"weight rises as sodium falls", base(lab(BodyWeight, 70, 60), lab(BodyWeight, 71.4, 3)), false,
			[]string{"weight rising as sodium falls", "lean: towards SIADH", "the ratio implies"}},
		{"weight steady, haematocrit rising", base(lab(BodyWeight, 70, 60), lab(BodyWeight, 70.2, 3), lab(Haematocrit, 36, 30), lab(Haematocrit, 41, 2)), true,
			[]string{"a rising haematocrit", "lean: towards salt wasting"}},
		{"one weight only", base(lab(BodyWeight, 70, 3)), false, []string{"fewer than two weights", "lean: neither way"}},
		{"rising haematocrit against rising weight", base(lab(BodyWeight, 70, 60), lab(BodyWeight, 71.4, 3), lab(Haematocrit, 36, 30), lab(Haematocrit, 41, 2)), false,
			[]string{"lean: both ways"}},
		// BUN/creatinine: urea 9 mmol/L = 25.2 mg/dL BUN, creatinine 60 µmol/L
		// = 0.68 mg/dL: ratio 37 > 20.
		{"high urea to creatinine", func() Facts {
			f := base()
			f.Labs[Urea] = []Measurement{lab(Urea, 9, 2)}
			return f
		}(), true, []string{"leans hypovolaemic", "lean: towards salt wasting"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var card *Finding
			for _, fd := range rs.Evaluate(ChartReview, tc.f) {
				if fd.Rule == RuleSIADHPattern {
					card = &fd
				}
			}
			if card == nil {
				t.Fatal("no SIADH pattern card")
			}
			if (card.Figures["leansSaltWasting"] == 1) != tc.saltLean || strings.Contains(card.Summary, "salt wasting") != tc.saltLean {
				t.Errorf("salt-wasting lean %v, want %v: %q %v", card.Figures["leansSaltWasting"], tc.saltLean, card.Summary, card.Figures)
			}
			for _, w := range append(tc.wantDetail, "Brain-injury context: traumatic brain injury (Condition/tbi, since 2026-11-15)", "TSH: no result") {
				if !strings.Contains(card.Detail, w) {
					t.Errorf("detail lacks %q:\n%s", w, card.Detail)
				}
			}
		})
	}
	// After a subarachnoid haemorrhage no restriction volume is given, even
	// when the data lean towards SIADH.
	f := base(lab(BodyWeight, 70, 60), lab(BodyWeight, 71.4, 3))
	f.Conditions = []Condition{{Reference: "Condition/sah", ClinicalStatus: "active", Onset: &onset,
		Codings: []Coding{{System: "http://hl7.org/fhir/sid/icd-10-cm", Code: "I60.7"}}}}
	if fd, ok := siadhCard(rs.Evaluate(ChartReview, f)); !ok || !strings.Contains(fd.Detail, "no restriction volume is given: after subarachnoid haemorrhage") ||
		strings.Contains(fd.Detail, "the ratio implies") {
		t.Errorf("a restriction volume after SAH, or no card (%v):\n%s", ok, fd.Detail)
	}
	// A condition that began 40 days ago is no longer a brain-injury context.
	old := chartAt.Add(-40 * 24 * time.Hour)
	f = base(lab(BodyWeight, 72, 60), lab(BodyWeight, 70.5, 3))
	f.Conditions = []Condition{tbi}
	f.Conditions[0].Onset = &old
	if fd, ok := siadhCard(rs.Evaluate(ChartReview, f)); !ok || strings.Contains(fd.Detail, "Brain-injury") {
		t.Errorf("a 40-day-old injury read as the context, or no card (%v):\n%s", ok, fd.Detail)
	}
	// Without the condition there is no brain-injury reading.
	f = base(lab(BodyWeight, 72, 60), lab(BodyWeight, 70.5, 3))
	f.Conditions = nil
	if fd, ok := siadhCard(rs.Evaluate(ChartReview, f)); !ok || strings.Contains(fd.Detail, "Brain-injury") || fd.Figures["leansSaltWasting"] == 1 {
		t.Errorf("brain-injury reading without a context, or no card (%v):\n%s", ok, fd.Detail)
	}
}

// siadhCard is the SIADH pattern finding among fs.
func siadhCard(fs []Finding) (Finding, bool) {
	for _, fd := range fs {
		if fd.Rule == RuleSIADHPattern {
			return fd, true
		}
	}
	return Finding{}, false
}

// TestSIADHEndocrineAndFEUrate: the card names the TSH and cortisol results
// and computes the fractional excretion of urate from one urine sample
// with the serum values near it (invented values; 2400·60/(300·6000)·100 =
// 8.0 %, within the normal 4–11 % of Maesaka 2009).
func TestSIADHEndocrineAndFEUrate(t *testing.T) {
	rs := loadRuleset(t)
	f := chartFacts(t, "1970-01-10", map[float64]float64{30: 128, 2: 127}, lab(Glucose, 5, 2), lab(Urea, 3, 2), lab(Creatinine, 60, 2),
		lab(UrineOsmolality, 480, 1), lab(UrineSodium, 80, 1), lab(UrinePotassium, 30, 1), lab(TSH, 1.8, 24*10), lab(Cortisol, 410, 24*2),
		lab(Urate, 300, 2), lab(UrineUrate, 2400, 1), lab(UrineCreatinine, 6, 1))
	for _, fd := range rs.Evaluate(ChartReview, f) {
		if fd.Rule != RuleSIADHPattern {
			continue
		}
		for _, w := range []string{"TSH 1.8 mIU/L", "cortisol 410 nmol/L", "Fractional excretion of urate 8.0%", "within the normal 4–11%"} {
			if !strings.Contains(fd.Detail, w) {
				t.Errorf("detail lacks %q:\n%s", w, fd.Detail)
			}
		}
		if fd.Figures["feUrate"] != 8 || fd.Figures["tsh"] != 1.8 || fd.Figures["cortisol"] != 410 {
			t.Errorf("figures %v", fd.Figures)
		}
		return
	}
	t.Fatal("no SIADH pattern card")
}
