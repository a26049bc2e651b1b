package fhirmap

import (
	"encoding/json"
	"reflect"
	"testing"
	"unicode/utf8"

	fhir "github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// decodeTargets are the shapes halite decodes from outside input.
func decodeTargets() map[string]func() any {
	return map[string]func() any{
		"Observation fields":       func() any { return new(observationFields) },
		"MedicationRequest fields": func() any { return new(medicationRequestFields) },
		"Medication":               func() any { return new(fhir.Medication) },
		"Condition":                func() any { return new(fhir.Condition) },
		"raw map":                  func() any { return new(map[string]json.RawMessage) },
		"generic":                  func() any { return new(any) },
	}
}

// agree reports whether DecodeJSON and encoding/json give the same
// outcome for raw: both errors, or the same value.
func agree(t *testing.T, raw []byte) {
	t.Helper()
	for name, mk := range decodeTargets() {
		fast, std := mk(), mk()
		errFast, errStd := DecodeJSON(raw, fast), json.Unmarshal(raw, std)
		if (errFast == nil) != (errStd == nil) {
			t.Fatalf("%s: DecodeJSON error %v, encoding/json error %v for %q", name, errFast, errStd, raw)
		}
		if errFast != nil {
			continue // the error is encoding/json's own by construction
		}
		// encoding/json replaces invalid UTF-8 with U+FFFD; values are
		// compared for valid input only.
		if utf8.Valid(raw) && !reflect.DeepEqual(fast, std) {
			t.Fatalf("%s: DecodeJSON %+v, encoding/json %+v for %q", name, fast, std, raw)
		}
	}
}

// TestDecodeJSONAgrees: DecodeJSON matches encoding/json (the reference
// implementation of RFC 8259 here) on valid resources and on malformed or
// mistyped ones.
func TestDecodeJSONAgrees(t *testing.T) {
	for _, raw := range decodeSeeds() {
		agree(t, raw)
	}
}

func decodeSeeds() [][]byte {
	obs := obsSpec{id: "o1", code: "2951-2", effective: dt("2026-11-20T07:00:00Z"), value: vq("131", "mmol/L")}.raw()
	return [][]byte{
		obs,
		[]byte(`{"resourceType":"Observation","status":"final","valueQuantity":{"value":1e400}}`),
		[]byte(`{"resourceType":"Observation","status":"bogus"}`),
		[]byte(`{"resourceType":"Observation","valueQuantity":{"value":"131"}}`),
		[]byte(`{"resourceType":"Observation","code":{"coding":[{"code":2951}]}}`),
		[]byte(`{"resourceType":"Observation","valueQuantity":{"value":131.}}`),
		[]byte(`{"resourceType":"Observation","valueQuantity":{"value":-0.5E+2}}`),
		[]byte(`{"resourceType":"Observation","STATUS":"final","Id":"x"}`),
		[]byte(`{"resourceType":"Observation","id":"a","id":"b"}`),
		[]byte(`{"resourceType":"Observation","note":[{"text":"\u00e9\ud83d\ude00\u0000"}]}`),
		[]byte(`{"resourceType":"Observation"} trailing`),
		[]byte(`{"resourceType":"Observation",}`),
		[]byte(`{"resourceType":"Observation"`),
		[]byte(` [1, 2, {"a": null}] `),
		[]byte(`{"a":01}`),
		[]byte(`{"a":"\x01"}`),
		[]byte(`{"a":"\u12"}`),
		[]byte(`null`),
		[]byte(``),
		[]byte("{\"resourceType\":\"Observation\",\"id\":\"\xff\"}"),
	}
}

// FuzzDecodeJSONAgrees: on any input, DecodeJSON accepts exactly what
// encoding/json accepts and decodes it to the same value.
func FuzzDecodeJSONAgrees(f *testing.F) {
	for _, s := range decodeSeeds() {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, raw []byte) { agree(t, raw) })
}

// BenchmarkDecodeObservation compares DecodeJSON with encoding/json on one
// Observation, decoded into the elements halite reads as the mapping does.
func BenchmarkDecodeObservation(b *testing.B) {
	raw := obsSpec{id: "o1", code: "2951-2", effective: dt("2026-11-20T07:00:00Z"), value: vq("131", "mmol/L")}.raw()
	for name, decode := range map[string]func([]byte, any) error{"DecodeJSON": DecodeJSON, "encoding-json": json.Unmarshal} {
		b.Run(name, func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				var o observationFields
				if err := decode(raw, &o); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
