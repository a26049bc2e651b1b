package rules

import (
	"sort"
	"strings"
	"testing"
	"time"
)

// Scenario facts are invented; expectations are derived from the mass
// balance ΔNa = V·(Na+K−Na)/(TBW+V) (Adrogué–Madias scaled to volume; Chen
// & Shey, Kidney360 2021) with the policy limits (10/24 h, 18/48 h, 8/24 h
// at high risk: Spasovski 2014, Verbalis 2013 via George 2018) and the
// 3% NaCl label value 513 mmol/L (FDA label [V]).
func assessFacts(t *testing.T, sex Sex, birth string, weight float64, na map[float64]float64, extra map[Analyte][]Measurement) Facts {
	t.Helper()
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	f := Facts{At: at, Labs: map[Analyte][]Measurement{}}
	if birth != "" {
		b, _ := time.Parse("2006-01-02", birth)
		f.Patient = Patient{BirthDate: &b, Sex: sex}
	} else {
		f.Patient.Sex = sex
	}
	// hours ago → value, oldest first
	var hours []float64
	for h := range na {
		hours = append(hours, h)
	}
	sort.Sort(sort.Reverse(sort.Float64Slice(hours))) // most hours ago first
	for _, h := range hours {
		f.Labs[Sodium] = append(f.Labs[Sodium], Measurement{Analyte: Sodium, Value: na[h], At: at.Add(-time.Duration(h * float64(time.Hour)))})
	}
	if weight > 0 {
		f.Labs[BodyWeight] = []Measurement{{Analyte: BodyWeight, Value: weight, At: at.Add(-12 * time.Hour)}}
	}
	for a, s := range extra {
		f.Labs[a] = s
	}
	return f
}

func saline3(rate float64) MedicationOrder {
	return MedicationOrder{Reference: "MedicationRequest/d", Medication: Medication{Text: "3% saline"}, RateMlPerHour: &rate}
}

func TestAssessInfusionOvershoot(t *testing.T) {
	rs := loadRuleset(t)
	// 40-year-old woman, 60 kg (TBW 30 L), sodium 112 → 116 in the last 24 h.
	f := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{20: 112, 2: 116}, nil)
	a := rs.AssessInfusion(f, saline3(25))
	if len(a.Missing) != 0 || a.ProjectedTotal24h == nil || a.MaxRateMlPerHour == nil {
		t.Fatalf("incomplete: %+v", a)
	}
	// V = 0.6 L: change = 0.6 × (513 − 116)/(30 + 0.6) = 7.7843; total 4 + 7.7843.
	if !near(*a.ProjectedChange24h, 0.6*397/30.6, 1e-9) || !near(*a.ProjectedTotal24h, 4+0.6*397/30.6, 1e-9) {
		t.Errorf("projected %v total %v", *a.ProjectedChange24h, *a.ProjectedTotal24h)
	}
	if a.Limit24h != 10 || a.Achieved24h != 4 || *a.TBWLitres != 30 {
		t.Errorf("limit %v achieved %v TBW %v", a.Limit24h, a.Achieved24h, *a.TBWLitres)
	}
	// Allowed 6 more: V = 6 × 30/(397 − 6) L over 24 h.
	if want := 6.0 * 30 / 391 * 1000 / 24; !near(*a.MaxRateMlPerHour, want, 1e-9) {
		t.Errorf("max rate %v, want %v", *a.MaxRateMlPerHour, want)
	}
	// The rate that fits projects exactly the limit (the property).
	fit := rs.AssessInfusion(f, saline3(*a.MaxRateMlPerHour))
	if !near(*fit.ProjectedTotal24h, 10, 0.01) {
		t.Errorf("at the rate that fits, total %v, want 10", *fit.ProjectedTotal24h)
	}
}

func TestAssessInfusionHighRisk(t *testing.T) {
	rs := loadRuleset(t)
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	f := assessFacts(t, SexMale, "1968-03-01", 72, map[float64]float64{20: 112, 2: 115},
		map[Analyte][]Measurement{Potassium: {{Analyte: Potassium, Value: 3.1, At: at.Add(-6 * time.Hour)}}})
	a := rs.AssessInfusion(f, saline3(20))
	if a.Limit24h != 8 || len(a.Risk) != 1 || a.Risk[0].Factor != "hypokalemia" {
		t.Errorf("limit %v risk %+v; want the 8 mmol/L high-risk limit for hypokalemia", a.Limit24h, a.Risk)
	}
}

