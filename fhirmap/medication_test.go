package fhirmap

import (
	"encoding/json"
	"fmt"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/rules"
)

// mr renders a MedicationRequest; extra is raw JSON members appended as is.
func mr(id, status, extra string) json.RawMessage {
	s := fmt.Sprintf(`{"resourceType":"MedicationRequest","id":%q`, id)
	if status != "" {
		s += fmt.Sprintf(`,"status":%q`, status)
	}
	s += `,"intent":"order","subject":{"reference":"Patient/p1"}`
	if extra != "" {
		s += "," + extra
	}
	return json.RawMessage(s + "}")
}

// 1807639 "1000 ML sodium chloride 9 MG/ML Injection" (RxNorm display as in
// scenario 07, testdata/scenarios).
const nsConcept = `"medicationCodeableConcept":{"coding":[{"system":"http://www.nlm.nih.gov/research/umls/rxnorm","code":"1807639","display":"1000 ML sodium chloride 9 MG/ML Injection"}],"text":"sodium chloride 0.9% 1000 mL IV"}`

func TestMapMedicationRequestLists(t *testing.T) {
	active := mr("mr-a", "active", nsConcept)
	stopped := mr("mr-s", "stopped", nsConcept)
	d1 := mr("mr-d1", "draft", nsConcept)
	d2 := mr("mr-d2", "draft", nsConcept)
	tests := []struct {
		name         string
		selections   []string
		wantSelected map[string]bool
	}{
		{"order-sign: nil selections selects all", nil,
			map[string]bool{"MedicationRequest/mr-d1": true, "MedicationRequest/mr-d2": true}},
		{"order-select: only the named one", []string{"MedicationRequest/mr-d2"},
			map[string]bool{"MedicationRequest/mr-d1": false, "MedicationRequest/mr-d2": true}},
		{"order-select: unknown reference", []string{"MedicationRequest/other"},
			map[string]bool{"MedicationRequest/mr-d1": false, "MedicationRequest/mr-d2": false}},
		{"order-select: empty list selects none", []string{},
			map[string]bool{"MedicationRequest/mr-d1": false, "MedicationRequest/mr-d2": false}},
		{"order-select: both", []string{"MedicationRequest/mr-d1", "MedicationRequest/mr-d2"},
			map[string]bool{"MedicationRequest/mr-d1": true, "MedicationRequest/mr-d2": true}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			f := Map(Input{At: testAt, PatientID: testPatient,
				Entries:      raws(active, stopped),
				DraftEntries: raws(d1, d2),
				Selections:   tt.selections}, ruleset(t))
			if len(perResource(f.Rejected)) != 0 {
				t.Fatalf("rejected %+v", f.Rejected)
			}
			if len(f.Medications) != 1 || f.Medications[0].Reference != "MedicationRequest/mr-a" ||
				f.Medications[0].Draft || f.Medications[0].Selected || f.Medications[0].Status != "active" {
				t.Errorf("medications %+v, want only the active mr-a, not draft, not selected", f.Medications)
			}
			if len(f.DraftOrders) != 2 {
				t.Fatalf("draft orders %+v, want two", f.DraftOrders)
			}
			for _, o := range f.DraftOrders {
				want, ok := tt.wantSelected[o.Reference]
				if !ok {
					t.Errorf("unexpected draft order %s", o.Reference)
					continue
				}
				if !o.Draft || o.Selected != want || o.Status != "draft" || o.Intent != "order" {
					t.Errorf("%s: draft %v selected %v status %q intent %q; want draft true selected %v status draft intent order",
						o.Reference, o.Draft, o.Selected, o.Status, o.Intent, want)
				}
			}
		})
	}
}

