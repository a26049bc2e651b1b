package rules

import (
	"strings"
	"testing"
	"time"
)

func TestLoadEmbeddedPolicy(t *testing.T) {
	rs, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	if !strings.HasPrefix(rs.Revision(), rs.Policy().Version+"+") || len(rs.Revision()) != len(rs.Policy().Version)+17 {
		t.Errorf("revision %q is not version+16 hex digits", rs.Revision())
	}
	for _, a := range Analytes() {
		if _, ok := rs.Policy().Plausibility[a]; !ok {
			t.Errorf("no plausibility bounds for %s", a)
		}
	}
}

// TestRevisionFollowsContent: any change to the effective policy changes
// the revision, so cards and logs always name the thresholds in force.
func TestRevisionFollowsContent(t *testing.T) {
	a, err := parse(embeddedPolicy)
	if err != nil {
		t.Fatal(err)
	}
	b, err := parse(embeddedPolicy)
	if err != nil {
		t.Fatal(err)
	}
	if a.Revision() != b.Revision() {
		t.Fatalf("revision is not deterministic: %s vs %s", a.Revision(), b.Revision())
	}
	changed := strings.Replace(string(embeddedPolicy), `"min": 90,`, `"min": 95,`, 1)
	if changed == string(embeddedPolicy) {
		t.Fatal("test edit did not apply")
	}
	c, err := parse([]byte(changed))
	if err != nil {
		t.Fatal(err)
	}
	if c.Revision() == a.Revision() {
		t.Errorf("changing a bound left the revision at %s", a.Revision())
	}
}

func TestParseRejectsBadPolicy(t *testing.T) {
	for name, edit := range map[string]func(string) string{
		"unknown field":     func(s string) string { return strings.Replace(s, `"version"`, `"versoin"`, 1) },
		"wrong unit":        func(s string) string { return strings.Replace(s, `"unit": "umol/L"`, `"unit": "mg/dL"`, 1) },
		"unknown analyte":   func(s string) string { return strings.Replace(s, `"urine-sodium"`, `"urine-sodum"`, 1) },
		"min not below max": func(s string) string { return strings.Replace(s, `"max": 200,`, `"max": 80,`, 1) },
		"high-risk limit above the 24-h limit": func(s string) string {
			return strings.Replace(s, `{"value": 8, `, `{"value": 12,`, 1)
		},
		"limit without source": func(s string) string {
			return strings.Replace(s, `"mmol/L/h", "source": "Adrogué HJ, Madias NE, N Engl J Med 2000;342:1493-1499 (from memory)"`,
				`"mmol/L/h", "source": ""`, 1)
		},
		"TBW fraction above 1": func(s string) string { return strings.Replace(s, `"child": 0.6`, `"child": 1.2`, 1) },
		"elderly age below adult age": func(s string) string {
			return strings.Replace(s, `"adultFromAge": 18, "elderlyFromAge": 65`, `"adultFromAge": 18, "elderlyFromAge": 10`, 1)
		},
	} {
		edited := edit(string(embeddedPolicy))
		if edited == string(embeddedPolicy) {
			t.Fatalf("%s: test edit did not apply", name)
		}
		_, err := parse([]byte(edited))
		if err == nil {
			t.Errorf("%s: accepted", name)
		} else if strings.Contains(err.Error(), "unknown field") && name != "unknown field" {
			t.Errorf("%s: refused for the wrong reason: %v", name, err)
		}
	}
}

// TestCheckPlausible checks against the policy's own bounds (sodium 90–200
// mmol/L, weight 0.3–400 kg, height 20–250 cm; halite policy data, common
// practice), with invented values either side.
func TestCheckPlausible(t *testing.T) {
	rs, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		a  Analyte
		v  float64
		ok bool
	}{
		{Sodium, 140, true}, {Sodium, 1400, false}, {Sodium, 14, false},
		{BodyWeight, 0.9, true}, {BodyWeight, 0, false}, {BodyHeight, 1.7, false},
	} {
		if ok, why := rs.CheckPlausible(tc.a, tc.v); ok != tc.ok || (!ok && why == "") {
			t.Errorf("CheckPlausible(%s, %g) = %v %q, want %v", tc.a, tc.v, ok, why, tc.ok)
		}
	}
}

func TestAgeYears(t *testing.T) {
	birth := time.Date(1960, 3, 15, 0, 0, 0, 0, time.UTC)
	p := Patient{BirthDate: &birth}
	for _, tc := range []struct {
		at   time.Time
		want int
	}{
		{time.Date(2025, 3, 14, 23, 0, 0, 0, time.UTC), 64},
		{time.Date(2025, 3, 15, 0, 0, 0, 0, time.UTC), 65},
		{time.Date(2025, 12, 1, 0, 0, 0, 0, time.UTC), 65},
	} {
		if got, ok := p.AgeYears(tc.at); !ok || got != tc.want {
			t.Errorf("AgeYears(%s) = %d, %v; want %d", tc.at, got, ok, tc.want)
		}
	}
	if _, ok := (Patient{}).AgeYears(time.Now()); ok {
		t.Error("age known without a birth date")
	}
}

