package rules

import (
	"cmp"
	"fmt"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"time"
)

// Card text (summaries, details, advice labels) writes every measured value
// and every computed figure through precision.of, so a value converted from
// other units shows no floating-point noise ("sodium 140 mmol/L", never
// 139.99997792809936). Only the words are rounded: computation and the
// machine-readable Figures keep full precision. Policy thresholds are
// written as the policy states them (%g gives back the decimal the JSON
// held).

// precision is how a kind of number is written: rounded to decimals, with
// trailing zeros kept (fixed: "5.0") or dropped ("140", "136.5").
type precision struct {
	decimals int
	fixed    bool
}

// analytePrecision is how a measured value of a (or one interpolated
// between two results) is written: to the precision laboratories report it
// with (common practice; no single source
// sets it), without trailing zeros, as card text has always written
// measured values.
//
//	sodium, potassium, glucose, urea, urine sodium and potassium  mmol/L   1 decimal
//	creatinine                                                    µmol/L   whole
//	serum and urine osmolality                                    mOsm/kg  whole
//	body weight                                                   kg       1 decimal
//	body height                                                   cm       1 decimal
//	uric acid (serum, urine), cortisol                            µmol/L, nmol/L  whole
//	urine specific gravity                                        1        3 decimals
//	TSH                                                           mIU/L    2 decimals
func analytePrecision(a Analyte) precision {
	switch a {
	case Creatinine, SerumOsmolality, UrineOsmolality, Urate, UrineUrate, Cortisol:
		return precision{0, false}
	case UrineSpecificGravity:
		return precision{3, true}
	case TSH:
		return precision{2, false}
	default:
		return precision{1, false}
	}
}

// Computed figures, with the decimals cards have shown them with (common
// practice: the precision of the inputs, and no more).
var (
	naChange   = precision{1, true}  // a sodium change or allowance, or a glucose-corrected sodium, mmol/L
	naPerHour  = precision{2, true}  // a sodium change per hour, mmol/L/h
	naPerLitre = precision{2, true}  // the sodium change per litre of an infusate, mmol/L
	osmolal    = precision{0, true}  // a calculated or effective osmolality, an osmolal gap, mOsm/kg
	bodyWater  = precision{1, true}  // total body water, free-water deficit, L
	volume24h  = precision{3, true}  // the volume an order gives in 24 h, L (to the mL)
	maxLitres  = precision{3, false} // the largest volume that fits, L (rounded down to the mL before)
	ratioOrBSA = precision{2, true}  // the urine-to-plasma electrolyte ratio, body-surface area (m²)
	mlPerDay   = precision{0, true}  // a fluid allowance, mL/day or mL/m²/day
	hoursSince = precision{0, true}  // hours since a result, or left in a window, in a summary
	hoursSpan  = precision{1, true}  // hours between two results, or left in a window, in a detail
	daysSince  = precision{0, true}  // days since a result
	orderHours = precision{1, false} // a duration from an order or the policy (a course, a window), h or days
	orderRate  = precision{1, false} // an infusion rate, mL/h (pumps run to 0.1 mL/h)
	orderMl    = precision{1, false} // an ordered volume or dose, mL
	infusateNa = precision{1, false} // an infusate's sodium or potassium, mmol/L
	doseCount  = precision{0, false} // a number of doses
	percent    = precision{1, true}  // a fractional excretion or a relative change, %
)

// show writes a measured value of analyte a.
func show(a Analyte, v float64) string { return analytePrecision(a).of(v) }

// of writes v rounded to the precision.
func (p precision) of(v float64) string {
	r := Round(v, p.decimals)
	if r == 0 {
		r = 0 // no "-0"
	}
	if p.fixed {
		return strconv.FormatFloat(r, 'f', p.decimals, 64)
	}
	return strconv.FormatFloat(r, 'f', -1, 64)
}

// signed writes v with its sign, "+" for a value that rounds to zero or
// more.
func (p precision) signed(v float64) string {
	s := p.of(v)
	if s[0] == '-' {
		return s
	}
	return "+" + s
}

// orderText names a draft order in card text: its product as the order
// words it (text, else a coding's display, else its ingredients) and its
// route, so that two orders of one ingredient can be told apart.
func orderText(o MedicationOrder) string {
	m := o.Medication
	product := m.Text
	for _, c := range m.Codings {
		if product == "" {
			product = c.Display
		}
	}
	if product == "" {
		var names []string
		for _, ing := range m.Ingredients {
			if ing.Text != "" {
				names = append(names, ing.Text)
			}
		}
		product = strings.Join(names, " + ")
	}
	if product == "" {
		product = "product not named"
	}
	route := o.RouteText
	for _, c := range o.Route {
		if route == "" {
			route = cmp.Or(c.Display, c.Code)
		}
	}
	return product + "; route: " + cmp.Or(route, "not stated")
}