func TestAssessInfusionMissingInputs(t *testing.T) {
	rs := loadRuleset(t)
	for _, tc := range []struct {
		name string
		f    Facts
		want string
	}{
		{"no weight", assessFacts(t, SexFemale, "1986-01-10", 0, map[float64]float64{2: 116}, nil), "body weight"},
		{"no sex", assessFacts(t, SexMissing, "1986-01-10", 60, map[float64]float64{2: 116}, nil), "sex"},
		{"no birth date", assessFacts(t, SexFemale, "", 60, map[float64]float64{2: 116}, nil), "age"},
		{"sodium too old", assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{30: 116}, nil), "serum sodium"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			a := rs.AssessInfusion(tc.f, saline3(25))
			if a.ProjectedChange24h != nil || !strings.Contains(strings.Join(a.Missing, "; "), tc.want) {
				t.Errorf("projected %v, missing %q; want no projection and %q named", a.ProjectedChange24h, a.Missing, tc.want)
			}
		})
	}
	a := rs.AssessInfusion(assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{2: 116}, nil),
		MedicationOrder{Medication: Medication{Text: "invented fluid"}})
	if a.Composition != nil || !strings.Contains(strings.Join(a.Missing, "; "), "sodium and potassium content") {
		t.Errorf("unknown composition: %+v", a.Missing)
	}
}

func TestAssessInfusionHypernatremia(t *testing.T) {
	rs := loadRuleset(t)
	// 70-year-old man, 68 kg (TBW 34 L), sodium 161 → 150 in 19 h, 5% dextrose 150 mL/h.
	f := assessFacts(t, SexMale, "1956-05-05", 68, map[float64]float64{20: 161, 10: 156, 1: 150}, nil)
	rate := 150.0
	a := rs.AssessInfusion(f, MedicationOrder{Medication: Medication{Text: "D5W"}, RateMlPerHour: &rate})
	if !a.Hypernatremia || a.Limit24h != 10 || a.Achieved24h != 11 || !a.LimitReached {
		t.Fatalf("%+v", a)
	}
	// V = 3.6 L: change = 3.6 × (0 − 150)/(34 + 3.6); total −11 + change.
	if want := 3.6 * -150 / 37.6; !near(*a.ProjectedChange24h, want, 1e-9) || !near(*a.ProjectedTotal24h, -11+want, 1e-9) {
		t.Errorf("projected %v total %v", *a.ProjectedChange24h, *a.ProjectedTotal24h)
	}
	if a.MaxRateMlPerHour == nil || *a.MaxRateMlPerHour != 0 {
		t.Errorf("limit already reached: max rate %v, want 0", a.MaxRateMlPerHour)
	}
}