func TestMapMedicationRequestRejected(t *testing.T) {
	tests := []struct {
		name   string
		raw    json.RawMessage
		reason string
	}{
		{"missing status", mr("m", "", nsConcept), "status is missing"},
		{"other patient", json.RawMessage(`{"resourceType":"MedicationRequest","id":"m","status":"active","intent":"order","subject":{"reference":"Patient/p2"},` + nsConcept + `}`),
			"subject is not the patient in context"},
	}
	for _, tt := range tests {
		for _, asDraft := range []bool{false, true} {
			t.Run(fmt.Sprintf("%s/draft=%v", tt.name, asDraft), func(t *testing.T) {
				in := Input{At: testAt, PatientID: testPatient}
				if asDraft {
					in.DraftEntries = raws(tt.raw)
				} else {
					in.Entries = raws(tt.raw)
				}
				f := Map(in, ruleset(t))
				want := rules.Rejection{Source: "MedicationRequest/m", Reason: tt.reason}
				if len(f.Rejected) != 1 || f.Rejected[0] != want {
					t.Errorf("rejected %+v, want [%+v]", f.Rejected, want)
				}
				if len(f.Medications)+len(f.DraftOrders) != 0 {
					t.Errorf("orders read: %+v %+v", f.Medications, f.DraftOrders)
				}
			})
		}
	}
}

func draftOrder(t *testing.T, in Input) rules.MedicationOrder {
	t.Helper()
	in.At, in.PatientID = testAt, testPatient
	f := Map(in, ruleset(t))
	if len(f.Rejected) != 0 {
		t.Fatalf("rejected %+v", f.Rejected)
	}
	if len(f.DraftOrders) != 1 {
		t.Fatalf("draft orders %+v, want one", f.DraftOrders)
	}
	return f.DraftOrders[0]
}

func TestMapRate(t *testing.T) {
	qty := func(v, unit string) string {
		return fmt.Sprintf(`{"value":%s,"unit":%q,"system":"http://unitsofmeasure.org","code":%q}`, v, unit, unit)
	}
	rateQ := func(v, unit string) string {
		return `"dosageInstruction":[{"doseAndRate":[{"rateQuantity":` + qty(v, unit) + `}]}]`
	}
	rateR := func(nv, nu, dv, du string) string {
		return `"dosageInstruction":[{"doseAndRate":[{"rateRatio":{"numerator":` + qty(nv, nu) + `,"denominator":` + qty(dv, du) + `}}]}]`
	}
	tests := []struct {
		name     string
		dosage   string
		wantMlH  *float64
		wantRate string
	}{
		{"rateQuantity mL/h", rateQ("25", "mL/h"), ptr(25.0), "25 mL/h"},                                // identity (UCUM)
		{"rateQuantity mL/min", rateQ("2", "mL/min"), ptr(120.0), "2 mL/min"},                           // 1 h = 60 min (UCUM)
		{"rateQuantity L/h", rateQ("0.5", "L/h"), ptr(500.0), "0.5 L/h"},                                // 1 L = 1000 mL (UCUM prefixes)
		{"rateQuantity mL/d", rateQ("2400", "mL/d"), ptr(100.0), "2400 mL/d"},                           // 1 d = 24 h (UCUM)
		{"rateQuantity unknown unit", rateQ("20", "[drp]/min"), nil, "20 [drp]/min"},                    // drops: no volume without a drop factor (common practice)
		{"rateRatio 100 mL / 1 h", rateR("100", "mL", "1", "h"), ptr(100.0), "100 mL per 1 h"},          // scenario 06 form; identity
		{"rateRatio 1 L / 8 h", rateR("1", "L", "8", "h"), ptr(125.0), "1 L per 8 h"},                   // 1000 mL / 8 h (UCUM: L = 1000 mL)
		{"rateRatio 150 mL / 20 min", rateR("150", "mL", "20", "min"), ptr(450.0), "150 mL per 20 min"}, // 150 × 60/20 (UCUM: h = 60 min)
		{"rateRatio 2400 mL / 1 d", rateR("2400", "mL", "1", "d"), ptr(100.0), "2400 mL per 1 d"},       // 1 d = 24 h (UCUM)
		{"rateRatio mass numerator", rateR("1", "g", "1", "h"), nil, "1 g per 1 h"},
		{"rateRatio zero denominator", rateR("100", "mL", "0", "h"), nil, "?"}, // "?": Rate text not asserted
		{"no rate", `"dosageInstruction":[{"doseAndRate":[{"doseQuantity":` + qty("150", "mL") + `}]}]`, nil, ""},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			o := draftOrder(t, Input{DraftEntries: raws(mr("m", "draft", nsConcept+","+tt.dosage))})
			switch {
			case tt.wantMlH == nil && o.RateMlPerHour != nil,
				tt.wantMlH != nil && (o.RateMlPerHour == nil || !near(*o.RateMlPerHour, *tt.wantMlH, 1e-9)):
				t.Errorf("RateMlPerHour %s, want %s", fptr(o.RateMlPerHour), fptr(tt.wantMlH))
			}
			if tt.wantRate != "?" && o.Rate != tt.wantRate {
				t.Errorf("Rate %q, want %q", o.Rate, tt.wantRate)
			}
		})
	}
}

