package hooks

import (
	"encoding/json"
	"fmt"
	"sort"
	"unicode/utf8"

	"github.com/halite-cds/halite/fhirmap"
)

// ValidateResponse checks a response against the CDS Hooks 2.0 card rules
// (and the response invariants of the CDS Hooks logical model, cds-resp-1…6)
// before it is sent, so a wording bug becomes a 500 in tests, never an
// invalid card in a clinician's view.
func ValidateResponse(r Response) error {
	if r.Cards == nil {
		return fmt.Errorf("response: cards must be present")
	}
	for i, c := range r.Cards {
		if err := validateCard(c); err != nil {
			return fmt.Errorf("response: cards[%d]: %w", i, err)
		}
	}
	for i, a := range r.SystemActions {
		if err := validateAction(a); err != nil {
			return fmt.Errorf("response: systemActions[%d]: %w", i, err)
		}
	}
	raw, err := json.Marshal(r)
	if err != nil {
		return fmt.Errorf("response: %w", err)
	}
	return CheckNoEmpty(raw, "cards")
}

func validateCard(c Card) error {
	switch {
	case c.Summary == "":
		return fmt.Errorf("summary is required")
	case utf8.RuneCountInString(c.Summary) >= 140:
		return fmt.Errorf("summary has %d characters; it must be under 140", utf8.RuneCountInString(c.Summary))
	case c.Indicator != "info" && c.Indicator != "warning" && c.Indicator != "critical":
		return fmt.Errorf("indicator %q is not info, warning or critical", c.Indicator)
	case c.Source.Label == "":
		return fmt.Errorf("source.label is required")
	}
	if len(c.Suggestions) > 0 && c.SelectionBehavior != "at-most-one" && c.SelectionBehavior != "any" {
		return fmt.Errorf("selectionBehavior must be at-most-one or any when suggestions are present")
	}
	recommended := 0
	for i, s := range c.Suggestions {
		if s.Label == "" {
			return fmt.Errorf("suggestions[%d].label is required", i)
		}
		if s.IsRecommended {
			recommended++
		}
		for j, a := range s.Actions {
			if err := validateAction(a); err != nil {
				return fmt.Errorf("suggestions[%d].actions[%d]: %w", i, j, err)
			}
		}
	}
	if c.SelectionBehavior == "at-most-one" && recommended > 1 {
		return fmt.Errorf("at most one suggestion may be recommended with at-most-one")
	}
	for i, o := range c.OverrideReasons {
		if o.System == "" || o.Code == "" || o.Display == "" {
			return fmt.Errorf("overrideReasons[%d] needs system, code and display", i)
		}
	}
	for i, l := range c.Links {
		switch {
		case l.Label == "" || l.URL == "":
			return fmt.Errorf("links[%d] needs label and url", i)
		case l.Type != "absolute" && l.Type != "smart":
			return fmt.Errorf("links[%d].type %q is not absolute or smart", i, l.Type)
		case l.AppContext != "" && l.Type != "smart":
			return fmt.Errorf("links[%d].appContext is only allowed on smart links", i)
		}
	}
	return nil
}

func validateAction(a Action) error {
	if a.Description == "" {
		return fmt.Errorf("description is required")
	}
	switch a.Type {
	case "create", "update":
		if len(a.Resource) == 0 {
			return fmt.Errorf("%s needs a resource", a.Type)
		}
	case "delete":
		if a.ResourceID == "" || len(a.Resource) > 0 {
			return fmt.Errorf("delete needs resourceId and no resource")
		}
	default:
		return fmt.Errorf("type %q is not create, update or delete", a.Type)
	}
	return nil
}

// CheckNoEmpty reports the first null, empty string, empty array or empty
// object in a JSON document (CDS Hooks 2.0 §Use of JSON), except at the
// top-level keys named in allowed, such as "cards".
func CheckNoEmpty(raw []byte, allowed ...string) error {
	var v any
	if err := fhirmap.DecodeJSON(raw, &v); err != nil {
		return fmt.Errorf("check JSON: %w", err)
	}
	ok := map[string]bool{}
	for _, a := range allowed {
		ok[a] = true
	}
	return walkNoEmpty(v, "", ok)
}

func walkNoEmpty(v any, path string, allowed map[string]bool) error {
	switch t := v.(type) {
	case nil:
		return fmt.Errorf("%s is null", orRoot(path))
	case string:
		if t == "" {
			return fmt.Errorf("%s is an empty string", orRoot(path))
		}
	case []any:
		if len(t) == 0 && !allowed[path] {
			return fmt.Errorf("%s is an empty array", orRoot(path))
		}
		for i, e := range t {
			if err := walkNoEmpty(e, fmt.Sprintf("%s[%d]", path, i), nil); err != nil {
				return err
			}
		}
	case map[string]any:
		if len(t) == 0 && !allowed[path] {
			return fmt.Errorf("%s is an empty object", orRoot(path))
		}
		keys := make([]string, 0, len(t))
		for k := range t {
			keys = append(keys, k)
		}
		sort.Strings(keys)
		for _, k := range keys {
			p := k
			if path != "" {
				p = path + "." + k
			}
			next := allowed
			if path != "" {
				next = nil
			}
			if err := walkNoEmpty(t[k], p, next); err != nil {
				return err
			}
		}
	}
	return nil
}

func orRoot(path string) string {
	if path == "" {
		return "the document"
	}
	return path
}
