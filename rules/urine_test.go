package rules

import (
	"strings"
	"testing"
	"time"
)

// Electrolyte-free water clearance, V × (1 − (U_Na + U_K)/P_Na): the check
// value of halite's clinical reference notes §4.2 [derived]: V 2 L/day,
// U_Na 50, U_K 30, P_Na 125 → 0.72 L/day.
func TestElectrolyteFreeWaterClearance(t *testing.T) {
	if got := ElectrolyteFreeWaterClearance(2, 50+30, 125); !near(got, 0.72, 1e-12) {
		t.Errorf("EFWC %v, want 0.72", got)
	}
}

// Ongoing urine losses (issue 19 items 2 and 4) on invented facts; the
// expectations are the mass balance with urine, Na₂₄ = (Na·TBW + Σ(Na+K)ᵢVᵢ
// − (Na+K)ᵤVᵤ)/(TBW + ΣVᵢ − Vᵤ), worked by hand.
func TestUrineLosses(t *testing.T) {
	rs := loadRuleset(t)
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	volume := func(ml, hours, endedHoursAgo float64) Measurement {
		return Measurement{Analyte: UrineVolume, Value: ml, PeriodHours: hours, At: at.Add(-time.Duration(endedHoursAgo * float64(time.Hour)))}
	}
	urine := func(na, k, osm float64, vols ...Measurement) map[Analyte][]Measurement {
		return map[Analyte][]Measurement{UrineVolume: vols,
			UrineSodium:     {{Analyte: UrineSodium, Value: na, At: at.Add(-3 * time.Hour)}},
			UrinePotassium:  {{Analyte: UrinePotassium, Value: k, At: at.Add(-3 * time.Hour)}},
			UrineOsmolality: {{Analyte: UrineOsmolality, Value: osm, At: at.Add(-3 * time.Hour)}}}
	}
	rate := 100.0
	saline := MedicationOrder{Reference: "MedicationRequest/ns", Medication: Medication{Text: "0.9% saline"}, RateMlPerHour: &rate, Selected: true, Draft: true}

	t.Run("desalination", func(t *testing.T) {
		// Woman, 60 kg (TBW 30 L), sodium 120; 0.9% saline 2.4 L in 24 h.
		// Urine 300 + 300 mL over two 3-h periods = 100 mL/h → 2.4 L/day, Na + K 120 + 60 = 180.
		f := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{2: 120},
			urine(120, 60, 600, volume(300, 3, 0.5), volume(300, 3, 3.5)))
		f.DraftOrders = []MedicationOrder{saline}
		a := rs.AssessInfusion(f, saline)
		// Infusate only: 2.4 × (154 − 120)/32.4 = +2.52. With the urine:
		// (2.4 × 34 − 2.4 × 60)/(30 + 2.4 − 2.4) = −62.4/30 = −2.08.
		if !near(*a.ProjectedChange24h, 2.4*34/32.4, 1e-9) || a.ProjectedChange24hWithUrine == nil || !near(*a.ProjectedChange24hWithUrine, -62.4/30, 1e-9) {
			t.Fatalf("infusate-only %v, with urine %v", *a.ProjectedChange24h, a.ProjectedChange24hWithUrine)
		}
		// EFWC = 2.4 × (1 − 180/120) = −1.2 L/day: the urine is more concentrated than plasma.
		if !near(*a.EFWCLitres, -1.2, 1e-9) {
			t.Errorf("EFWC %v", *a.EFWCLitres)
		}
		fs := rs.Evaluate(InfusionCheck, f)
		if len(fs) != 1 || fs[0].Rule != RuleDesalination || fs[0].Indicator != Warning ||
			!strings.Contains(fs[0].Summary, "urine Na + K 180 mmol/L exceeds its 154") || fs[0].Figures["projectedChange24hWithUrine"] != -2.1 ||
			fs[0].Figures["urineNaKmmolPerL"] != 180 || fs[0].Figures["urineOutputMlPerHour"] != 100 {
			t.Errorf("findings %+v", fs)
		}
	})
	t.Run("aquaresis", func(t *testing.T) {
		// 900 mL over 6 h = 150 mL/h with urine osmolality 80: an aquaresis.
		f := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{2: 125}, urine(20, 10, 80, volume(900, 6, 0)))
		f.DraftOrders = []MedicationOrder{saline}
		fs := rs.Evaluate(InfusionCheck, f)
		if len(fs) != 1 || fs[0].Rule != RuleAquaresis || fs[0].Indicator != Warning || !strings.Contains(fs[0].Summary, "150 mL/h") {
			t.Errorf("findings %+v", fs)
		}
	})
	t.Run("overlapping periods are counted once, short charting not at all", func(t *testing.T) {
		f := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{2: 125},
			urine(20, 10, 300, volume(250, 3, 1), volume(200, 2, 0))) // oldest first, as fhirmap orders a series
		// The 3-h period (ended 1 h ago) overlaps the newer 2-h one: 200 mL / 2 h.
		if u := ReadUrineLosses(rs.Policy().UrineLosses, f); u.RateMlPerHour == nil || *u.RateMlPerHour != 100 || u.Hours != 2 {
			t.Errorf("rate %v over %v h", u.RateMlPerHour, u.Hours)
		}
		g := assessFacts(t, SexFemale, "1986-01-10", 60, map[float64]float64{2: 125}, urine(20, 10, 300, volume(100, 1, 0)))
		if u := ReadUrineLosses(rs.Policy().UrineLosses, g); u.RateMlPerHour != nil {
			t.Errorf("a rate from 1 h of charting (policy minimum 2 h): %v", *u.RateMlPerHour)
		}
	})
}
