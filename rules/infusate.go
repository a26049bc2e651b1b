package rules

import (
	"bytes"
	_ "embed"
	"encoding/json"
	"fmt"
	"regexp"
	"strconv"
	"strings"
)

//go:embed data/infusates.json
var embeddedInfusates []byte

// Fluid is a known IV fluid with its sodium and potassium (mmol/L).
type Fluid struct {
	ID     string   `json:"id"`
	Label  string   `json:"label"`
	RxNorm []string `json:"rxnorm"`
	Names  []string `json:"names"`
	Na     float64  `json:"na"`
	K      float64  `json:"k"`
	Source string   `json:"source"`
	// PotassiumPremixed: the product's potassium chloride is in K, so the
	// potassium its RxNorm name states is not added again.
	PotassiumPremixed bool `json:"potassiumPremixed,omitempty"`
}

// fluidTable indexes the known fluids by RxNorm code and normalised name.
type fluidTable struct {
	Note   string  `json:"note"`
	Fluids []Fluid `json:"fluids"`
	byCode map[string]int
	byName map[string]int
}

func parseFluids(data []byte) (*fluidTable, error) {
	t := &fluidTable{byCode: map[string]int{}, byName: map[string]int{}}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(t); err != nil {
		return nil, fmt.Errorf("load infusates: %w", err)
	}
	for i, f := range t.Fluids {
		if f.ID == "" || f.Source == "" || f.Na < 0 || f.K < 0 {
			return nil, fmt.Errorf("load infusates: fluids[%d] needs an id, a source and non-negative Na and K", i)
		}
		for _, c := range f.RxNorm {
			if _, dup := t.byCode[c]; dup {
				return nil, fmt.Errorf("load infusates: RxNorm %s is listed twice", c)
			}
			t.byCode[c] = i
		}
		for _, n := range f.Names {
			t.byName[normaliseName(n)] = i
		}
	}
	return t, nil
}

// Composition is the sodium and potassium of an infusate and how it was
// found.
type Composition struct {
	Na, K  float64 // mmol/L
	Basis  string  // "RxNorm 1807639 (0.9% sodium chloride)", "ingredient strengths", …
	Source string
}

// NaK is sodium plus potassium, the infusate term of the Adrogué–Madias
// formula.
func (c Composition) NaK() float64 { return c.Na + c.K }

// salt is a sodium or potassium salt halite converts from a strength.
type salt struct {
	names     []string
	rxnorm    []string // ingredient RXCUIs (IN/PIN) from the RxNorm extract
	molarMass float64
	potassium bool
}

// Molar masses (g/mol) of the salts halite computes from strengths, from
// IUPAC standard atomic weights (abridged, 2021: Na 22.990, K 39.098, Cl 35.45,
// C 12.011, H 1.008, O 15.999). Each salt carries one Na or K per formula unit.
var salts = []salt{
	{[]string{"sodium chloride"}, []string{"9863"}, 58.44, false},
	{[]string{"potassium chloride"}, []string{"8591"}, 74.548, true},
	{[]string{"sodium bicarbonate"}, nil, 84.006, false},
	{[]string{"sodium lactate"}, []string{"56489"}, 112.06, false},
	{[]string{"sodium acetate trihydrate"}, nil, 136.08, false},
	{[]string{"sodium acetate"}, nil, 82.034, false},
}

// InfusateComposition works out the Na and K of a medication: from its
// RxNorm product code when the fluid table knows it (plus any potassium
// chloride added, from the ingredients or the name), else from its
// ingredient strengths, else from its name. ok is false when none works, or
// an additive cannot be converted; halite then says the composition is
// unknown.
func (r *Ruleset) InfusateComposition(m Medication) (Composition, bool) {
	t := r.fluids
	// A full list of strengths (with a sodium salt) is the most specific
	// statement of what is in the bag.
	if c, ok := fromIngredients(m.Ingredients); ok && c.Na > 0 {
		return c, true
	}
	for _, c := range m.Codings {
		if c.System != SystemRxNorm {
			continue
		}
		if i, ok := t.byCode[c.Code]; ok {
			f := t.Fluids[i]
			comp := Composition{Na: f.Na, K: f.K, Basis: "RxNorm " + c.Code + " (" + f.Label + ")", Source: f.Source}
			if f.PotassiumPremixed {
				return comp, true
			}
			k, ok := addedPotassium(m)
			if !ok {
				return Composition{}, false
			}
			if k > 0 {
				comp.K += k
				comp.Basis += fmt.Sprintf(" with potassium chloride %s mmol/L added", infusateNa.of(k))
			}
			return comp, true
		}
	}
	if c, ok := fromIngredients(m.Ingredients); ok {
		return c, true
	}
	for _, text := range append([]string{m.Text}, displays(m.Codings)...) {
		if c, ok := t.fromName(text); ok {
			return c, true
		}
	}
	return Composition{}, false
}

// addedPotassium is the potassium (mmol/L) added to a coded base fluid:
// the potassium salts among its ingredients with a convertible strength, or
// a "KCl 20 mmol/L" in its name. ok is false when a potassium ingredient's
// strength cannot be converted.
func addedPotassium(m Medication) (float64, bool) {
	var k float64
	for _, ing := range m.Ingredients {
		s, known := saltOf(ing)
		if !known || !s.potassium {
			continue
		}
		if ing.Strength == nil {
			return 0, false
		}
		mmol, ok := mmolPerL(*ing.Strength, s.molarMass)
		if !ok {
			return 0, false
		}
		k += mmol
	}
	if k > 0 {
		return k, true
	}
	for _, text := range append([]string{m.Text}, displays(m.Codings)...) {
		name := normaliseName(text)
		if mm := kclInName.FindStringSubmatch(name); mm != nil {
			k, _ = kclValue(mm)
			return k, true
		}
		if wordIn(name, "kcl") || strings.Contains(name, "potassium chloride") {
			return 0, false // potassium named without a per-litre amount: unknown, never dropped
		}
	}
	return 0, true
}