// Reviewers' curation notes in the policy and drug data (verification
// marks, note numbers, repository addresses) stay in the data and in
// `halite rules`; clinicianText takes them out of what clinicians read.
var curation = []struct {
	trigger string // the pattern can only match where this occurs
	re      *regexp.Regexp
	with    string
}{
	{"[", regexp.MustCompile(`\s*\[(?:V|derived)\b[^\]]*\]`), ""},                                        // [V], [V: abstract], [derived, …]
	{"from memory", regexp.MustCompile(`\s*\((?:first author )?from memory\)`), ""},                      // (from memory)
	{"from memory", regexp.MustCompile(`\((?:first author )?from memory[:;,]\s*`), "("},                  // (from memory: …
	{"from memory", regexp.MustCompile(`\s*[;,]\s*(?:first author )?from memory\b`), ""},                 // …; from memory)
	{"reference notes", regexp.MustCompile(`\s*\((?:halite's clinical )?reference notes §[\d.]+\)`), ""}, // (reference notes §3)
	{"reference notes", regexp.MustCompile(`[;,]?\s*(?:halite's clinical )?reference notes §[\d.]+,?`), ""},
	{"(extract: ", regexp.MustCompile(`\s*\(extract: [^)]*\)`), ""}, // (extract: github.com/…, commit …)
	{"RxNorm codes from", regexp.MustCompile(`\s*RxNorm codes from the RxNorm [^;]*;\s*re-validate every code[^.]*\.`), ""},
	{"ATC codes from", regexp.MustCompile(`\s*ATC codes from the WHO ATC index as extracted in [\w.-]+\.`), ""},
	{"", regexp.MustCompile(`\s*\b(?:from memory|github\.com/\S+|commit [0-9a-f]{7,40})`), ""}, // what is left
}

// tidy mends the punctuation a removal leaves.
var tidy = []struct {
	re   *regexp.Regexp
	with string
}{
	{regexp.MustCompile(`\(\s*[;,]?\s*\)`), ""}, // emptied parentheses
	{regexp.MustCompile(`\(\s*[;,]?\s+`), "("},
	{regexp.MustCompile(`\s*[;,]\s*\)`), ")"},
	{regexp.MustCompile(`[ \t]{2,}`), " "},
}

// curationHints are quick tests for any mark at all, so that text without
// one (most card text) is returned untouched without running the patterns
// (plain substring tests: a regular expression here cost 5% of a call).
var curationHints = []string{"[V", "[derived", "from memory", "reference notes", "extract: ", "RxNorm codes from", "ATC codes from", "github.com", "commit "}

// clinicianText is s without curation notes. It works a line at a time,
// so that only the lines that carry a mark (a source's) are rewritten.
func clinicianText(s string) string {
	if !strings.Contains(s, "\n") {
		return cleanLine(s)
	}
	lines := strings.Split(s, "\n")
	for i, l := range lines {
		lines[i] = cleanLine(l)
	}
	return strings.Join(lines, "\n")
}

// cleanLine is clinicianText on one line.
func cleanLine(s string) string {
	if !slices.ContainsFunc(curationHints, func(h string) bool { return strings.Contains(s, h) }) {
		return s
	}
	for _, c := range curation {
		if c.trigger == "" || strings.Contains(s, c.trigger) {
			s = c.re.ReplaceAllString(s, c.with)
		}
	}
	for _, t := range tidy {
		s = t.re.ReplaceAllString(s, t.with)
	}
	return s
}

// effectWords names a drug effect for a clinician (not its data code).
func effectWords(effect string) string {
	switch effect {
	case EffectHyponatremia:
		return "hyponatremia"
	case EffectNephrogenicDI:
		return "nephrogenic diabetes insipidus"
	case EffectRapidRise:
		return "a rapid rise of sodium"
	}
	return effect
}

// Display is how card text is shown to people: the zone its times are
// written in (nil: UTC) and the units of its concentrations. It changes no
// computation (figures stay in the canonical units), so it is not part of
// the ruleset revision.
type Display struct {
	Zone  *time.Location
	Units DisplayUnits
}

// DisplayUnits are the units card text writes concentrations in; an empty
// member is the canonical unit.
type DisplayUnits struct {
	// Electrolytes is "mmol/L" or "mEq/L" for sodium and potassium (and
	// their changes, limits and sums), equal in value for these monovalent
	// ions.
	Electrolytes string
	// Glucose is "mmol/L" or "mg/dL".
	Glucose string
	// Urea is "mmol/L" (urea) or "mg/dL" (as urea nitrogen, BUN).
	Urea string
	// Creatinine is "umol/L" or "mg/dL".
	Creatinine string
}

