package rules

import (
	"bufio"
	"bytes"
	_ "embed"
	"fmt"
	"slices"
	"strings"
)

//go:embed data/drugs.json
var embeddedDrugs []byte

//go:embed data/rxnorm-products.tsv
var embeddedProducts []byte

// Sodium effects a drug can have.
const (
	EffectHyponatremia  = "hyponatremia"
	EffectNephrogenicDI = "nephrogenic-di"
	EffectRapidRise     = "rapid-sodium-rise"
)

// Evidence strengths, halite's own three words (drugs.json defines them).
const (
	EvidenceStrong   = "strong"
	EvidenceModerate = "moderate"
	EvidenceLimited  = "limited"
)

// DrugEffect is one sodium effect of an ingredient with its evidence.
type DrugEffect struct {
	Effect    string `json:"effect"`
	Mechanism string `json:"mechanism,omitempty"` // hyponatremia: SIADH, renal-salt-loss or other
	Evidence  string `json:"evidence"`
	Citation  string `json:"citation"`
	Note      string `json:"note"`
}

// DrugIngredient is one knowledge-base entry.
type DrugIngredient struct {
	Name     string       `json:"name"`
	RxNorm   []string     `json:"rxnorm"` // ingredient codes (IN, PIN)
	ATC      []string     `json:"atc"`    // level-5 codes
	Class    string       `json:"class"`
	Synonyms []string     `json:"synonyms,omitempty"`
	Effects  []DrugEffect `json:"effects"`
	// IntendedToRaiseSodium marks drugs given to raise sodium (vaptans,
	// demeclocycline): judged on hypernatremia, not as a risk.
	IntendedToRaiseSodium bool `json:"intendedToRaiseSodium,omitempty"`
}

// Effect returns the ingredient's effect e, if it has it.
func (d DrugIngredient) Effect(e string) (DrugEffect, bool) {
	for _, x := range d.Effects {
		if x.Effect == e {
			return x, true
		}
	}
	return DrugEffect{}, false
}

// DrugClass groups ingredients.
type DrugClass struct {
	ID   string `json:"id"`
	Name string `json:"name"`
}

// drugKB is the knowledge base indexed for matching.
type drugKB struct {
	Note        string            `json:"note"`
	Evidence    map[string]string `json:"evidence"`
	Classes     []DrugClass       `json:"classes"`
	Ingredients []DrugIngredient  `json:"ingredients"`
	byRxNorm    map[string]int    // ingredient code → entry
	byProduct   map[string][]int  // SCD/SCDC code → entries
	byATC       map[string]int    // level-5 code → entry
	byClassATC  map[string][]int  // level-4 code → entries
	// byFirstWord indexes every name and synonym, as words, by its first
	// word, so a text is matched in one pass over its words.
	byFirstWord map[string][]nameEntry
}

type nameEntry struct {
	name  string
	words []string
	entry int
}

// words splits lower-cased text into its runs of letters and digits, so
// names match on word boundaries only.
func words(text string) []string {
	return strings.FieldsFunc(strings.ToLower(text), func(r rune) bool { return !isWordRune(r) })
}

func knownEffect(e string) bool {
	return e == EffectHyponatremia || e == EffectNephrogenicDI || e == EffectRapidRise
}

func knownMechanism(m string) bool { return m == "SIADH" || m == "renal-salt-loss" || m == "other" }

