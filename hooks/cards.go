package hooks

import (
	"encoding/json"
	"fmt"
	"slices"

	"github.com/google/uuid"
	"github.com/halite-cds/halite/rules"
)

// SourceLabel is the card source label clinicians see.
const SourceLabel = "halite sodium safety checks"

// Caution ends every card's detail: the card advises, the prescriber decides.
const Caution = "_Advisory only. halite computed this from the data listed; it cannot see the whole " +
	"clinical picture. The prescriber's judgment and local protocol take precedence._"

// OverrideReasonSystem is halite's own code system for override reasons.
const OverrideReasonSystem = "https://halite-cds.github.io/fhir/CodeSystem/override-reason"

// overrideReasons are offered on every card, in halite's own wording.
var overrideReasons = []Coding{
	{System: OverrideReasonSystem, Code: "clinically-justified", Display: "Clinically justified for this patient"},
	{System: OverrideReasonSystem, Code: "already-monitored", Display: "Already addressed or being monitored"},
	{System: OverrideReasonSystem, Code: "local-protocol", Display: "Following a local protocol"},
	{System: OverrideReasonSystem, Code: "data-not-current", Display: "The data shown are incomplete or not current"},
}

// OverrideReasonLabel is the display of an override reason halite offers,
// or "system|code" for one it does not know.
func OverrideReasonLabel(system, code string) string {
	for _, c := range overrideReasons {
		if c.System == system && c.Code == code {
			return c.Display
		}
	}
	return system + "|" + code
}

// cardExtension is the machine-readable part of a card, under "halite":
// the rule, the ruleset revision, the figures, and the finding's other
// attributes beside them.
func cardExtension(f rules.Finding, revision string) (json.RawMessage, error) {
	h := make(map[string]any, len(f.Attributes)+3)
	for k, v := range f.Attributes {
		h[k] = v
	}
	h["rule"], h["ruleset"] = f.Rule, revision
	if len(f.Figures) > 0 {
		h["figures"] = f.Figures
	}
	return json.Marshal(map[string]any{"halite": h})
}

// cardLinks are a finding's source addresses as CDS Hooks links of type
// absolute (cds-hooks-notes: a Link's type is "absolute" or "smart").
func cardLinks(ls []rules.SourceLink) []Link {
	var out []Link
	for _, l := range ls {
		out = append(out, Link{Label: l.Label, URL: l.URL, Type: "absolute"})
	}
	return out
}

// renderCards words findings as cards, each with a uuid (so feedback can
// refer to it), the caution, override reasons, the ruleset revision and its
// suggestions; the suggestions of a card are alternatives, so at most one
// is chosen.
func renderCards(fs []rules.Finding, revision string, in suggestionInput) ([]Card, error) {
	cards := make([]Card, 0, len(fs))
	for _, f := range fs {
		extJSON, err := cardExtension(f, revision)
		if err != nil { // a NaN or infinite figure
			return nil, fmt.Errorf("render %s: %w", f.Rule, err)
		}
		detail := Caution
		if f.Detail != "" {
			detail = f.Detail + "\n\n" + Caution
		}
		sugg, err := suggestions(f, in)
		if err != nil {
			return nil, fmt.Errorf("render %s: %w", f.Rule, err)
		}
		selection := ""
		if len(sugg) > 0 {
			selection = "at-most-one"
		}
		id, err := newRecordID()
		if err != nil {
			return nil, fmt.Errorf("render %s: %w", f.Rule, err)
		}
		links := cardLinks(f.Links)
		if l, ok := courseLink(f, in); ok {
			links = append([]Link{l}, links...)
		}
		cards = append(cards, Card{
			UUID:              id,
			Summary:           f.Summary,
			Detail:            detail,
			Indicator:         f.Indicator.String(),
			Source:            Source{Label: SourceLabel},
			Suggestions:       sugg,
			SelectionBehavior: selection,
			OverrideReasons:   slices.Clone(overrideReasons),
			Links:             links,
			Extension:         extJSON,
		})
	}
	return cards, nil
}

// newRecordID returns a UUIDv7 (RFC 9562 §5.7) for a card or suggestion:
// as unique as a random UUID, but ordered by time, so the card log's key
// index grows at its end instead of having a random page rewritten on
// every insert as it grows. The time it carries is the response's own.
func newRecordID() (string, error) {
	id, err := uuid.NewV7()
	if err != nil {
		return "", fmt.Errorf("new uuid: %w", err)
	}
	return id.String(), nil
}
