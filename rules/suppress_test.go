package rules

import (
	"strings"
	"testing"
	"time"
)

// The suppression policy is halite policy (common practice, no single
// source): these cases check the embedded policy does what its source text
// says, case by case.
func TestSuppress(t *testing.T) {
	rs, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	p := rs.Suppression()
	at := time.Date(2026, 11, 20, 12, 0, 0, 0, time.UTC)
	ago := func(d time.Duration) time.Time { return at.Add(-d) }
	infusion := func(ind Indicator, projected float64) Finding {
		return Finding{Rule: RuleProjectedOver, Indicator: ind, Order: "MedicationRequest/d1", Product: "rxnorm:1",
			Figures: map[string]float64{"projectedChange24h": projected, "sodiumLatest": 118}}
	}
	atSelect := func(f Finding, when time.Time) ShownCard {
		return ShownCard{Rule: f.Rule, Moment: MomentSelect, Subject: "p", Draft: "d", Indicator: f.Indicator, Figures: f.Figures, At: when}
	}
	profound := func(na, falling float64) Finding {
		return Finding{Rule: RuleProfoundOrFalling, Indicator: Warning,
			Figures: map[string]float64{"sodiumLatest": na, "fallFromPeak48h": 0, "sodiumFalling48h": falling}}
	}
	atChart := func(f Finding, when time.Time) ShownCard {
		return ShownCard{Rule: f.Rule, Moment: MomentChart, Indicator: f.Indicator, Figures: f.Figures, At: when}
	}
	drug := func(na, age float64) Finding {
		return Finding{Rule: RuleDrugHyponatremia, Indicator: Warning, Product: "drug:sertraline",
			Figures: map[string]float64{"sodiumLatest": na, "sodiumAgeHours": age}}
	}
	overridden := func(f Finding, shown, over time.Time) ShownCard {
		return ShownCard{Rule: f.Rule, Moment: MomentSign, Subject: "p", Draft: "x", Indicator: f.Indicator, Figures: f.Figures,
			At: shown, OverriddenAt: over}
	}
	cases := []struct {
		name    string
		f       Finding
		m       Moment
		subject string
		draft   string
		shown   []ShownCard
		reason  string // "" = shown
	}{
		{"first time: shown", infusion(Warning, 9), MomentSign, "p", "d", nil, ""},
		{"select then sign, same draft, same figures", infusion(Warning, 9), MomentSign, "p", "d",
			[]ShownCard{atSelect(infusion(Warning, 9), ago(2*time.Minute))}, SuppressedSelectToSign},
		{"select then sign, figures within tolerance", infusion(Warning, 9.04), MomentSign, "p", "d",
			[]ShownCard{atSelect(infusion(Warning, 9), ago(2*time.Minute))}, SuppressedSelectToSign},
		{"select then sign, projection changed (rate edited)", infusion(Warning, 11), MomentSign, "p", "d",
			[]ShownCard{atSelect(infusion(Warning, 9), ago(2*time.Minute))}, ""},
		{"select then sign, indicator rose", infusion(Critical, 9), MomentSign, "p", "d",
			[]ShownCard{atSelect(infusion(Warning, 9), ago(2*time.Minute))}, ""},
		{"select then sign, another draft", infusion(Warning, 9), MomentSign, "p", "other",
			[]ShownCard{atSelect(infusion(Warning, 9), ago(2*time.Minute))}, ""},
		{"select then sign, another product", infusion(Warning, 9), MomentSign, "q", "d",
			[]ShownCard{atSelect(infusion(Warning, 9), ago(2*time.Minute))}, ""},
		{"select then sign after the window", infusion(Warning, 9), MomentSign, "p", "d",
			[]ShownCard{atSelect(infusion(Warning, 9), ago(61*time.Minute))}, ""},
		{"select then select again is shown", infusion(Warning, 9), MomentSelect, "p", "d",
			[]ShownCard{atSelect(infusion(Warning, 9), ago(2*time.Minute))}, ""},
		{"critical never held back by default", infusion(Critical, 9), MomentSign, "p", "d",
			[]ShownCard{atSelect(infusion(Critical, 9), ago(2*time.Minute))}, ""},
		{"chart: unchanged within the interval", profound(123, 0), MomentChart, "", "",
			[]ShownCard{atChart(profound(123, 0), ago(3*time.Hour))}, SuppressedChartUnchanged},
		{"chart: rising on treatment", profound(124, 0), MomentChart, "", "",
			[]ShownCard{atChart(profound(122, 0), ago(3*time.Hour))}, SuppressedChartUnchanged},
		{"chart: lower by the margin", profound(122, 0), MomentChart, "", "",
			[]ShownCard{atChart(profound(123, 0), ago(3*time.Hour))}, ""},
		{"chart: a falling trend always shows", profound(123, 1), MomentChart, "", "",
			[]ShownCard{atChart(profound(123, 1), ago(1*time.Hour))}, ""},
		{"chart: after the interval", profound(123, 0), MomentChart, "", "",
			[]ShownCard{atChart(profound(123, 0), ago(13*time.Hour))}, ""},
		{"chart: judged against the last card shown", profound(122.5, 0), MomentChart, "", "",
			[]ShownCard{atChart(profound(124, 0), ago(6*time.Hour)), atChart(profound(123, 0), ago(2*time.Hour))}, SuppressedChartUnchanged},
		{"chart: a rule without a watched figure shows on any change", Finding{Rule: RuleSIADHPattern, Indicator: Info,
			Figures: map[string]float64{"urinePlasmaElectrolyteRatio": 1.2}}, MomentChart, "", "",
			[]ShownCard{{Rule: RuleSIADHPattern, Moment: MomentChart, Indicator: Info, Figures: map[string]float64{"urinePlasmaElectrolyteRatio": 0.9}, At: ago(time.Hour)}},
			""},
		{"overridden with a reason, no worse, the clock figure aside", drug(128, 30), MomentSign, "p", "new",
			[]ShownCard{overridden(drug(128, 4), ago(26*time.Hour), ago(23*time.Hour))}, SuppressedOverridden},
		{"overridden, then sodium lower by the margin", drug(126, 3), MomentSign, "p", "new",
			[]ShownCard{overridden(drug(128, 4), ago(5*time.Hour), ago(5*time.Hour))}, ""},
		{"overridden, after the period", drug(128, 3), MomentSign, "p", "new",
			[]ShownCard{overridden(drug(128, 4), ago(30*time.Hour), ago(25*time.Hour))}, ""},
		{"overridden for another product", drug(128, 3), MomentSign, "q", "new",
			[]ShownCard{overridden(drug(128, 4), ago(5*time.Hour), ago(5*time.Hour))}, ""},
		{"shown and not overridden: a new order is shown", drug(128, 3), MomentSign, "p", "new",
			[]ShownCard{{Rule: RuleDrugHyponatremia, Moment: MomentSign, Subject: "p", Draft: "x", Indicator: Warning,
				Figures: drug(128, 4).Figures, At: ago(time.Hour)}}, ""},
		{"overridden, and the sodium is falling: shown", profound(124.5, 1), MomentChart, "", "",
			[]ShownCard{{Rule: RuleProfoundOrFalling, Moment: MomentChart, Indicator: Warning, Figures: profound(125, 1).Figures,
				At: ago(2 * time.Hour), OverriddenAt: ago(2 * time.Hour)}}, ""},
		{"overridden, then it starts falling: shown", profound(124.5, 1), MomentChart, "", "",
			[]ShownCard{{Rule: RuleProfoundOrFalling, Moment: MomentChart, Indicator: Warning, Figures: profound(125, 0).Figures,
				At: ago(2 * time.Hour), OverriddenAt: ago(2 * time.Hour)}}, ""},
		{"overridden, the watched figure now missing: shown", Finding{Rule: RuleDrugHyponatremia, Indicator: Warning, Product: "drug:sertraline",
			Figures: map[string]float64{}}, MomentSign, "p", "new",
			[]ShownCard{overridden(drug(128, 4), ago(5*time.Hour), ago(5*time.Hour))}, ""},
		{"select then sign, info became a warning", Finding{Rule: RuleWaterDrug, Indicator: Warning, Figures: map[string]float64{"sodiumLatest": 130}},
			MomentSign, "p", "d", []ShownCard{{Rule: RuleWaterDrug, Moment: MomentSelect, Subject: "p", Draft: "d", Indicator: Info,
				Figures: map[string]float64{"sodiumLatest": 130}, At: ago(time.Minute)}}, ""},
		{"a draft whose product has no key", Finding{Rule: RuleProjectedOver, Indicator: Warning, Order: "MedicationRequest/d1",
			Figures: map[string]float64{"projectedChange24h": 9}}, MomentSign, "", "d",
			[]ShownCard{{Rule: RuleProjectedOver, Moment: MomentSelect, Draft: "d", Indicator: Warning,
				Figures: map[string]float64{"projectedChange24h": 9}, At: ago(time.Minute)}}, ""},
		{"select then sign, info unchanged", Finding{Rule: RuleWaterDrug, Indicator: Info, Figures: map[string]float64{"sodiumLatest": 130}},
			MomentSign, "p", "d", []ShownCard{{Rule: RuleWaterDrug, Moment: MomentSelect, Subject: "p", Draft: "d", Indicator: Info,
				Figures: map[string]float64{"sodiumLatest": 130}, At: ago(time.Minute)}}, SuppressedSelectToSign},
		{"a card from after the call's time is not counted", profound(123, 0), MomentChart, "", "",
			[]ShownCard{atChart(profound(123, 0), at.Add(time.Hour))}, ""},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, ok := p.Suppress(c.f, c.m, c.subject, c.draft, c.shown, at)
			if c.reason == "" {
				if ok {
					t.Fatalf("held back (%s), want shown", got.Reason)
				}
				return
			}
			if !ok || got.Reason != c.reason {
				t.Fatalf("got %q %v, want %q", got.Reason, ok, c.reason)
			}
		})
	}
}