func parseDrugs(data, products []byte) (*drugKB, error) {
	kb := &drugKB{byRxNorm: map[string]int{}, byProduct: map[string][]int{}, byATC: map[string]int{}, byClassATC: map[string][]int{},
		byFirstWord: map[string][]nameEntry{}}
	if err := decodeStrict(data, kb); err != nil {
		return nil, fmt.Errorf("load drugs: %w", err)
	}
	for _, ev := range []string{EvidenceStrong, EvidenceModerate, EvidenceLimited} {
		if kb.Evidence[ev] == "" {
			return nil, fmt.Errorf("load drugs: evidence %q is not defined", ev)
		}
	}
	classes := map[string]bool{}
	for _, c := range kb.Classes {
		classes[c.ID] = true
	}
	for i, d := range kb.Ingredients {
		if d.Name == "" || len(d.RxNorm)+len(d.ATC) == 0 || !classes[d.Class] || len(d.Effects) == 0 {
			return nil, fmt.Errorf("load drugs: ingredients[%d] (%s) needs a name, codes, a known class and effects", i, d.Name)
		}
		for _, e := range d.Effects {
			if !knownEffect(e.Effect) || kb.Evidence[e.Evidence] == "" || e.Citation == "" ||
				(e.Effect == EffectHyponatremia) != knownMechanism(e.Mechanism) {
				return nil, fmt.Errorf("load drugs: %s: effect %+v needs a known effect, evidence and citation (and a mechanism for hyponatremia only)", d.Name, e)
			}
		}
		for _, c := range d.RxNorm {
			if _, dup := kb.byRxNorm[c]; dup {
				return nil, fmt.Errorf("load drugs: RxNorm %s is listed twice", c)
			}
			kb.byRxNorm[c] = i
		}
		for _, c := range d.ATC {
			if len(c) != 7 {
				return nil, fmt.Errorf("load drugs: %s: ATC %q is not a level-5 code", d.Name, c)
			}
			if _, dup := kb.byATC[c]; dup {
				return nil, fmt.Errorf("load drugs: ATC %s is listed twice", c)
			}
			kb.byATC[c] = i
			kb.byClassATC[c[:5]] = append(kb.byClassATC[c[:5]], i)
		}
		for _, n := range append([]string{d.Name}, d.Synonyms...) {
			w := words(n)
			if len(w) == 0 {
				return nil, fmt.Errorf("load drugs: %s: name %q has no words", d.Name, n)
			}
			kb.byFirstWord[w[0]] = append(kb.byFirstWord[w[0]], nameEntry{strings.ToLower(n), w, i})
		}
	}
	if err := kb.readProducts(products); err != nil {
		return nil, err
	}
	return kb, nil
}

// readProducts maps product codes (SCD, SCDC) to the entries of their
// ingredients from the RxNorm extract (tab-separated, '#' provenance lines).
func (kb *drugKB) readProducts(data []byte) error {
	sc := bufio.NewScanner(bytes.NewReader(data))
	line := 0
	for sc.Scan() {
		line++
		text := sc.Text()
		if strings.HasPrefix(text, "#") || strings.HasPrefix(text, "ingredient_rxcui") || text == "" {
			continue
		}
		f := strings.Split(text, "\t")
		if len(f) != 6 {
			return fmt.Errorf("load drug products: line %d has %d fields, want 6", line, len(f))
		}
		i, ok := kb.byRxNorm[f[0]]
		if !ok {
			continue // an ingredient with no sodium effect (e.g. sodium chloride)
		}
		if !slices.Contains(kb.byProduct[f[3]], i) {
			kb.byProduct[f[3]] = append(kb.byProduct[f[3]], i)
		}
	}
	return sc.Err()
}

// DrugMatch is one ingredient an order was recognised as, and how.
type DrugMatch struct {
	Ingredient DrugIngredient
	// By says how it matched, e.g. "RxNorm 36437 (ingredient)", "RxNorm
	// 312940 (product)", "ATC N06AB06", "ATC class N06AB", "name \"sertraline\"".
	By string
	// Code is the RxNorm ingredient code of the entry (its first), for the
	// card's extension.
	Code string
}