func TestMapDosageTiming(t *testing.T) {
	raw := mr("m", "draft", nsConcept+`,
	  "authoredOn":"2026-11-20T07:42:00+01:00",
	  "dosageInstruction":[{
	    "route":{"coding":[{"system":"http://snomed.info/sct","code":"47625008","display":"Intravenous route"}],"text":"IV"},
	    "timing":{"repeat":{"duration":20,"durationUnit":"min","boundsDuration":{"value":20,"unit":"h","system":"http://unitsofmeasure.org","code":"h"},"frequency":2,"period":1,"periodUnit":"d"}},
	    "doseAndRate":[{"doseQuantity":{"value":150,"unit":"mL","system":"http://unitsofmeasure.org","code":"mL"}}]},
	   {"text":"second instruction"}],
	  "dispenseRequest":{"quantity":{"value":500,"unit":"mL","system":"http://unitsofmeasure.org","code":"mL"}}`)
	// Values are invented but mirror scenario 13 (150 mL over 20 min),
	// scenario 01 (20 h bounds) and scenario 08 (frequency 2 per day).
	f := Map(Input{At: testAt, PatientID: testPatient, DraftEntries: raws(raw)}, ruleset(t))
	if len(f.DraftOrders) != 1 {
		t.Fatalf("draft orders %+v", f.DraftOrders)
	}
	o := f.DraftOrders[0]
	checks := []struct {
		what, got, want string
	}{
		{"duration", qstr(o.Duration), "20 min"},
		{"bounds", qstr(o.Bounds), "20 h"},
		{"frequency", fmt.Sprint(*o.Frequency), "2"},
		{"period", qstr(o.Period), "1 d"},
		{"dose", qstr(o.Dose), "150 mL"},
		{"dispense quantity", qstr(o.DispenseQuantity), "500 mL"},
		{"route", fmt.Sprint(o.Route), "[{http://snomed.info/sct 47625008 Intravenous route}]"}, // SNOMED CT 47625008 intravenous route, as in the scenarios
		{"route text", o.RouteText, "IV"},
		{"rate", fmt.Sprintf("%q %s", o.Rate, fptr(o.RateMlPerHour)), `"" nil`},
	}
	for _, c := range checks {
		if c.got != c.want {
			t.Errorf("%s = %s, want %s", c.what, c.got, c.want)
		}
	}
	// 07:42+01:00 is 06:42Z.
	if o.AuthoredOn == nil || !o.AuthoredOn.Equal(time.Date(2026, 11, 20, 6, 42, 0, 0, time.UTC)) {
		t.Errorf("authoredOn %v, want 2026-11-20T06:42Z", o.AuthoredOn)
	}
	if !strings.Contains(strings.Join(f.Notes, "\n"), "only the first of 2 dosage instructions is read") {
		t.Errorf("notes %q, want one about the second dosage instruction", f.Notes)
	}
}