func TestSuppressCriticalOnlyWhenTheSiteSaysSo(t *testing.T) {
	rs, err := LoadWithOverride([]byte(`{"suppression": {"suppressCritical": true}}`))
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 11, 20, 12, 0, 0, 0, time.UTC)
	f := Finding{Rule: RuleLimitExceeded, Indicator: Critical, Figures: map[string]float64{"riseFromNadir24h": 11}}
	prior := []ShownCard{{Rule: f.Rule, Moment: MomentSelect, Draft: "d", Indicator: Critical, Figures: f.Figures, At: at.Add(-time.Minute)}}
	if _, ok := rs.Suppression().Suppress(f, MomentSign, "", "d", prior, at); !ok {
		t.Fatal("suppressCritical set: the repeat should be held back")
	}
	def, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	if _, ok := def.Suppression().Suppress(f, MomentSign, "", "d", prior, at); ok {
		t.Fatal("default policy held back a critical card")
	}
}

func TestSuppressionPolicyRefusals(t *testing.T) {
	for _, c := range []struct{ override, want string }{
		{`{"suppression": {"overrideHours": -1}}`, "overrideHours"},
		{`{"suppression": {"selectToSignMinutes": 2000}}`, "selectToSignMinutes"},
		{`{"suppression": {"unchanged": {"absolute": 0.05, "relative": 1.5}}}`, "relative below 1"},
		{`{"suppression": {"source": ""}}`, "source"},
		{`{"suppression": {"watch": {"no-such-rule": {"figure": "x", "worse": "higher", "margin": 1}}}}`, "not a rule"},
		{`{"suppression": {"watch": {"hyponatremia-overcorrected": {"figure": "x", "worse": "up", "margin": 1}}}}`, "worse"},
		{`{"suppression": {"watch": {"hyponatremia-overcorrected": {"figure": "x", "worse": "higher", "margin": 0}}}}`, "margin"},
		{`{"suppression": {"clockFigures": ["sodiumLatest"]}}`, "clock alone"},
		{`{"suppression": {"watch": {"drug-hyponatremia-risk": {"figure": "sodiumAgeHours", "worse": "higher", "margin": 1}}}}`, "clock figure"},
	} {
		_, err := LoadWithOverride([]byte(c.override))
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: got %v, want an error naming %q", c.override, err, c.want)
		}
	}
}