// Validate names the first member that is not a unit halite writes.
func (u DisplayUnits) Validate() error {
	for _, m := range []struct{ name, v, si, mass string }{
		{"electrolytes", u.Electrolytes, "mmol/L", "mEq/L"}, {"glucose", u.Glucose, "mmol/L", "mg/dL"},
		{"urea", u.Urea, "mmol/L", "mg/dL"}, {"creatinine", u.Creatinine, "umol/L", "mg/dL"},
	} {
		if m.v != "" && m.v != m.si && m.v != m.mass {
			return fmt.Errorf("%s: %q is not %q or %q", m.name, m.v, m.si, m.mass)
		}
	}
	return nil
}

// Concentrations whose display unit is not the electrolytes' are written
// into card text as tokens, resolved into the display unit by displayUnits
// after the electrolyte unit is set; a kept token is text written as sent
// (a result's original unit), which no unit rewrite touches.
const (
	tokenOpen, tokenSep, tokenClose = "\uE000", "\uE001", "\uE002"
	keptToken                       = "kept"
)

var unitToken = regexp.MustCompile(tokenOpen + `([a-z-]+)` + tokenSep + `([^` + tokenClose + `]*)` + tokenClose)

// quantity writes v of analyte a with its unit: glucose, urea and
// creatinine as tokens for their display unit, the others as is.
func quantity(a Analyte, v float64) string {
	switch a {
	case Glucose, Urea, Creatinine:
		return tokenOpen + string(a) + tokenSep + strconv.FormatFloat(v, 'g', -1, 64) + tokenClose
	}
	return show(a, v) + " " + CanonicalUnit(a)
}

// kept is s, written as sent: no unit rewrite touches it.
func kept(s string) string { return tokenOpen + keptToken + tokenSep + s + tokenClose }

// Mass-unit conversions from the canonical units, with the molar masses
// fhirmap converts with (IUPAC 2021 atomic weights): glucose 180.156 g/mol,
// urea nitrogen 2 × 14.007 g/mol, creatinine 113.12 g/mol.
const (
	ureaNitrogenMgPerDLPerMmol   = 2 * 14.007 / 10
	creatinineMgPerDLPerMicromol = 113.12 / 10000
)

// plainUnits is s with its concentrations in the canonical units, for text
// that is not card text (data notes and rejection reasons).
func plainUnits(s string) string {
	var canonical Ruleset
	return canonical.displayUnits(s)
}

// displayUnits writes s's concentrations in the display units: the
// electrolyte unit in the text between tokens, each token in its own.
func (r *Ruleset) displayUnits(s string) string {
	electrolytes := func(text string) string {
		if r.display.Units.Electrolytes == "mEq/L" {
			return strings.ReplaceAll(text, "mmol/L", "mEq/L")
		}
		return text
	}
	if !strings.Contains(s, tokenOpen) {
		return electrolytes(s)
	}
	var b strings.Builder
	last := 0
	for _, m := range unitToken.FindAllStringSubmatchIndex(s, -1) {
		b.WriteString(electrolytes(s[last:m[0]]))
		b.WriteString(r.resolveToken(s[m[2]:m[3]], s[m[4]:m[5]]))
		last = m[1]
	}
	b.WriteString(electrolytes(s[last:]))
	return b.String()
}

// resolveToken writes a token's text: a kept text as is, a concentration
// in its display unit.
func (r *Ruleset) resolveToken(name, text string) string {
	u := r.display.Units
	if name == keptToken {
		return text
	}
	v, err := strconv.ParseFloat(text, 64)
	if err != nil {
		return text
	}
	a := Analyte(name)
	switch {
	case a == Glucose && u.Glucose == "mg/dL":
		return precision{0, false}.of(v*glucoseMgPerDLPerMmol) + " mg/dL"
	case a == Urea && u.Urea == "mg/dL":
		return precision{0, false}.of(v*ureaNitrogenMgPerDLPerMmol) + " mg/dL (urea nitrogen)"
	case a == Creatinine && u.Creatinine == "mg/dL":
		return precision{2, false}.of(v*creatinineMgPerDLPerMicromol) + " mg/dL"
	}
	return show(a, v) + " " + CanonicalUnit(a)
}

// WithDisplay returns the ruleset writing card text with d.
func (r *Ruleset) WithDisplay(d Display) *Ruleset {
	c := *r
	c.display = d
	return &c
}

// displayZone is the zone card text writes dates in (UTC unless set).
func (r *Ruleset) displayZone() *time.Location {
	if r.display.Zone == nil {
		return time.UTC
	}
	return r.display.Zone
}

// utcStamp matches the times stamp writes.
var utcStamp = regexp.MustCompile(`\d{4}-\d{2}-\d{2} \d{2}:\d{2} UTC`)

// localTimes rewrites every time in s into the display zone, with its date
// and the zone's name ("2026-11-20 06:00 CET").
func (r *Ruleset) localTimes(s string) string {
	zone := r.displayZone()
	if zone == time.UTC {
		return s
	}
	return utcStamp.ReplaceAllStringFunc(s, func(m string) string {
		t, err := time.Parse(stampLayout, m)
		if err != nil {
			return m
		}
		return t.In(zone).Format("2006-01-02 15:04 MST")
	})
}