// The whole balance of the next 24 h (issue 19): drafts and running
// infusions counted together by Na₂₄ = (Na·TBW + Σ(Na+K)ᵢVᵢ)/(TBW + ΣVᵢ)
// (Adrogué–Madias's mass balance summed over infusates). Expectations are
// computed by hand from that formula; the facts are invented.
func TestAssessCombinedBalance(t *testing.T) {
	rs := loadRuleset(t)
	rate := func(v float64) *float64 { return &v }
	ns := func(ref string, mlh float64) MedicationOrder {
		return MedicationOrder{Reference: ref, Medication: Medication{Text: "0.9% saline"}, RateMlPerHour: rate(mlh)}
	}
	// 40-year-old woman, 64 kg (TBW 32 L), sodium 111.5 → 116 in 24 h
	// (achieved 4.5, 5.5 still allowed by the 24-h limit of 10).
	base := func() Facts {
		return assessFacts(t, SexFemale, "1986-01-10", 64, map[float64]float64{24: 111.5, 3: 116}, nil)
	}
	draft := saline3(18.7)
	draft.Selected = true

	t.Run("running saline counted", func(t *testing.T) {
		f := base()
		f.Medications = []MedicationOrder{ns("MedicationRequest/running", 100)}
		a := rs.AssessInfusion(f, draft)
		// 3%: 0.4488 L × (513 − 116) = 178.17; saline 2.4 L × (154 − 116) = 91.2;
		// change = 269.37/(32 + 2.8488) = 7.7297; the draft's share 178.17/34.8488.
		if a.ProjectedChange24h == nil || !near(*a.ProjectedChange24h, (0.4488*397+2.4*38)/(32+2.8488), 1e-9) {
			t.Fatalf("combined change %v", a.ProjectedChange24h)
		}
		if !near(*a.OrderChange24h, 0.4488*397/34.8488, 1e-9) || !near(*a.OthersChange24h, 2.4*38/34.4, 1e-9) {
			t.Errorf("order %v others %v", *a.OrderChange24h, *a.OthersChange24h)
		}
		if !a.OverLimit || a.OthersReachLimit {
			t.Errorf("over %v, others reach %v; want over, not by the others alone", a.OverLimit, a.OthersReachLimit)
		}
		// Rate that fits given the saline: V = (5.5·34.4 − 91.2)/(397 − 5.5) = 0.25032 L → 10.43 mL/h.
		if a.MaxRateMlPerHour == nil || !near(*a.MaxRateMlPerHour, (5.5*34.4-91.2)/(397-5.5)*1000/24, 1e-9) {
			t.Errorf("max rate %v", a.MaxRateMlPerHour)
		}
		// The same pair as two drafts gives the same balance.
		g := base()
		other := ns("MedicationRequest/other-draft", 100)
		other.Draft = true
		g.DraftOrders = []MedicationOrder{draft, other}
		if b := rs.AssessInfusion(g, draft); b.ProjectedChange24h == nil || !near(*b.ProjectedChange24h, *a.ProjectedChange24h, 1e-12) {
			t.Errorf("as drafts: %v, want %v", b.ProjectedChange24h, *a.ProjectedChange24h)
		}
	})
	t.Run("running fluids alone reach the limit", func(t *testing.T) {
		f := base()
		// 250 mL/h: 6 L × 38 / 38 L = 6.0 > 5.5 allowed.
		f.Medications = []MedicationOrder{ns("MedicationRequest/running", 250)}
		a := rs.AssessInfusion(f, draft)
		if !a.OthersReachLimit || !a.OverLimit || a.MaxRateMlPerHour != nil && *a.MaxRateMlPerHour != 0 {
			t.Errorf("others reach %v over %v max rate %v", a.OthersReachLimit, a.OverLimit, a.MaxRateMlPerHour)
		}
		fd := rs.Evaluate(InfusionCheck, Facts{At: f.At, Patient: f.Patient, Labs: f.Labs, Medications: f.Medications, DraftOrders: []MedicationOrder{draft}})
		// 6.0 − 5.5 = 0.5 beyond what is allowed.
		if len(fd) != 1 || !strings.HasPrefix(fd[0].Summary, "Other fluids alone bring a rise of 6.0 mmol/L") ||
			!strings.Contains(fd[0].Detail, "+6.0 mmol/L in 24 h, 0.5 mmol/L beyond the 5.5 mmol/L still allowed") {
			t.Errorf("findings %+v", fd)
		}
		for _, adv := range fd[0].Advice {
			if adv.Kind == AdviseRate {
				t.Errorf("a rate was offered although no volume fits: %+v", adv)
			}
		}
	})
	t.Run("an unknown infusion is named, not counted", func(t *testing.T) {
		f := base()
		f.Medications = []MedicationOrder{{Reference: "MedicationRequest/heparin", Medication: Medication{Text: "heparin 25,000 units in 250 mL"}, RateMlPerHour: rate(10)}}
		a := rs.AssessInfusion(f, draft)
		if len(a.Others) != 1 || a.Others[0].Composition != nil || !near(*a.ProjectedChange24h, 0.4488*397/32.4488, 1e-9) {
			t.Fatalf("others %+v change %v", a.Others, *a.ProjectedChange24h)
		}
		fd := rs.Evaluate(InfusionCheck, Facts{At: f.At, Patient: f.Patient, Labs: f.Labs, Medications: f.Medications, DraftOrders: []MedicationOrder{draft}})
		if len(fd) != 1 || !strings.Contains(fd[0].Detail, "Not counted: MedicationRequest/heparin (running") {
			t.Errorf("the unknown infusion is not named: %+v", fd)
		}
	})
	t.Run("a draft replacing a running order is not counted twice", func(t *testing.T) {
		f := base()
		f.Medications = []MedicationOrder{ns("MedicationRequest/running", 100)}
		replacing := draft
		replacing.Replaces = "MedicationRequest/running"
		if a := rs.AssessInfusion(f, replacing); len(a.Others) != 0 {
			t.Errorf("others %+v, want none: the draft replaces the running order", a.Others)
		}
	})
	t.Run("an administration in progress is what runs, not its order", func(t *testing.T) {
		f := base()
		f.Medications = []MedicationOrder{ns("MedicationRequest/running", 100)}
		given := ns("MedicationAdministration/now", 80)
		given.Status, given.ForRequest = "in-progress", "MedicationRequest/running"
		f.Infusing = []MedicationOrder{given}
		a := rs.AssessInfusion(f, draft)
		// Saline at the administered 80 mL/h: 1.92 L × 38 = 72.96; with the
		// 3%: (178.17 + 72.96)/(32 + 0.4488 + 1.92).
		if len(a.Others) != 1 || a.Others[0].Order.Reference != "MedicationAdministration/now" ||
			!near(*a.ProjectedChange24h, (0.4488*397+1.92*38)/(32+0.4488+1.92), 1e-9) {
			t.Errorf("others %+v change %v", a.Others, *a.ProjectedChange24h)
		}
	})
	t.Run("a single dose already on the chart is not running", func(t *testing.T) {
		f := base()
		f.Medications = []MedicationOrder{{Reference: "MedicationRequest/bolus", Medication: Medication{Text: "0.9% saline"}, Dose: &Quantity{Value: 500, Unit: "mL"}}}
		if a := rs.AssessInfusion(f, draft); len(a.Others) != 0 {
			t.Errorf("others %+v, want none", a.Others)
		}
	})
}