func TestProductKey(t *testing.T) {
	for _, c := range []struct {
		m    Medication
		want string
	}{
		{Medication{Codings: []Coding{{System: "http://snomed.info/sct", Code: "1"}, {System: SystemRxNorm, Code: "313002"}}}, "rxnorm:313002"},
		{Medication{Codings: []Coding{{System: "urn:local", Code: "NS3"}}, Text: "x"}, "urn:local|NS3"},
		{Medication{Text: " Sodium Chloride 3% "}, "text:sodium chloride 3%"},
		{Medication{Text: "  "}, ""},
	} {
		if got := ProductKey(c.m); got != c.want {
			t.Errorf("ProductKey = %q, want %q", got, c.want)
		}
	}
}

func TestDraftKey(t *testing.T) {
	rate := func(v float64) *float64 { return &v }
	o := MedicationOrder{Reference: "MedicationRequest/d1", Medication: Medication{Codings: []Coding{{System: SystemRxNorm, Code: "1"}}},
		RateMlPerHour: rate(30), Rate: "30 mL/h"}
	edited := o
	edited.Rate = "40 mL/h"
	noID := o
	noID.Reference = "MedicationRequest/"
	switch {
	case DraftKey(o) == "" || DraftKey(o) != DraftKey(o):
		t.Error("a draft needs a stable key")
	case DraftKey(edited) == DraftKey(o):
		t.Error("an edited rate kept the draft's key")
	case DraftKey(noID) != "":
		t.Error("a draft without an id has a key")
	}
}