// MatchDrug recognises the knowledge-base ingredients of a medication: by
// RxNorm ingredient or product code, by ATC code or class (on the
// medication or its ingredients), and by name on word boundaries as a last
// resort. A multi-ingredient product matches every listed ingredient.
func (r *Ruleset) MatchDrug(m Medication) []DrugMatch {
	kb := r.drugs
	var out []DrugMatch
	seen := map[int]bool{}
	add := func(i int, by string) {
		if seen[i] {
			return
		}
		seen[i] = true
		d := kb.Ingredients[i]
		code := ""
		if len(d.RxNorm) > 0 {
			code = d.RxNorm[0]
		}
		out = append(out, DrugMatch{Ingredient: d, By: by, Code: code})
	}
	seenClass := map[string]bool{}
	codings := append([]Coding(nil), m.Codings...)
	for _, ing := range m.Ingredients {
		codings = append(codings, ing.Codings...)
	}
	for _, c := range codings {
		switch c.System {
		case SystemRxNorm:
			if i, ok := kb.byRxNorm[c.Code]; ok {
				add(i, "RxNorm "+c.Code+" (ingredient)")
			}
			for _, i := range kb.byProduct[c.Code] {
				add(i, "RxNorm "+c.Code+" (product)")
			}
		case SystemATC:
			if i, ok := kb.byATC[c.Code]; ok {
				add(i, "ATC "+c.Code)
			} else if len(c.Code) == 5 && !seenClass[c.Code] {
				seenClass[c.Code] = true
				if m, ok := kb.classMatch(c.Code); ok {
					out = append(out, m)
				}
			}
		}
	}
	// Names are the last resort: the medication's own text when no code
	// matched, and the text of every ingredient that carries no code that
	// matched (a coded product with an ingredient named only in words).
	var texts []string
	if len(out) == 0 {
		texts = append(texts, m.Text)
		for _, c := range m.Codings {
			texts = append(texts, c.Display)
		}
	}
	for _, ing := range m.Ingredients {
		if !kb.anyCodeMatches(ing.Codings) {
			texts = append(texts, ing.Text)
			for _, c := range ing.Codings {
				texts = append(texts, c.Display)
			}
		}
	}
	for _, t := range texts {
		ws := words(t)
		for i, w := range ws {
			for _, n := range kb.byFirstWord[w] {
				if i+len(n.words) <= len(ws) && slices.Equal(ws[i:i+len(n.words)], n.words) {
					add(n.entry, fmt.Sprintf("name %q", n.name))
				}
			}
		}
	}
	return out
}

// anyCodeMatches reports whether one of cs is a knowledge-base code.
func (kb *drugKB) anyCodeMatches(cs []Coding) bool {
	for _, c := range cs {
		_, in := kb.byRxNorm[c.Code]
		_, at := kb.byATC[c.Code]
		if (c.System == SystemRxNorm && (in || len(kb.byProduct[c.Code]) > 0)) || (c.System == SystemATC && at) {
			return true
		}
	}
	return false
}

// classMatch is the match of an order coded only by an ATC level-4 class:
// one finding for the class, when every ingredient of the class in the
// knowledge base has the same effects and evidence (SSRIs, thiazides); a
// mixed class (other antidepressants) is not guessed at.
func (kb *drugKB) classMatch(code string) (DrugMatch, bool) {
	members := kb.byClassATC[code]
	if len(members) == 0 {
		return DrugMatch{}, false
	}
	first := kb.Ingredients[members[0]]
	for _, i := range members[1:] {
		d := kb.Ingredients[i]
		if d.Class != first.Class || d.IntendedToRaiseSodium != first.IntendedToRaiseSodium || !sameEffects(d.Effects, first.Effects) {
			return DrugMatch{}, false
		}
	}
	name := first.Class
	for _, c := range kb.Classes {
		if c.ID == first.Class {
			name = c.Name
		}
	}
	class := DrugIngredient{Name: name, ATC: []string{code}, Class: first.Class, Effects: first.Effects,
		IntendedToRaiseSodium: first.IntendedToRaiseSodium}
	return DrugMatch{Ingredient: class, By: "ATC class " + code}, true
}

func sameEffects(a, b []DrugEffect) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i].Effect != b[i].Effect || a[i].Evidence != b[i].Evidence || a[i].Mechanism != b[i].Mechanism {
			return false
		}
	}
	return true
}

// Drugs returns a copy of the knowledge base's ingredients, for listing.
func (r *Ruleset) Drugs() []DrugIngredient { return slices.Clone(r.drugs.Ingredients) }

// DrugClasses returns the knowledge base's classes.
func (r *Ruleset) DrugClasses() []DrugClass { return r.drugs.Classes }

// DrugNote is the knowledge base's provenance note.
func (r *Ruleset) DrugNote() string { return r.drugs.Note }

// EvidenceMeaning says what an evidence word means.
func (r *Ruleset) EvidenceMeaning(e string) string { return r.drugs.Evidence[e] }
