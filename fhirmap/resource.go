package fhirmap

import (
	"encoding/json"
	"errors"
	"fmt"

	"github.com/halite-cds/halite/rules"
	fhir "github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// Resource is one FHIR resource as received: its type, id, raw JSON and,
// when it came in a Bundle entry that had one, its fullUrl.
type Resource struct {
	Type    string
	ID      string
	Raw     json.RawMessage
	FullURL string
}

// Ref is the resource's relative reference, "Type/id".
func (r Resource) Ref() string { return r.Type + "/" + r.ID }

// ErrNotResource means a JSON value is not an object with a resourceType.
var ErrNotResource = errors.New("not a FHIR resource")

// ReadResource reads the type and id of a raw FHIR resource.
func ReadResource(raw json.RawMessage) (Resource, error) {
	var h struct {
		ResourceType string `json:"resourceType"`
		ID           string `json:"id"`
	}
	if err := DecodeJSON(raw, &h); err != nil {
		return Resource{}, fmt.Errorf("%w: %v", ErrNotResource, err)
	}
	if h.ResourceType == "" {
		return Resource{}, fmt.Errorf("%w: resourceType is missing", ErrNotResource)
	}
	return Resource{Type: h.ResourceType, ID: h.ID, Raw: raw}, nil
}

// Bundle is a FHIR Bundle read from raw JSON, keeping each entry's raw bytes.
type Bundle struct {
	Type    string // absent in the JSON means ""; fhir-models would say "document"
	Entries []BundleEntry
	Next    string // link[relation=next].url, if any
}

// BundleEntry is one entry of a Bundle.
type BundleEntry struct {
	FullURL  string
	Resource json.RawMessage
}

// ParseBundle reads raw as a FHIR Bundle. Entries without a resource are kept
// out; the caller judges each resource.
func ParseBundle(raw []byte) (*Bundle, error) {
	var b struct {
		ResourceType string `json:"resourceType"`
		// ID is read, not kept, so that a Bundle is refused when its head is
		// (a non-string id), as ReadResource would refuse it.
		ID   string `json:"id"`
		Type string `json:"type"`
		Link []struct {
			Relation string `json:"relation"`
			URL      string `json:"url"`
		} `json:"link"`
		Entry []struct {
			FullURL  string          `json:"fullUrl"`
			Resource json.RawMessage `json:"resource"`
		} `json:"entry"`
	}
	if err := DecodeJSON(raw, &b); err != nil {
		return nil, fmt.Errorf("read bundle: %w", err)
	}
	if b.ResourceType != "Bundle" {
		return nil, fmt.Errorf("read bundle: resourceType is %q, want \"Bundle\"", b.ResourceType)
	}
	out := &Bundle{Type: b.Type}
	for _, l := range b.Link {
		if l.Relation == "next" {
			out.Next = l.URL
		}
	}
	for _, e := range b.Entry {
		if len(e.Resource) == 0 || string(e.Resource) == "null" {
			continue
		}
		out.Entries = append(out.Entries, BundleEntry{FullURL: e.FullURL, Resource: e.Resource})
	}
	return out, nil
}

func str(p *string) string {
	if p == nil {
		return ""
	}
	return *p
}

func codings(cc *fhir.CodeableConcept) ([]rules.Coding, string) {
	if cc == nil {
		return nil, ""
	}
	var out []rules.Coding
	for _, c := range cc.Coding {
		if c.Code == nil || *c.Code == "" {
			continue
		}
		out = append(out, rules.Coding{System: str(c.System), Code: *c.Code, Display: str(c.Display)})
	}
	return out, str(cc.Text)
}

// firstCode returns the code of the first coding of cc, or its text.
func firstCode(cc *fhir.CodeableConcept) string {
	cs, text := codings(cc)
	if len(cs) > 0 {
		return cs[0].Code
	}
	return text
}

// number reads a JSON number that fhir-models kept as text.
func number(n *json.Number) (float64, bool) {
	if n == nil {
		return 0, false
	}
	v, err := n.Float64()
	return v, err == nil
}

// quantity converts a FHIR Quantity to a rules.Quantity with its UCUM unit
// (the code when the system is UCUM or absent, otherwise the unit text).
func quantity(q *fhir.Quantity) *rules.Quantity {
	if q == nil {
		return nil
	}
	v, ok := number(q.Value)
	if !ok {
		return nil
	}
	return &rules.Quantity{Value: v, Unit: ucumUnit(q.System, q.Code, q.Unit)}
}

func duration(d *fhir.Duration) *rules.Quantity {
	if d == nil {
		return nil
	}
	return quantity(&fhir.Quantity{Value: d.Value, System: d.System, Code: d.Code, Unit: d.Unit})
}

func ucumUnit(system, code, unit *string) string {
	if code != nil && *code != "" && (system == nil || *system == SystemUCUM) {
		return *code
	}
	return str(unit)
}