func TestMapDosageAbsent(t *testing.T) {
	o := draftOrder(t, Input{DraftEntries: raws(mr("m", "draft", nsConcept))})
	if o.Dose != nil || o.Duration != nil || o.Bounds != nil || o.Period != nil || o.DispenseQuantity != nil ||
		o.RateMlPerHour != nil || o.Rate != "" || o.Frequency != nil || o.AuthoredOn != nil || o.Route != nil {
		t.Errorf("order %+v, want nothing but identity and status", o)
	}
}

// 3% NaCl: 3 g per 100 mL (scenario 10's contained Medication; common practice).
const med3pct = `"code":{"text":"sodium chloride 3% in water"},
 "ingredient":[{"itemCodeableConcept":{"coding":[{"system":"http://www.nlm.nih.gov/research/umls/rxnorm","code":"9863","display":"sodium chloride"}],"text":"sodium chloride"},
  "isActive":true,
  "strength":{"numerator":{"value":3,"unit":"g","system":"http://unitsofmeasure.org","code":"g"},"denominator":{"value":100,"unit":"mL","system":"http://unitsofmeasure.org","code":"mL"}}}]`

func TestMapMedicationIdentity(t *testing.T) {
	medX := json.RawMessage(`{"resourceType":"Medication","id":"x",` + med3pct + `}`)
	ref := func(r, display string) string {
		s := `"medicationReference":{"reference":` + fmt.Sprintf("%q", r)
		if display != "" {
			s += fmt.Sprintf(`,"display":%q`, display)
		}
		return s + "}"
	}
	contained := `"contained":[{"resourceType":"Medication","id":"med1",` + med3pct + `}]`
	tests := []struct {
		name       string
		in         Input
		wantSource rules.MedicationSource
		wantText   string
		wantStrong bool   // the 3 g/100 mL ingredient is read
		wantNote   string // substring of a note
	}{
		{"codeable concept", Input{DraftEntries: raws(mr("m", "draft", nsConcept))},
			rules.FromCodeableConcept, "sodium chloride 0.9% 1000 mL IV", false, ""},
		{"contained #med1", Input{DraftEntries: raws(mr("m", "draft", contained+","+ref("#med1", "")))},
			rules.FromContained, "sodium chloride 3% in water", true, ""},
		{"contained id not found", Input{DraftEntries: raws(mr("m", "draft", contained+","+ref("#med2", "3% saline")))},
			rules.FromUnresolved, "3% saline", false, "contained Medication #med2 not found"},
		{"referenced, in Resources", Input{Entries: raws(medX), DraftEntries: raws(mr("m", "draft", ref("Medication/x", "")))},
			rules.FromReferenced, "sodium chloride 3% in water", true, ""},
		{"referenced, in DraftOrders", Input{DraftEntries: raws(mr("m", "draft", ref("Medication/x", "")), medX)},
			rules.FromReferenced, "sodium chloride 3% in water", true, ""},
		{"referenced, absolute URL", Input{Entries: raws(medX), DraftEntries: raws(mr("m", "draft", ref("http://example.org/fhir/Medication/x", "")))},
			rules.FromReferenced, "sodium chloride 3% in water", true, ""},
		{"unresolved reference keeps display", Input{DraftEntries: raws(mr("m", "draft", ref("Medication/y", "3% saline 500 mL")))},
			rules.FromUnresolved, "3% saline 500 mL", false, "Medication Medication/y is not in the data"},
		{"reference to other id", Input{Entries: raws(medX), DraftEntries: raws(mr("m", "draft", ref("Medication/xx", "other")))},
			rules.FromUnresolved, "other", false, "Medication Medication/xx is not in the data"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			in := tt.in
			in.At, in.PatientID = testAt, testPatient
			f := Map(in, ruleset(t))
			if len(perResource(f.Rejected)) != 0 {
				t.Fatalf("rejected %+v", f.Rejected)
			}
			if len(f.DraftOrders) != 1 {
				t.Fatalf("draft orders %+v, want one", f.DraftOrders)
			}
			med := f.DraftOrders[0].Medication
			if med.Source != tt.wantSource || med.Text != tt.wantText {
				t.Errorf("medication source %q text %q, want %q %q", med.Source, med.Text, tt.wantSource, tt.wantText)
			}
			if tt.wantStrong {
				want := rules.Ratio{Numerator: rules.Quantity{Value: 3, Unit: "g"}, Denominator: rules.Quantity{Value: 100, Unit: "mL"}} // 3 g/100 mL
				if len(med.Ingredients) != 1 || med.Ingredients[0].Strength == nil || *med.Ingredients[0].Strength != want {
					t.Fatalf("ingredients %+v, want one with strength 3 g/100 mL", med.Ingredients)
				}
				ing := med.Ingredients[0]
				// RxNorm 9863 sodium chloride (ingredient code as in scenario 10).
				if ing.Text != "sodium chloride" || len(ing.Codings) != 1 || ing.Codings[0].Code != "9863" || ing.Codings[0].System != SystemRxNorm {
					t.Errorf("ingredient %+v, want RxNorm 9863 sodium chloride", ing)
				}
			} else if tt.wantSource != rules.FromCodeableConcept && len(med.Ingredients) != 0 {
				t.Errorf("ingredients %+v, want none", med.Ingredients)
			}
			if tt.wantSource == rules.FromCodeableConcept {
				// RxNorm 1807639 as in scenario 07.
				if len(med.Codings) != 1 || med.Codings[0].Code != "1807639" || med.Codings[0].System != SystemRxNorm {
					t.Errorf("codings %+v, want RxNorm 1807639", med.Codings)
				}
			}
			notes := strings.Join(f.Notes, "\n")
			if tt.wantNote == "" && notes != "no Patient resource: age and sex are unknown" {
				t.Errorf("notes %q, want only the missing-Patient note", f.Notes)
			}
			if tt.wantNote != "" && !strings.Contains(notes, tt.wantNote) {
				t.Errorf("notes %q, want one containing %q", f.Notes, tt.wantNote)
			}
		})
	}
}

