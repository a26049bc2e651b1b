package rules

import (
	"strings"
	"testing"
	"time"
)

// TestDesmopressinAfterNeurosurgery: desmopressin within the policy window
// (14 days) after a listed procedure, with sodium below 135 or a fall of
// 3 mmol/L in 24 h, is a critical card at chart opening (active) and at
// signing (drafted). The window and thresholds are halite policy (common
// practice); the course they guard against is the triphasic response
// after pituitary surgery (Almalki MH et al., Sultan Qaboos Univ Med J
// 2021;21:354-364).
func TestDesmopressinAfterNeurosurgery(t *testing.T) {
	rs := loadRuleset(t)
	const adult = "1981-05-20"
	ddavp := func(status string) MedicationOrder {
		o := MedicationOrder{Reference: "MedicationRequest/ddavp-" + status, Status: status, Medication: Medication{Text: "Desmopressin acetate 0.1 mg oral tablet"}}
		if status == "draft" {
			o.Draft, o.Selected = true, true
		}
		return o
	}
	surgery := func(code string, daysAgo float64) Procedure {
		return Procedure{Reference: "Procedure/p1", Codings: []Coding{{System: "http://snomed.info/sct", Code: code}},
			At: chartAt.Add(-time.Duration(daysAgo * 24 * float64(time.Hour)))}
	}
	facts := func(na map[float64]float64, p []Procedure, meds ...MedicationOrder) Facts {
		f := chartFacts(t, adult, na)
		f.Procedures = p
		for _, o := range meds {
			if o.Draft {
				f.DraftOrders = append(f.DraftOrders, o)
			} else {
				f.Medications = append(f.Medications, o)
			}
		}
		return f
	}
	falling := map[float64]float64{26: 139, 2: 133} // 133 now, 6 below the day before
	for _, c := range []struct {
		name  string
		check Check
		f     Facts
		want  bool
		days  float64
	}{
		{"active, day 7 after pituitary surgery, sodium 133 and falling", ChartReview, facts(falling, []Procedure{surgery("45368001", 7)}, ddavp("active")), true, 7},
		{"drafted at signing", InfusionCheck, facts(falling, []Procedure{surgery("45368001", 7)}, ddavp("draft")), true, 7},
		{"after a craniotomy, sodium 138 after a fall of 4", ChartReview, facts(map[float64]float64{20: 142, 2: 138}, []Procedure{surgery("25353009", 3)}, ddavp("active")), true, 3},
		{"sodium 137 and steady", ChartReview, facts(map[float64]float64{20: 137, 2: 137}, []Procedure{surgery("45368001", 7)}, ddavp("active")), false, 0},
		{"15 days after: outside the window", ChartReview, facts(falling, []Procedure{surgery("45368001", 15)}, ddavp("active")), false, 0},
		{"another procedure", ChartReview, facts(falling, []Procedure{surgery("80146002", 7)}, ddavp("active")), false, 0},
		{"no desmopressin", ChartReview, facts(falling, []Procedure{surgery("45368001", 7)}), false, 0},
		{"no procedure", ChartReview, facts(falling, nil, ddavp("active")), false, 0},
	} {
		t.Run(c.name, func(t *testing.T) {
			var got *Finding
			for _, f := range rs.Evaluate(c.check, c.f) {
				if f.Rule == RuleDesmopressinAfterNeurosurgery {
					got = &f
				}
			}
			if !c.want {
				if got != nil {
					t.Fatalf("flagged: %s", got.Summary)
				}
				return
			}
			if got == nil {
				t.Fatal("not flagged")
			}
			if got.Indicator != Critical || got.Figures["daysSinceProcedure"] != c.days || len([]rune(got.Summary)) >= 140 {
				t.Errorf("%s %v: %s", got.Indicator, got.Figures, got.Summary)
			}
			if c.check == InfusionCheck && (got.Order == "" || len(got.Advice) != 2 || got.Advice[1].Kind != AdviseWithdraw) {
				t.Errorf("a drafted order's card offers its removal: %+v", got.Advice)
			}
		})
	}
}

// TestPostoperativeDayInTheDisplayZone: the day after surgery is counted
// in calendar days of the display zone: surgery at 02:00 UTC on 14 Nov is
// 21:00 on 13 Nov in New York, so 20 Nov 08:00 UTC is day 6 in UTC and
// day 7 there.
func TestPostoperativeDayInTheDisplayZone(t *testing.T) {
	ny, err := time.LoadLocation("America/New_York")
	if err != nil {
		t.Fatal(err)
	}
	f := chartFacts(t, "1981-05-20", map[float64]float64{26: 139, 2: 133})
	f.Procedures = []Procedure{{Reference: "Procedure/p", Codings: []Coding{{System: "http://snomed.info/sct", Code: "45368001"}},
		At: time.Date(2026, 11, 14, 2, 0, 0, 0, time.UTC)}}
	f.Medications = []MedicationOrder{{Reference: "MedicationRequest/d", Status: "active", Medication: Medication{Text: "desmopressin 0.1 mg tablet"}}}
	for zone, want := range map[*time.Location]float64{nil: 6, ny: 7} {
		rs := loadRuleset(t).WithDisplay(Display{Zone: zone})
		var got float64
		for _, fd := range rs.Evaluate(ChartReview, f) {
			if fd.Rule == RuleDesmopressinAfterNeurosurgery {
				got = fd.Figures["daysSinceProcedure"]
			}
		}
		if got != want {
			t.Errorf("zone %v: day %g, want %g", zone, got, want)
		}
	}
}

// TestRetentionPhaseDays: a low sodium with desmopressin active reads as
// the second phase from the typical first retention day (5) to the last
// (10), earlier than them before day 5 — where isolated retention often
// begins — and after them past day 10 (the triphasic response: Khardori R,
// Medscape 2020; Almalki MH et al. 2021). The days are calendar days from
// the surgery's date in the display zone (UTC here): surgery at 09:00, the
// chart at 08:00.
func TestRetentionPhaseDays(t *testing.T) {
	rs := loadRuleset(t)
	for _, tc := range []struct {
		day  float64
		want string
	}{
		{4, "earlier than the typical retention days (5 to 10): retention, often without a polyuric phase before it, can begin now"},
		{5, "on day 5 fits the second phase"},
		{10, "on day 10 fits the second phase"},
		{11, "after the typical retention days"},
	} {
		f := chartFacts(t, "1981-05-20", map[float64]float64{30: 136, 2: 132})
		at := time.Date(2026, 11, 20-int(tc.day), 9, 0, 0, 0, time.UTC)
		f.Procedures = []Procedure{{Reference: "Procedure/tss", Codings: []Coding{{System: "http://snomed.info/sct", Code: "45368001"}}, At: at}}
		f.Medications = []MedicationOrder{{Reference: "MedicationRequest/ddavp", Status: "active", Medication: Medication{Text: "desmopressin 0.1 mg tablet"}}}
		var detail string
		for _, fd := range rs.Evaluate(ChartReview, f) {
			if fd.Rule == RuleDesmopressinAfterNeurosurgery {
				detail = fd.Detail
			}
		}
		if !strings.Contains(detail, tc.want) || !strings.Contains(detail, "desmopressin ordered: MedicationRequest/ddavp") {
			t.Errorf("day %g: want %q in:\n%s", tc.day, tc.want, detail)
		}
	}
}
