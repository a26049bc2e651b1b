package rules

import (
	"testing"
	"time"
	"unicode/utf8"
)

// TestInfusionCardPolicy walks each indicator path of the infusion check on
// invented facts (expectations follow from the mass balance and the policy
// limits, as in assess_test.go).
func TestInfusionCardPolicy(t *testing.T) {
	rs := loadRuleset(t)
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	lowK := map[Analyte][]Measurement{Potassium: {{Analyte: Potassium, Value: 3.1, At: at.Add(-6 * time.Hour)}}}
	woman := func(weight float64, na map[float64]float64, extra map[Analyte][]Measurement) Facts {
		return assessFacts(t, SexFemale, "1986-01-10", weight, na, extra)
	}
	rate := func(v float64) *float64 { return &v }
	order := func(text string, r float64) MedicationOrder {
		return MedicationOrder{Reference: "MedicationRequest/d", Medication: Medication{Text: text}, RateMlPerHour: rate(r), Selected: true, Draft: true}
	}
	for _, tc := range []struct {
		name      string
		facts     Facts
		order     MedicationOrder
		rule      string
		indicator Indicator
	}{
		// 4 already + 7.8 projected = 11.8 > 10.
		{"projected over the limit", woman(60, map[float64]float64{20: 112, 2: 116}, nil), order("3% saline", 25), RuleProjectedOver, Warning},
		// Same at high risk (hypokalemia): limit 8, projected over → critical.
		{"projected over at high risk", woman(60, map[float64]float64{20: 112, 2: 116}, lowK), order("3% saline", 25), RuleProjectedOver, Critical},
		// 11 already > 10 and 3% adds sodium.
		{"limit already exceeded", woman(60, map[float64]float64{20: 110, 2: 121}, nil), order("3% saline", 10), RuleLimitExceeded, Critical},
		{"hypertonic without a weight", woman(0, map[float64]float64{2: 116}, nil), order("3% saline", 10), RuleNoProjection, Warning},
		// 0.24 L of 3%: 0.24 × 397/30.24 = 3.2 mmol/L, within the limit.
		{"hypertonic within the limit", woman(60, map[float64]float64{2: 116}, nil), order("3% saline", 10), RuleHypertonicOrder, Info},
		// Rising too fast already, but 5% dextrose lowers sodium: no limit card.
		{"order moving the other way", woman(60, map[float64]float64{20: 110, 2: 121}, nil), order("D5W", 100), "", 0},
		{"isotonic at normal sodium", woman(60, map[float64]float64{2: 139}, nil), order("0.9% sodium chloride", 100), "", 0},
		{"not selected", woman(60, map[float64]float64{20: 110, 2: 121}, nil),
			MedicationOrder{Medication: Medication{Text: "3% saline"}, RateMlPerHour: rate(10)}, "", 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := tc.facts
			f.DraftOrders = []MedicationOrder{tc.order}
			got := rs.Evaluate(InfusionCheck, f)
			if tc.rule == "" {
				if len(got) != 0 {
					t.Errorf("want no finding, got %+v", got)
				}
				return
			}
			if len(got) != 1 || got[0].Rule != tc.rule || got[0].Indicator != tc.indicator {
				t.Fatalf("got %+v, want %s %s", got, tc.rule, tc.indicator)
			}
			fd := got[0]
			if n := utf8.RuneCountInString(fd.Summary); n >= 140 || fd.Detail == "" || fd.Figures["limit24h"] == 0 {
				t.Errorf("summary %d characters %q, detail %d bytes, figures %v", n, fd.Summary, len(fd.Detail), fd.Figures)
			}
		})
	}
}