func TestMapActiveOrderInResources(t *testing.T) {
	// An active order's referenced Medication is found among Resources, and
	// drafts listed in Resources (not in DraftOrders) are not current medication.
	medX := json.RawMessage(`{"resourceType":"Medication","id":"x",` + med3pct + `}`)
	f := Map(Input{At: testAt, PatientID: testPatient, Entries: raws(
		mr("a", "active", `"medicationReference":{"reference":"Medication/x"}`), medX, mr("d", "draft", nsConcept))}, ruleset(t))
	if len(f.Medications) != 1 || f.Medications[0].Reference != "MedicationRequest/a" || f.Medications[0].Medication.Source != rules.FromReferenced {
		t.Errorf("medications %+v, want only a, from the referenced Medication", f.Medications)
	}
	if len(f.DraftOrders) != 0 {
		t.Errorf("draft orders %+v, want none", f.DraftOrders)
	}
}

// A draft that replaces a running order names it (priorPrescription), and
// an order's stated end (timing.repeat.boundsPeriod.end) is read as its
// stop; both as FHIR R4 MedicationRequest and Timing define them.
func TestMapOrderStopAndPrior(t *testing.T) {
	draft := mr("d", "draft", nsConcept+`,"priorPrescription":{"reference":"MedicationRequest/running"},`+
		`"dosageInstruction":[{"timing":{"repeat":{"boundsPeriod":{"start":"2026-11-20T08:00:00Z","end":"2026-11-20T14:00:00+01:00"}}},`+
		`"doseAndRate":[{"rateQuantity":{"value":100,"unit":"mL/h","system":"http://unitsofmeasure.org","code":"mL/h"}}]}]`)
	o := draftOrder(t, Input{DraftEntries: raws(draft)})
	if o.Replaces != "MedicationRequest/running" {
		t.Errorf("Replaces %q, want MedicationRequest/running", o.Replaces)
	}
	if want := time.Date(2026, 11, 20, 13, 0, 0, 0, time.UTC); o.EndsAt == nil || !o.EndsAt.Equal(want) {
		t.Errorf("EndsAt %v, want %v", o.EndsAt, want)
	}
	dateOnly := mr("d", "draft", nsConcept+`,"dosageInstruction":[{"timing":{"repeat":{"boundsPeriod":{"end":"2026-11-21"}}}}]`)
	f := Map(Input{At: testAt, PatientID: testPatient, DraftEntries: raws(dateOnly)}, ruleset(t))
	if len(f.DraftOrders) != 1 || f.DraftOrders[0].EndsAt != nil || !strings.Contains(strings.Join(f.Notes, "\n"), "no stop read") {
		t.Errorf("a date-only end must not be read as a time: %+v, notes %q", f.DraftOrders, f.Notes)
	}
}

