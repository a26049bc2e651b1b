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

// Limit is a rate-of-correction limit with its source.
type Limit struct {
	Value  float64 `json:"value"`
	Unit   string  `json:"unit"`
	Source string  `json:"source"`
}

// Limits are the rate-of-correction limits in force.
type Limits struct {
	HyponatremiaRise24h         Limit `json:"hyponatremiaRise24h"`
	HyponatremiaRise48h         Limit `json:"hyponatremiaRise48h"`
	HyponatremiaRise24hHighRisk Limit `json:"hyponatremiaRise24hHighRisk"`
	HypernatremiaFall24h        Limit `json:"hypernatremiaFall24h"`
	HypernatremiaFallPerHour    Limit `json:"hypernatremiaFallPerHour"`
}

// TBWPolicy holds the total-body-water fractions of weight and the ages
// that select them.
type TBWPolicy struct {
	// Method is "adrogue-madias" (weight × fraction) or "watson" (Watson's
	// formula when height and age are known, else the fraction).
	Method         string  `json:"method"`
	Child          float64 `json:"child"`
	Man            float64 `json:"man"`
	Woman          float64 `json:"woman"`
	ElderlyMan     float64 `json:"elderlyMan"`
	ElderlyWoman   float64 `json:"elderlyWoman"`
	AdultFromAge   int     `json:"adultFromAge"`
	ElderlyFromAge int     `json:"elderlyFromAge"`
	Source         string  `json:"source"`
}

// ConditionCodes lists the codes of one demyelination risk factor in one
// code system, by exact code or by prefix (ICD-10-CM categories).
type ConditionCodes struct {
	Factor   string   `json:"factor"`
	System   string   `json:"system"`
	Codes    []string `json:"codes,omitempty"`
	Prefixes []string `json:"prefixes,omitempty"`
	Source   string   `json:"source"`
}

// DemyelinationRiskPolicy defines the high osmotic-demyelination risk
// features halite can read from labs and coded conditions.
type DemyelinationRiskPolicy struct {
	SodiumAtOrBelow float64          `json:"sodiumAtOrBelow"`
	PotassiumBelow  float64          `json:"potassiumBelow"`
	WindowHours     int              `json:"windowHours"`
	Source          string           `json:"source"`
	Conditions      []ConditionCodes `json:"conditions"`
}

// ProjectionPolicy sets how recent the inputs of a projection must be.
type ProjectionPolicy struct {
	WeightMaxAgeHours  float64 `json:"weightMaxAgeHours"`
	SodiumMaxAgeHours  float64 `json:"sodiumMaxAgeHours"`
	HypernatremiaAbove float64 `json:"hypernatremiaAbove"`
	Source             string  `json:"source"`
}

// Policy is the versioned, embedded policy data the rules read.
type Policy struct {
	Version           string                  `json:"version"`
	Note              string                  `json:"note,omitempty"`
	Limits            Limits                  `json:"limits"`
	DemyelinationRisk DemyelinationRiskPolicy `json:"demyelinationRisk"`
	Projection        ProjectionPolicy        `json:"projection"`
	Cards             CardPolicy              `json:"cards"`
	WaterDrugs        WaterDrugPolicy         `json:"waterDrugs"`
	DrugRisk          DrugRiskPolicy          `json:"drugRisk"`
	ChartReview       ChartReviewPolicy       `json:"chartReview"`
	TBW               TBWPolicy               `json:"tbw"`
	Plausibility      map[Analyte]Bounds      `json:"plausibility"`
	SameTime          SameTimePolicy          `json:"sameTime"`
	UrineLosses       UrineLossPolicy         `json:"urineLosses"`
	Suppression       SuppressionPolicy       `json:"suppression"`
	Neurosurgery      NeurosurgeryPolicy      `json:"neurosurgery"`
	BrainInjury       BrainInjuryPolicy       `json:"brainInjury"`
	WaterDeprivation  WaterDeprivationPolicy  `json:"waterDeprivation"`
	FluidRestriction  FluidRestrictionPolicy  `json:"fluidRestriction"`
}

// Ruleset is a loaded, validated policy with its revision. It is immutable
// after Load and safe for concurrent use.
type Ruleset struct {
	revision string
	policy   Policy
	fluids   *fluidTable
	drugs    *drugKB
	links    []SourceLink
	display  Display
}

// Load parses and validates the embedded policy data.
func Load() (*Ruleset, error) { return LoadWithOverride(nil) }

// LoadWithOverride is Load with a site's override applied: a JSON document
// shaped like the policy whose members replace the embedded ones (objects
// are merged member by member; arrays, values and map entries such as one
// card rule are replaced whole), as in a JSON
// merge patch (RFC 7386) without deletion. The result is validated as a
// whole and its revision differs from the embedded one whenever the
// effective policy does. An empty override is no override.
func LoadWithOverride(override []byte) (*Ruleset, error) {
	rs, err := parse(embeddedPolicy, override)
	if err != nil {
		return nil, err
	}
	if rs.fluids, err = parseFluids(embeddedInfusates); err != nil {
		return nil, err
	}
	if rs.drugs, err = parseDrugs(embeddedDrugs, embeddedProducts); err != nil {
		return nil, err
	}
	if rs.links, err = parseLinks(embeddedLinks); err != nil {
		return nil, err
	}
	// The revision covers the fluid table and the drug knowledge base too.
	h := sha256.New()
	for _, part := range [][]byte{[]byte(rs.revision), embeddedInfusates, embeddedDrugs, embeddedProducts, embeddedLinks} {
		h.Write(part)
	}
	sum := h.Sum(nil)
	rs.revision = rs.policy.Version + "+" + hex.EncodeToString(sum[:8])
	return rs, nil
}