// TestLoadWithOverride: a site override changes only what it names, is
// validated as a whole, and changes the revision.
func TestLoadWithOverride(t *testing.T) {
	base, err := Load()
	if err != nil {
		t.Fatal(err)
	}
	rs, err := LoadWithOverride([]byte(`{"limits": {"hyponatremiaRise24h": {"value": 9, "source": "local protocol (invented for this test)"}},
		"cards": {"rules": {"hypertonic-saline-projection": {"indicator": "warning", "recheckHours": 2}}}}`))
	if err != nil {
		t.Fatal(err)
	}
	l := rs.Policy().Limits.HyponatremiaRise24h
	if l.Value != 9 || l.Unit != "mmol/L" || l.Source != "local protocol (invented for this test)" {
		t.Errorf("overridden limit %+v: value and source replaced, unit kept", l)
	}
	if got := rs.Policy().Limits.HyponatremiaRise48h; got != base.Policy().Limits.HyponatremiaRise48h {
		t.Errorf("an unnamed limit changed: %+v", got)
	}
	if r := rs.Policy().Cards.Rules[RuleHypertonicOrder]; r.Indicator != Warning || r.RecheckHours != 2 {
		t.Errorf("card rule %+v", r)
	}
	if len(rs.Policy().Cards.Rules) != len(base.Policy().Cards.Rules) {
		t.Errorf("overriding one card rule dropped others: %d rules", len(rs.Policy().Cards.Rules))
	}
	if rs.Revision() == base.Revision() {
		t.Error("override left the revision unchanged")
	}
	if same, err := LoadWithOverride([]byte("  ")); err != nil || same.Revision() != base.Revision() {
		t.Errorf("empty override: %v, revision %s vs %s", err, same.Revision(), base.Revision())
	}
	for name, o := range map[string]string{
		"unknown member":         `{"limits": {"hyponatremiaRise24": {"value": 9, "source": "x"}}}`,
		"value without a source": `{"limits": {"hyponatremiaRise24h": {"value": 9}}}`,
		"invalid as a whole":     `{"limits": {"hyponatremiaRise24hHighRisk": {"value": 14, "source": "x"}}}`,
		"unknown indicator":      `{"cards": {"rules": {"hypertonic-saline-projection": {"indicator": "urgent"}}}}`,
		"unknown rule":           `{"cards": {"rules": {"no-such-rule": {"indicator": "info", "recheckHours": 2}}}}`,
		"trailing data":          `{} {}`,
	} {
		if _, err := LoadWithOverride([]byte(o)); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
}

// TestLimitsFromGuidelines holds the embedded limits to their published
// values (reference notes §1): 10 mmol/L in the first 24 h (Spasovski G et
// al., Eur J Endocrinol 2014; from memory), 18 in 48 h (Verbalis JG et al.,
// Am J Med 2013, from memory; the SALSA trial's overcorrection definition,
// Baek SH et al., JAMA Intern Med 2021 [V]), 8 in any 24 h at high risk
// (Verbalis 2013 as restated by George JC et al., CJASN 2018 [V]); a fall of
// 10 per 24 h and 0.5 per hour in hypernatremia (Adrogué HJ, Madias NE,
// N Engl J Med 2000;342:1493-1499, from memory; the same in a review by
// Theisen-Toupal J, Mattison MLP [V]). Each must name its source.
func TestLimitsFromGuidelines(t *testing.T) {
	l := policy(t).Limits
	for _, tc := range []struct {
		name   string
		got    Limit
		want   float64
		author string
	}{
		{"hyponatremiaRise24h", l.HyponatremiaRise24h, 10, "Spasovski"},
		{"hyponatremiaRise48h", l.HyponatremiaRise48h, 18, "Verbalis"},
		{"hyponatremiaRise24hHighRisk", l.HyponatremiaRise24hHighRisk, 8, "George"},
		{"hypernatremiaFall24h", l.HypernatremiaFall24h, 10, "Adrogué"},
		{"hypernatremiaFallPerHour", l.HypernatremiaFallPerHour, 0.5, "Adrogué"},
	} {
		if tc.got.Value != tc.want || !strings.Contains(tc.got.Source, tc.author) {
			t.Errorf("%s = %g (%q), want %g citing %s", tc.name, tc.got.Value, tc.got.Source, tc.want, tc.author)
		}
	}
}