// An in-progress MedicationAdministration is what runs now (FHIR R4
// MedicationAdministration: status, request, dosage.rate[x]).
func TestMapMedicationAdministration(t *testing.T) {
	ma := func(id, status, extra string) json.RawMessage {
		return json.RawMessage(fmt.Sprintf(`{"resourceType":"MedicationAdministration","id":%q,"status":%q,`+
			`"subject":{"reference":"Patient/p1"},"effectivePeriod":{"start":"2026-11-20T06:00:00Z"},%s%s}`, id, status, nsConcept, extra))
	}
	f := mapResources(t,
		ma("running", "in-progress", `,"request":{"reference":"MedicationRequest/ns"},"dosage":{"rateRatio":{"numerator":{"value":80,"unit":"mL","system":"http://unitsofmeasure.org","code":"mL"},"denominator":{"value":1,"unit":"h","system":"http://unitsofmeasure.org","code":"h"}}}`),
		ma("done", "completed", `,"dosage":{"rateQuantity":{"value":100,"unit":"mL/h","system":"http://unitsofmeasure.org","code":"mL/h"}}`),
	)
	if len(f.Infusing) != 1 {
		t.Fatalf("infusing %+v", f.Infusing)
	}
	o := f.Infusing[0]
	if o.Reference != "MedicationAdministration/running" || o.ForRequest != "MedicationRequest/ns" || o.RateMlPerHour == nil || *o.RateMlPerHour != 80 ||
		o.Medication.Source != rules.FromCodeableConcept {
		t.Errorf("administration %+v", o)
	}
	// The completed one is a dose given, at the start of its period;
	// another status is counted as unused.
	if len(f.Given) != 1 || f.Given[0].Reference != "MedicationAdministration/done" || f.Given[0].GivenAt == nil ||
		!f.Given[0].GivenAt.Equal(time.Date(2026, 11, 20, 6, 0, 0, 0, time.UTC)) {
		t.Errorf("given %+v", f.Given)
	}
	f = mapResources(t, ma("stopped", "stopped", ""),
		json.RawMessage(`{"resourceType":"MedicationAdministration","id":"notime","status":"completed","subject":{"reference":"Patient/p1"},`+nsConcept+`}`),
		json.RawMessage(`{"resourceType":"MedicationAdministration","id":"dateonly","status":"completed","subject":{"reference":"Patient/p1"},"effectiveDateTime":"2026-11-19",`+nsConcept+`}`),
		json.RawMessage(`{"resourceType":"MedicationAdministration","id":"later","status":"completed","subject":{"reference":"Patient/p1"},"effectivePeriod":{"start":"2026-11-29T06:00:00Z","end":"2026-11-30T06:00:00Z"},`+nsConcept+`}`))
	var reasons []string
	for _, r := range f.Rejected {
		reasons = append(reasons, r.Source+": "+r.Reason)
	}
	want := []string{`1 × MedicationAdministration: status "stopped" is neither in-progress nor completed`,
		"MedicationAdministration/notime: a completed administration has no effective time",
		`MedicationAdministration/dateonly: effective time "2026-11-19" is not a date and time`,
		"MedicationAdministration/later: given after the evaluation time"}
	slices.Sort(reasons)
	slices.Sort(want)
	if len(f.Given) != 0 || !slices.Equal(reasons, want) {
		t.Errorf("given %+v, rejected %q, want %q", f.Given, reasons, want)
	}
}