// Review findings on the whole-patient balance: an order that pulls the
// other way is judged by what everything counted does; administrations
// without a known request are each counted; hypertonic saline running only
// as an administration is seen beside a vaptan; an ended dose gives nothing.
func TestBalanceReviewFindings(t *testing.T) {
	rs := loadRuleset(t)
	rate := func(v float64) *float64 { return &v }
	hts := func(ref string, mlh float64) MedicationOrder {
		return MedicationOrder{Reference: ref, Status: "active", Medication: Medication{Text: "3% saline"}, RateMlPerHour: rate(mlh)}
	}
	d5w := MedicationOrder{Reference: "MedicationRequest/d5w", Medication: Medication{Text: "D5W"}, RateMlPerHour: rate(20), Draft: true, Selected: true}

	t.Run("a lowering draft while running 3% keeps the rise going past the limit", func(t *testing.T) {
		// 112 → 124 in 24 h (12 > 10); 3% at 60 mL/h: 1.44 × (513 − 124) = 560.2,
		// D5W 0.48 × (0 − 124) = −59.5; (560.2 − 59.5)/(30 + 1.92) = +15.7, still rising.
		f := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{20: 112, 2: 124}, nil)
		f.Medications, f.DraftOrders = []MedicationOrder{hts("MedicationRequest/hts", 60)}, []MedicationOrder{d5w}
		fs := rs.Evaluate(InfusionCheck, f)
		if len(fs) != 1 || fs[0].Rule != RuleLimitExceeded || fs[0].Indicator != Critical || !strings.Contains(fs[0].Summary, "+15.7 mmol/L in 24 h") {
			t.Errorf("findings %+v", fs)
		}
	})
	t.Run("a lowering draft beside running 3% over the limit is not the problem", func(t *testing.T) {
		f := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{20: 112, 2: 116}, nil)
		f.Medications, f.DraftOrders = []MedicationOrder{hts("MedicationRequest/hts", 60)}, []MedicationOrder{d5w}
		fs := rs.Evaluate(InfusionCheck, f)
		if len(fs) != 1 || fs[0].Rule != RuleProjectedOver || !strings.Contains(fs[0].Summary, "this order offsets") ||
			len(fs[0].Advice) != 1 || fs[0].Advice[0].Kind != AdviseRecheck || strings.Contains(fs[0].Detail, "no volume of this order fits") {
			t.Errorf("findings %+v", fs)
		}
	})
	t.Run("administrations without a known request are each counted", func(t *testing.T) {
		f := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{2: 116}, nil)
		a1, a2 := hts("MedicationAdministration/1", 10), hts("MedicationAdministration/2", 10)
		a1.Status, a2.Status = "in-progress", "in-progress"
		f.Infusing = []MedicationOrder{a1, a2}
		if pool := rs.candidates(f); len(pool) != 2 {
			t.Errorf("pool %+v, want both administrations", pool)
		}
	})
	t.Run("a vaptan draft beside 3% running only as an administration", func(t *testing.T) {
		f := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{2: 129}, nil)
		given := hts("MedicationAdministration/hts", 20)
		given.Status = "in-progress"
		f.Infusing = []MedicationOrder{given}
		f.DraftOrders = []MedicationOrder{{Reference: "MedicationRequest/tv", Medication: Medication{Text: "tolvaptan 15 mg"}, Draft: true, Selected: true}}
		fs := rs.Evaluate(InfusionCheck, f)
		if len(fs) != 1 || fs[0].Rule != RuleWaterDrug || !strings.Contains(fs[0].Summary, "hypertonic saline running (MedicationAdministration/hts)") {
			t.Errorf("findings %+v", fs)
		}
	})
	t.Run("an ended dose order gives nothing", func(t *testing.T) {
		at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
		past := at.Add(-time.Hour)
		one := 1
		o := MedicationOrder{Dose: &Quantity{Value: 500, Unit: "mL"}, Frequency: &one, Period: &Quantity{Value: 8, Unit: "h"}, EndsAt: &past}
		if v, _, ok := Volume24h(o, at); !ok || v != 0 {
			t.Errorf("volume %v %v, want 0", v, ok)
		}
	})
}
