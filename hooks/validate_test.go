package hooks

import (
	"encoding/json"
	"math"
	"strings"
	"testing"

	"github.com/halite-cds/halite/rules"
)

func TestCheckNoEmpty(t *testing.T) {
	for _, tc := range []struct {
		doc, allowed, wantErr string
	}{
		{`{"cards":[]}`, "cards", ""},
		{`{"cards":[]}`, "", "cards is an empty array"},
		{`{"a":{"b":null}}`, "", "a.b is null"},
		{`{"a":[{"b":""}]}`, "", "a[0].b is an empty string"},
		{`{"a":{"cards":[]}}`, "cards", "a.cards is an empty array"},
		{`{"a":{}}`, "", "a is an empty object"},
		{`{"a":1,"b":false,"c":"x"}`, "", ""},
	} {
		var allowed []string
		if tc.allowed != "" {
			allowed = []string{tc.allowed}
		}
		err := CheckNoEmpty([]byte(tc.doc), allowed...)
		if (err == nil) != (tc.wantErr == "") || (err != nil && !strings.Contains(err.Error(), tc.wantErr)) {
			t.Errorf("%s: got %v, want %q", tc.doc, err, tc.wantErr)
		}
	}
}

// TestValidateResponse checks the card rules of CDS Hooks 2.0 §Card
// Attributes and the logical-model invariants cds-resp-1…6.
func TestValidateResponse(t *testing.T) {
	good := func() Card {
		return Card{Summary: "Sodium rose 9 mmol/L in 18 h", Indicator: "warning", Source: Source{Label: "halite"}}
	}
	for _, tc := range []struct {
		name    string
		edit    func(c *Card)
		wantErr string
	}{
		{"valid", func(c *Card) {}, ""},
		{"summary empty", func(c *Card) { c.Summary = "" }, "summary is required"},
		{"summary 140 characters", func(c *Card) { c.Summary = strings.Repeat("é", 140) }, "under 140"},
		{"summary 139 characters", func(c *Card) { c.Summary = strings.Repeat("é", 139) }, ""},
		{"indicator hard-stop", func(c *Card) { c.Indicator = "hard-stop" }, "indicator"},
		{"no source label", func(c *Card) { c.Source.Label = "" }, "source.label"},
		{"suggestions without selectionBehavior", func(c *Card) {
			c.Suggestions = []Suggestion{{Label: "x"}}
		}, "selectionBehavior"},
		{"two recommended with at-most-one", func(c *Card) {
			c.SelectionBehavior = "at-most-one"
			c.Suggestions = []Suggestion{{Label: "a", IsRecommended: true}, {Label: "b", IsRecommended: true}}
		}, "at most one"},
		{"delete with resource", func(c *Card) {
			c.SelectionBehavior = "any"
			c.Suggestions = []Suggestion{{Label: "a", Actions: []Action{{Type: "delete", Description: "remove",
				ResourceID: "MedicationRequest/1", Resource: json.RawMessage(`{"resourceType":"MedicationRequest"}`)}}}}
		}, "delete needs resourceId"},
		{"action without description", func(c *Card) {
			c.SelectionBehavior = "any"
			c.Suggestions = []Suggestion{{Label: "a", Actions: []Action{{Type: "delete", ResourceID: "MedicationRequest/1"}}}}
		}, "description"},
		{"override reason without display", func(c *Card) {
			c.OverrideReasons = []Coding{{System: "s", Code: "c"}}
		}, "overrideReasons[0]"},
		{"appContext on absolute link", func(c *Card) {
			c.Links = []Link{{Label: "l", URL: "https://x.example", Type: "absolute", AppContext: "a"}}
		}, "appContext"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c := good()
			tc.edit(&c)
			err := ValidateResponse(Response{Cards: []Card{c}})
			if (err == nil) != (tc.wantErr == "") || (err != nil && !strings.Contains(err.Error(), tc.wantErr)) {
				t.Errorf("got %v, want %q", err, tc.wantErr)
			}
		})
	}
}

// TestRenderCards checks the card policy of DESIGN §5 on a synthetic finding:
// uuid, caution, override reasons with display, ruleset in the extension.
func TestRenderCards(t *testing.T) {
	f := rules.Finding{Rule: "test-rule", Indicator: rules.Critical, Summary: "Test finding 12 mmol/L",
		Detail: "Figures.", Figures: map[string]float64{"riseFromNadir24h": 12}}
	cards, err := renderCards([]rules.Finding{f, f}, "rev-1", suggestionInput{})
	if err != nil {
		t.Fatal(err)
	}
	if len(cards) != 2 || cards[0].UUID == "" || cards[0].UUID == cards[1].UUID {
		t.Fatalf("cards need distinct uuids: %+v", cards)
	}
	c := cards[0]
	if c.Indicator != "critical" || !strings.HasSuffix(c.Detail, Caution) || !strings.HasPrefix(c.Detail, "Figures.") {
		t.Errorf("card %+v", c)
	}
	var ext struct {
		Halite struct {
			Rule    string             `json:"rule"`
			Ruleset string             `json:"ruleset"`
			Figures map[string]float64 `json:"figures"`
		} `json:"halite"`
	}
	if err := json.Unmarshal(c.Extension, &ext); err != nil {
		t.Fatal(err)
	}
	if ext.Halite.Rule != "test-rule" || ext.Halite.Ruleset != "rev-1" || ext.Halite.Figures["riseFromNadir24h"] != 12 {
		t.Errorf("extension %s", c.Extension)
	}
	if err := ValidateResponse(Response{Cards: cards}); err != nil {
		t.Errorf("rendered cards are invalid: %v", err)
	}
	if got, err := renderCards(nil, "rev-1", suggestionInput{}); err != nil || got == nil || len(got) != 0 {
		t.Errorf("no findings must render an empty, non-nil card list, got %#v %v", got, err)
	}
	cards[0].OverrideReasons[0].Display = "changed"
	if cards[1].OverrideReasons[0].Display == "changed" || overrideReasons[0].Display == "changed" {
		t.Error("cards share their override reasons")
	}
	bad := f
	bad.Figures = map[string]float64{"x": math.NaN()}
	if _, err := renderCards([]rules.Finding{bad}, "rev-1", suggestionInput{}); err == nil {
		t.Error("a NaN figure must fail rendering, not drop the extension")
	}
}
