package fhirmap

import (
	"encoding/json"
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/rules"
)

// testAt is the evaluation time of every Map test; it is the fixed time the
// scenario README (testdata/scenarios/README.md) evaluates its bundles at.
var testAt = time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)

// testPatient is the patient in context of every Map test (an invented id).
const testPatient = "p1"

func ruleset(tb testing.TB) *rules.Ruleset {
	tb.Helper()
	rs, err := rules.Load()
	if err != nil {
		tb.Fatalf("rules.Load: %v", err)
	}
	return rs
}

// vq renders a valueQuantity with a UCUM code; value is raw JSON number text.
func vq(value, unit string) string {
	return fmt.Sprintf(`"valueQuantity":{"value":%s,"unit":%q,"system":"http://unitsofmeasure.org","code":%q}`, value, unit, unit)
}

// dt renders an effectiveDateTime.
func dt(s string) string { return fmt.Sprintf(`"effectiveDateTime":%q`, s) }

// omit marks a field of obsSpec that is left out of the JSON.
const omit = "-"

// obsSpec describes one Observation; empty fields take the defaults noted.
type obsSpec struct {
	id        string
	system    string // default LOINC; omit leaves it out
	code      string // default 2951-2 (serum sodium)
	status    string // default "final"; omit leaves it out
	subject   string // default "Patient/p1"; omit leaves it out
	effective string // raw JSON member; default dt("2026-11-20T06:00:00Z"); omit leaves it out
	value     string // raw JSON member; default vq("140", "mmol/L")
}

func (s obsSpec) raw() json.RawMessage {
	def := func(v, d string) string {
		if v == "" {
			return d
		}
		return v
	}
	members := []string{`"resourceType":"Observation"`, fmt.Sprintf(`"id":%q`, s.id)}
	if st := def(s.status, "final"); st != omit {
		members = append(members, fmt.Sprintf(`"status":%q`, st))
	}
	if sys := def(s.system, SystemLOINC); sys != omit {
		members = append(members, fmt.Sprintf(`"code":{"coding":[{"system":%q,"code":%q}]}`, sys, def(s.code, "2951-2")))
	} else {
		members = append(members, fmt.Sprintf(`"code":{"coding":[{"code":%q}]}`, def(s.code, "2951-2")))
	}
	if sub := def(s.subject, "Patient/"+testPatient); sub != omit {
		members = append(members, fmt.Sprintf(`"subject":{"reference":%q}`, sub))
	}
	if eff := def(s.effective, dt("2026-11-20T06:00:00Z")); eff != omit {
		members = append(members, eff)
	}
	// 140 mmol/L: invented test value inside the normal serum sodium range
	// 135–145 mmol/L (common practice).
	if v := def(s.value, vq("140", "mmol/L")); v != omit {
		members = append(members, v)
	}
	return json.RawMessage("{" + strings.Join(members, ",") + "}")
}

func mapResources(t *testing.T, rs ...json.RawMessage) rules.Facts {
	t.Helper()
	return Map(Input{At: testAt, PatientID: testPatient, Entries: raws(rs...)}, ruleset(t))
}

// raws wraps resources in Bundle entries without fullUrls.
func raws(rs ...json.RawMessage) []BundleEntry {
	out := make([]BundleEntry, len(rs))
	for i, r := range rs {
		out[i] = BundleEntry{Resource: r}
	}
	return out
}

func near(got, want, tol float64) bool { return math.Abs(got-want) <= tol }

func ptr[T any](v T) *T { return &v }

func fptr(p *float64) string {
	if p == nil {
		return "nil"
	}
	return fmt.Sprint(*p)
}

func qstr(q *rules.Quantity) string {
	if q == nil {
		return "nil"
	}
	return fmt.Sprintf("%v %s", q.Value, q.Unit)
}

// perResource leaves out the rejections that count resources by type
// ("3 × Encounter"), keeping those about one resource.
func perResource(rs []rules.Rejection) []rules.Rejection {
	var out []rules.Rejection
	for _, r := range rs {
		if !strings.Contains(r.Source, " × ") {
			out = append(out, r)
		}
	}
	return out
}
