package rules

import (
	"bytes"
	"crypto/sha256"
	_ "embed"
	"encoding/hex"
	"encoding/json"
	"fmt"
)

//go:embed data/policy.json
var embeddedPolicy []byte

// Bounds is a plausibility range for an analyte in its canonical unit.
// Values outside it are rejected as probable entry or unit errors.
type Bounds struct {
	Min    float64 `json:"min"`
	Max    float64 `json:"max"`
	Unit   string  `json:"unit"`
	Source string  `json:"source"`
}

// Policy is the versioned, embedded policy data the rules read.
type Policy struct {
	Version      string             `json:"version"`
	Note         string             `json:"note,omitempty"`
	Plausibility map[Analyte]Bounds `json:"plausibility"`
}

// Ruleset is a loaded, validated policy with its revision. It is immutable
// after Load and safe for concurrent use.
type Ruleset struct {
	revision string
	policy   Policy
}

// Load parses and validates the embedded policy data.
func Load() (*Ruleset, error) {
	return parse(embeddedPolicy)
}

func parse(data []byte) (*Ruleset, error) {
	var p Policy
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&p); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if p.Version == "" {
		return nil, fmt.Errorf("load policy: version is empty")
	}
	for _, a := range Analytes() {
		b, ok := p.Plausibility[a]
		if !ok {
			return nil, fmt.Errorf("load policy: plausibility.%s is missing", a)
		}
		if b.Unit != CanonicalUnit(a) {
			return nil, fmt.Errorf("load policy: plausibility.%s.unit is %q, want %q", a, b.Unit, CanonicalUnit(a))
		}
		if !(b.Min < b.Max) || b.Source == "" {
			return nil, fmt.Errorf("load policy: plausibility.%s needs min < max and a source", a)
		}
	}
	for a := range p.Plausibility {
		if !knownAnalyte(a) {
			return nil, fmt.Errorf("load policy: plausibility.%s is not an analyte halite maps", a)
		}
	}
	return &Ruleset{revision: revisionOf(p), policy: p}, nil
}

func knownAnalyte(a Analyte) bool {
	for _, k := range Analytes() {
		if k == a {
			return true
		}
	}
	return false
}

// revisionOf is the policy version plus the first 8 bytes of a SHA-256 over the
// policy's canonical JSON, so any change to the effective policy changes it.
func revisionOf(p Policy) string {
	canon, _ := json.Marshal(p) // map keys are sorted by encoding/json
	sum := sha256.Sum256(canon)
	return p.Version + "+" + hex.EncodeToString(sum[:8])
}

// Revision identifies the ruleset; it is stamped on every card and log line.
func (r *Ruleset) Revision() string { return r.revision }

// Policy returns the policy data. Callers must not modify it.
func (r *Ruleset) Policy() Policy { return r.policy }

// CheckPlausible reports whether v (in a's canonical unit) is inside a's
// plausibility bounds, and if not, the reason.
func (r *Ruleset) CheckPlausible(a Analyte, v float64) (bool, string) {
	b, ok := r.policy.Plausibility[a]
	if !ok {
		return false, fmt.Sprintf("no plausibility bounds for %s", a)
	}
	if v < b.Min || v > b.Max {
		return false, fmt.Sprintf("implausible value %g %s (accepted range %g–%g)", v, b.Unit, b.Min, b.Max)
	}
	return true, ""
}
