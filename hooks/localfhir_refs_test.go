package hooks

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/halite-cds/halite/fhirmap"
)

// TestBundleStoreURNReferences searches a transaction Bundle whose entries
// reference the Patient by urn:uuid: patient= and subject= find them, and
// the results carry the relative reference.
func TestBundleStoreURNReferences(t *testing.T) {
	data, err := os.ReadFile(filepath.Join("..", "testdata", "bundles", "transaction-urn-uuid.json"))
	if err != nil {
		t.Fatal(err)
	}
	b, err := fhirmap.ParseBundle(data)
	if err != nil {
		t.Fatal(err)
	}
	const pt = "881de823-fcc9-55a3-8309-131c209c38a0" // the Patient's urn:uuid; it has no id
	s := NewBundleStore(b)
	for _, tc := range []struct {
		query string
		total int
	}{
		{"Observation?patient=" + pt + "&code=http://loinc.org|2951-2", 4},
		{"Observation?subject=Patient/" + pt, 6},
		{"MedicationRequest?patient=" + pt, 2}, // the order and the Medication it references
		{"Encounter?patient=" + pt, 1},
		{"Observation?patient=someone-else", 0},
	} {
		raw, err := s.Query(tc.query)
		if err != nil {
			t.Fatalf("%s: %v", tc.query, err)
		}
		var got struct {
			Total int `json:"total"`
			Entry []struct {
				Resource json.RawMessage `json:"resource"`
			} `json:"entry"`
		}
		if err := json.Unmarshal(raw, &got); err != nil || got.Total != tc.total {
			t.Errorf("%s: total %d (%v), want %d", tc.query, got.Total, err, tc.total)
		}
		for _, e := range got.Entry {
			if strings.Contains(string(e.Resource), "urn:uuid:") {
				t.Errorf("%s: result keeps a urn:uuid reference: %s", tc.query, e.Resource)
			}
		}
	}
	if raw, err := s.Query("Patient/" + pt); err != nil || !strings.Contains(string(raw), `"id":"`+pt+`"`) {
		t.Errorf("read Patient/%s: %s %v, want the Patient with its urn:uuid as id", pt, raw, err)
	}
	if linked, other := PatientLinks(b, pt); linked != 8 || other != 0 {
		t.Errorf("PatientLinks = %d, %d; want 8 linked (6 Observations, the order, the Encounter)", linked, other)
	}
}
