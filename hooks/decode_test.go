package hooks

import (
	"encoding/json"
	"os"
	"path/filepath"
	"reflect"
	"testing"
	"unicode/utf8"

	"github.com/halite-cds/halite/fhirmap"
)

// requestAgrees fails t unless fhirmap.DecodeJSON and encoding/json give
// the same outcome for raw as a Request and as a HookContext.
func requestAgrees(t *testing.T, raw []byte) {
	t.Helper()
	for name, mk := range map[string]func() any{"Request": func() any { return new(Request) }, "HookContext": func() any { return new(HookContext) }} {
		fast, std := mk(), mk()
		errFast, errStd := fhirmap.DecodeJSON(raw, fast), json.Unmarshal(raw, std)
		if (errFast == nil) != (errStd == nil) {
			t.Fatalf("%s: DecodeJSON error %v, encoding/json error %v", name, errFast, errStd)
		}
		if errFast == nil && utf8.Valid(raw) && !reflect.DeepEqual(fast, std) {
			t.Fatalf("%s: DecodeJSON %+v, encoding/json %+v", name, fast, std)
		}
	}
}

func requestSeeds(t testing.TB) [][]byte {
	demo, err := os.ReadFile(filepath.Join("..", "testdata", "demo", "order-sign-request.json"))
	if err != nil {
		t.Fatal(err)
	}
	return [][]byte{demo,
		[]byte(`{"hook":"order-sign","hookInstance":"x","context":{"userId":"Practitioner/1","patientId":"p","draftOrders":{"resourceType":"Bundle"}},"prefetch":{"a":null,"b":{"resourceType":"Patient"}}}`),
		[]byte(`{"hook":1}`),
		[]byte(`{"fhirAuthorization":{"expires_in":"300"}}`),
		[]byte(`{"fhirAuthorization":{"expires_in":3.5}}`),
		[]byte(`{"prefetch":[]}`),
		[]byte(`{"hook":"a"}{"hook":"b"}`),
	}
}

// TestRequestDecodeAgrees: the request decoder matches encoding/json on
// the demo request and on mistyped ones (same values, same errors).
func TestRequestDecodeAgrees(t *testing.T) {
	for _, raw := range requestSeeds(t) {
		requestAgrees(t, raw)
	}
}

// FuzzRequestDecodeAgrees: on any body, the request decoder accepts what
// encoding/json accepts and gives the same values.
func FuzzRequestDecodeAgrees(f *testing.F) {
	for _, s := range requestSeeds(f) {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, raw []byte) { requestAgrees(t, raw) })
}