func parse(data []byte, overrides ...[]byte) (*Ruleset, error) {
	var p Policy
	if err := decodeStrict(data, &p); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	for _, o := range overrides {
		if len(bytes.TrimSpace(o)) == 0 {
			continue
		}
		if err := decodeStrict(o, &p); err != nil {
			return nil, fmt.Errorf("load policy override: %w", err)
		}
		if err := overrideCitesLimits(o); err != nil {
			return nil, fmt.Errorf("load policy override: %w", err)
		}
	}
	if p.Version == "" {
		return nil, fmt.Errorf("load policy: version is empty")
	}
	if err := p.validateKinetics(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.Cards.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.WaterDrugs.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.DrugRisk.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.ChartReview.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.UrineLosses.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.SameTime.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.Neurosurgery.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.BrainInjury.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.WaterDeprivation.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.FluidRestriction.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	if err := p.Suppression.validate(); err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
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
	rev, err := revisionOf(p)
	if err != nil {
		return nil, fmt.Errorf("load policy: %w", err)
	}
	return &Ruleset{revision: rev, policy: p}, nil
}

// overrideCitesLimits requires a site that changes a limit's value to give
// that limit's source too, so no card cites the embedded source for a value
// it does not hold.
func overrideCitesLimits(o []byte) error {
	var doc struct {
		Limits map[string]map[string]json.RawMessage `json:"limits"`
	}
	if err := json.Unmarshal(o, &doc); err != nil {
		return err
	}
	for name, l := range doc.Limits {
		if _, v := l["value"]; v {
			if _, s := l["source"]; !s {
				return fmt.Errorf("limits.%s: a changed value needs its source", name)
			}
		}
	}
	return nil
}

// decodeStrict decodes one JSON document into v, refusing unknown members
// and trailing data.
func decodeStrict(data []byte, v any) error {
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		return err
	}
	if dec.More() {
		return fmt.Errorf("data after the JSON document")
	}
	return nil
}

func (p Policy) validateKinetics() error {
	l := p.Limits
	for name, lim := range map[string]Limit{
		"hyponatremiaRise24h": l.HyponatremiaRise24h, "hyponatremiaRise48h": l.HyponatremiaRise48h,
		"hyponatremiaRise24hHighRisk": l.HyponatremiaRise24hHighRisk, "hypernatremiaFall24h": l.HypernatremiaFall24h,
		"hypernatremiaFallPerHour": l.HypernatremiaFallPerHour,
	} {
		if lim.Value <= 0 || lim.Unit == "" || lim.Source == "" {
			return fmt.Errorf("limits.%s needs a positive value, a unit and a source", name)
		}
	}
	if l.HyponatremiaRise24hHighRisk.Value > l.HyponatremiaRise24h.Value {
		return fmt.Errorf("limits.hyponatremiaRise24hHighRisk must not exceed hyponatremiaRise24h")
	}
	if l.HyponatremiaRise48h.Value < l.HyponatremiaRise24h.Value {
		return fmt.Errorf("limits.hyponatremiaRise48h must not be below hyponatremiaRise24h")
	}
	d := p.DemyelinationRisk
	if d.SodiumAtOrBelow <= 0 || d.PotassiumBelow <= 0 || d.WindowHours <= 0 || d.Source == "" {
		return fmt.Errorf("demyelinationRisk needs positive thresholds, a window and a source")
	}
	for i, c := range d.Conditions {
		if !c.complete() {
			return fmt.Errorf("demyelinationRisk.conditions[%d] needs a factor, a system, codes or prefixes, and a source", i)
		}
	}
	if pr := p.Projection; pr.WeightMaxAgeHours <= 0 || pr.SodiumMaxAgeHours <= 0 || pr.HypernatremiaAbove <= 0 || pr.Source == "" {
		return fmt.Errorf("projection needs positive ages, a hypernatremia threshold and a source")
	}
	t := p.TBW
	if t.Method != "adrogue-madias" && t.Method != "watson" {
		return fmt.Errorf("tbw.method %q is not adrogue-madias or watson", t.Method)
	}
	for name, f := range map[string]float64{"child": t.Child, "man": t.Man, "woman": t.Woman,
		"elderlyMan": t.ElderlyMan, "elderlyWoman": t.ElderlyWoman} {
		if f <= 0 || f >= 1 {
			return fmt.Errorf("tbw.%s must be a fraction between 0 and 1", name)
		}
	}
	if t.AdultFromAge <= 0 || t.ElderlyFromAge <= t.AdultFromAge || t.Source == "" {
		return fmt.Errorf("tbw needs 0 < adultFromAge < elderlyFromAge and a source")
	}
	return nil
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
func revisionOf(p Policy) (string, error) {
	canon, err := json.Marshal(p) // map keys are sorted by encoding/json
	if err != nil {
		return "", fmt.Errorf("revision: %w", err)
	}
	sum := sha256.Sum256(canon)
	return p.Version + "+" + hex.EncodeToString(sum[:8]), nil
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
