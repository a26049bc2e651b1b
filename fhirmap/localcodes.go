package fhirmap

import (
	"bytes"
	"encoding/json"
	"fmt"
	"net/url"
	"sort"
	"strings"

	"github.com/halite-cds/halite/rules"
)

// Codes is the table of result codes halite reads: the built-in LOINC table
// and a site's local laboratory codes. It is immutable once built and safe
// for concurrent use.
type Codes struct {
	// local maps "system|code" to a site's entry.
	local map[string]localMeasure
}

// localMeasure is how a local code maps, and the unit a result without
// one is read in (built-in codes have none: a result must carry its unit).
type localMeasure struct {
	measure
	unit string
}

// BuiltinCodes is the LOINC table alone.
func BuiltinCodes() *Codes { return &Codes{} }

// LocalCode is one site-local laboratory code (from a site's codes file).
type LocalCode struct {
	System string `json:"system"` // the code system's URI
	Code   string `json:"code"`
	// Analyte is one of rules.Analytes, or "urea-nitrogen" for urea
	// reported as nitrogen mass (mg/dL of BUN).
	Analyte string `json:"analyte"`
	// Unit is the UCUM unit the code reports in; a result that carries no
	// unit of its own is read in it.
	Unit     string `json:"unit"`
	Specimen string `json:"specimen"` // "serum or plasma", "venous blood", "urine"…
	// Origin is "laboratory", "blood gas" or "point of care".
	Origin  string `json:"origin"`
	Display string `json:"display,omitempty"`
}

// localCodesFile is the shape of a site's codes file.
type localCodesFile struct {
	Codes []LocalCode `json:"codes"`
}

// ReadLocalCodes parses a site's codes file ({"codes": [...]}) and checks
// every entry against the built-in table: it names every problem at once.
func ReadLocalCodes(data []byte) (*Codes, error) {
	var f localCodesFile
	dec := json.NewDecoder(bytes.NewReader(bytes.TrimPrefix(data, []byte("\xef\xbb\xbf"))))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&f); err != nil {
		return nil, fmt.Errorf("read local lab codes: %v", err)
	}
	if dec.More() {
		return nil, fmt.Errorf("read local lab codes: data after the JSON document")
	}
	return NewCodes(f.Codes)
}

// NewCodes builds the table from the built-in LOINC codes and local.
func NewCodes(local []LocalCode) (*Codes, error) {
	c := &Codes{local: map[string]localMeasure{}}
	var problems []string
	for i, l := range local {
		m, err := l.measure()
		if err == nil {
			key := l.System + "|" + l.Code
			switch _, builtin := loinc[l.Code]; {
			case l.System == SystemLOINC && builtin:
				err = fmt.Errorf("LOINC %s is already read by halite as %s", l.Code, loinc[l.Code].analyte)
			case c.local[key].analyte != "":
				err = fmt.Errorf("%s is listed twice", key)
			}
			c.local[key] = localMeasure{m, l.Unit}
		}
		if err != nil {
			problems = append(problems, fmt.Sprintf("codes[%d]: %v", i, err))
		}
	}
	if len(problems) > 0 {
		return nil, fmt.Errorf("local lab codes: %s", strings.Join(problems, "; "))
	}
	return c, nil
}

// measure checks l and returns how its results map.
func (l LocalCode) measure() (measure, error) {
	if u, err := url.Parse(l.System); err != nil || !u.IsAbs() {
		return measure{}, fmt.Errorf("system %q is not an absolute URI", l.System)
	}
	if l.Code == "" {
		return measure{}, fmt.Errorf("code is empty")
	}
	m := measure{analyte: rules.Analyte(l.Analyte), specimen: l.Specimen, display: l.Display, origin: rules.Origin(l.Origin)}
	switch m.analyte {
	case rules.Glucose:
		m.molarMass = molarMassGlucose
	case rules.Urea:
		m.molarMass = molarMassUrea
	case "urea-nitrogen":
		m.analyte, m.molarMass = rules.Urea, molarMassUreaN
	case rules.Creatinine:
		m.molarMass = molarMassCreatinine
	case rules.Urate, rules.UrineUrate:
		m.molarMass = molarMassUrate
	case rules.UrineCreatinine:
		m.molarMass = molarMassCreatinine
	case rules.Cortisol:
		m.molarMass = molarMassCortisol
	case rules.BodyWeight, rules.BodyHeight:
		return measure{}, fmt.Errorf("analyte %q: body measurements are read by their LOINC codes only", l.Analyte)
	}
	known := false
	for _, a := range rules.Analytes() {
		known = known || a == m.analyte
	}
	if !known {
		return measure{}, fmt.Errorf("analyte %q is not one halite reads (%v or urea-nitrogen)", l.Analyte, rules.Analytes())
	}
	switch m.origin {
	case rules.Laboratory, rules.BloodGas, rules.PointOfCare:
	default:
		return measure{}, fmt.Errorf("origin %q is not laboratory, blood gas or point of care", l.Origin)
	}
	if l.Specimen == "" {
		return measure{}, fmt.Errorf("specimen is empty")
	}
	if l.Unit == "" {
		return measure{}, fmt.Errorf("unit is empty")
	}
	if _, err := toCanonical(m, 1, l.Unit); err != nil {
		return measure{}, err
	}
	return m, nil
}

// lookup finds the entry for a coding, and the unit a result without one
// is read in ("" for built-in codes).
func (c *Codes) lookup(system, code string) (measure, string, bool) {
	if system == SystemLOINC {
		if m, ok := loinc[code]; ok {
			return m, "", true
		}
	}
	m, ok := c.local[system+"|"+code]
	return m.measure, m.unit, ok
}

// SearchTokens returns the system|code tokens of every code that maps to
// one of analytes, sorted, for a prefetch query's code parameter.
func (c *Codes) SearchTokens(analytes ...rules.Analyte) []string {
	want := map[rules.Analyte]bool{}
	for _, a := range analytes {
		want[a] = true
	}
	var out []string
	for code, m := range loinc {
		if want[m.analyte] {
			out = append(out, SystemLOINC+"|"+code)
		}
	}
	for key, m := range c.local {
		if want[m.analyte] {
			out = append(out, key)
		}
	}
	sort.Strings(out)
	return out
}
