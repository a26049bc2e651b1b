package fhirmap

import (
	"encoding/json"
	"reflect"

	gojson "github.com/goccy/go-json"
)

// DecodeJSON decodes raw into v, which must be a non-nil pointer. It uses
// goccy/go-json, about three times faster than encoding/json on FHIR
// resources (BenchmarkDecodeObservation), for the common case of valid
// input; when that fails, v is reset and decoded again with encoding/json,
// so every error — its type, field and message — is the standard
// library's. FuzzDecodeJSONAgrees checks that the two accept the same
// inputs and decode them to the same values.
func DecodeJSON(raw []byte, v any) error {
	if gojson.Unmarshal(raw, v) == nil {
		return nil
	}
	reflect.ValueOf(v).Elem().SetZero()
	return json.Unmarshal(raw, v)
}
