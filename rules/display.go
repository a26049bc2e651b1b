package rules

import (
	"cmp"
	"regexp"
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
func analytePrecision(a Analyte) precision {
	switch a {
	case Creatinine, SerumOsmolality, UrineOsmolality:
		return precision{0, false}
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

// curationHint is a quick test for any mark at all, so that text without
// one (most card text) is returned untouched without running the patterns.
var curationHint = regexp.MustCompile(`\[V|\[derived|from memory|reference notes|extract: |RxNorm codes from|ATC codes from|github\.com|commit [0-9a-f]`)

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
	if !curationHint.MatchString(s) {
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
// written in (nil: UTC). It changes no computation, so it is not part of the
// ruleset revision.
type Display struct {
	Zone *time.Location
}

// WithDisplay returns the ruleset writing card text with d.
func (r *Ruleset) WithDisplay(d Display) *Ruleset {
	c := *r
	c.display = d
	return &c
}

// utcStamp matches the times stamp writes.
var utcStamp = regexp.MustCompile(`\d{4}-\d{2}-\d{2} \d{2}:\d{2} UTC`)

// localTimes rewrites every time in s into the display zone, with its date
// and the zone's name ("2026-11-20 06:00 CET").
func (r *Ruleset) localTimes(s string) string {
	zone := r.display.Zone
	if zone == nil || zone == time.UTC {
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