func kclValue(m []string) (float64, error) {
	v := m[1]
	if v == "" {
		v = m[2]
	}
	return strconv.ParseFloat(v, 64)
}

func displays(cs []Coding) []string {
	var out []string
	for _, c := range cs {
		if c.Display != "" {
			out = append(out, c.Display)
		}
	}
	return out
}

// fromIngredients sums the sodium and potassium salts among the
// ingredients with a strength; it fails if any ingredient that is a known
// salt has a strength it cannot convert.
func fromIngredients(ings []Ingredient) (Composition, bool) {
	var c Composition
	found := false
	for _, ing := range ings {
		s, ok := saltOf(ing)
		if !ok {
			if mentionsSodiumOrPotassium(ing) {
				return Composition{}, false // a salt halite cannot convert
			}
			continue
		}
		if ing.Strength == nil {
			return Composition{}, false
		}
		mmol, ok := mmolPerL(*ing.Strength, s.molarMass)
		if !ok {
			return Composition{}, false
		}
		if s.potassium {
			c.K += mmol
		} else {
			c.Na += mmol
		}
		found = true
	}
	if !found {
		return Composition{}, false
	}
	c.Basis = "ingredient strengths"
	c.Source = "[derived] strength ÷ molar mass (IUPAC 2021 atomic weights)"
	return c, true
}

// mentionsSodiumOrPotassium reports whether an ingredient names sodium or
// potassium, so an unlisted salt is not silently left out.
func mentionsSodiumOrPotassium(ing Ingredient) bool {
	text := strings.ToLower(ing.Text)
	for _, c := range ing.Codings {
		text += " " + strings.ToLower(c.Display)
	}
	return wordIn(text, "sodium") || wordIn(text, "potassium")
}

func saltOf(ing Ingredient) (salt, bool) {
	for _, s := range salts {
		for _, c := range ing.Codings {
			for _, code := range s.rxnorm {
				if c.System == SystemRxNorm && c.Code == code {
					return s, true
				}
			}
		}
		text := strings.ToLower(ing.Text)
		for _, c := range ing.Codings {
			text += " " + strings.ToLower(c.Display)
		}
		for _, n := range s.names {
			if strings.Contains(" "+text+" ", " "+n+" ") {
				return s, true
			}
		}
	}
	return salt{}, false
}

// mmolPerL converts a strength ratio (mass, mmol or meq over a volume) to
// mmol/L of the salt.
func mmolPerL(r Ratio, molarMass float64) (float64, bool) {
	var mmol float64
	switch n := r.Numerator; n.Unit {
	case "g":
		mmol = n.Value * 1000 / molarMass
	case "mg":
		mmol = n.Value / molarMass
	case "mmol", "meq", "mEq":
		mmol = n.Value
	case "mol":
		mmol = n.Value * 1000
	default:
		return 0, false
	}
	var litres float64
	switch d := r.Denominator; d.Unit {
	case "mL", "ml":
		litres = d.Value / 1000
	case "L", "l":
		litres = d.Value
	case "dL", "dl":
		litres = d.Value / 10
	default:
		return 0, false
	}
	if litres <= 0 {
		return 0, false
	}
	return mmol / litres, true
}

var (
	spaces    = regexp.MustCompile(`\s+`)
	kclInName = regexp.MustCompile(`(?:with|\+|and)?\s*(?:potassium chloride|kcl)\s*(\d+(?:\.\d+)?)\s*(?:mmol|meq)/l|(\d+(?:\.\d+)?)\s*(?:mmol|meq)/l\s*(?:potassium chloride|kcl)`)
)

// normaliseName lower-cases, folds "nacl" and "saline" spellings, and
// squeezes spaces.
func normaliseName(s string) string {
	s = strings.ToLower(strings.TrimSpace(s))
	s = strings.ReplaceAll(s, "nacl", "sodium chloride")
	s = strings.ReplaceAll(s, "’", "'")
	s = strings.ReplaceAll(s, " in water", "")
	s = strings.ReplaceAll(s, " injection", "")
	return spaces.ReplaceAllString(s, " ")
}

// fromName matches a free-text product name, with an optional potassium
// chloride additive ("0.9% sodium chloride with KCl 20 mmol/L").
func (t *fluidTable) fromName(text string) (Composition, bool) {
	name := normaliseName(text)
	if name == "" {
		return Composition{}, false
	}
	var k float64
	if m := kclInName.FindStringSubmatch(name); m != nil {
		k, _ = kclValue(m)
		name = strings.TrimSpace(strings.Replace(name, m[0], "", 1))
	}
	i, ok := t.byName[name]
	if !ok {
		return Composition{}, false
	}
	f := t.Fluids[i]
	c := Composition{Na: f.Na, K: f.K + k, Basis: "name (" + f.Label + ")", Source: f.Source}
	if k > 0 {
		c.Basis += fmt.Sprintf(" with potassium chloride %s mmol/L", infusateNa.of(k))
	}
	return c, true
}
