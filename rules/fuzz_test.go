package rules

import "testing"

// FuzzLoadWithOverride: a site's policy override is outside input; any
// bytes either load a valid ruleset or fail with an error, never panic.
func FuzzLoadWithOverride(f *testing.F) {
	for _, s := range []string{``, `{}`, `{"limits": {"hyponatremiaRise24h": {"value": 9, "source": "x"}}}`,
		`{"cards": {"rules": {"hypertonic-saline-projection": {"indicator": "info", "recheckHours": 6}}}}`,
		`{"tbw": {"child": 2}}`, `[]`, `{"limits": null}`, `{"waterDrugs": {"drugs": []}}`} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, override []byte) {
		rs, err := LoadWithOverride(override)
		if err != nil {
			return
		}
		if rs.Revision() == "" || rs.Policy().Cards.HypertonicNaKAtLeast <= 154 {
			t.Fatalf("loaded an invalid policy: %+v", rs.Policy().Cards)
		}
	})
}
