package hooks

import (
	"context"
	"encoding/json"
	"strings"

	"github.com/halite-cds/halite/fhirmap"
)

// maxMedicationFetches bounds the Medication reads one call may make.
const maxMedicationFetches = 20

// medicationRefs returns the ids of the Medications that the
// MedicationRequests among raws reference by "Medication/{id}" (relative or
// absolute), in order of first appearance.
func medicationRefs(raws []json.RawMessage) []string {
	var ids []string
	seen := map[string]bool{}
	for _, raw := range raws {
		var mr struct {
			ResourceType        string `json:"resourceType"`
			MedicationReference *struct {
				Reference string `json:"reference"`
			} `json:"medicationReference"`
		}
		if fhirmap.DecodeJSON(raw, &mr) != nil || mr.ResourceType != "MedicationRequest" || mr.MedicationReference == nil {
			continue
		}
		parts := strings.Split(mr.MedicationReference.Reference, "/")
		if len(parts) < 2 || parts[len(parts)-2] != "Medication" {
			continue
		}
		id := parts[len(parts)-1]
		if fhirID.MatchString(id) && !seen[id] {
			seen[id] = true
			ids = append(ids, id)
		}
	}
	return ids
}

// resourceIDs returns the ids of the resources of type typ among raws.
func resourceIDs(typ string, raws []json.RawMessage) map[string]bool {
	out := map[string]bool{}
	for _, raw := range raws {
		var h struct {
			ResourceType string `json:"resourceType"`
			ID           string `json:"id"`
		}
		if fhirmap.DecodeJSON(raw, &h) == nil && h.ResourceType == typ {
			out[h.ID] = true
		}
	}
	return out
}

// fetchMedications reads the Medications that orders reference but the data
// does not hold. CDS Hooks prefetch cannot ask for them (no _include in the
// restricted syntax), so they are read one by one from fhirServer. A failed
// read leaves the reference unresolved, which mapping reports.
func fetchMedications(ctx context.Context, fetch Fetcher, have []json.RawMessage) []json.RawMessage {
	if fetch == nil {
		return nil
	}
	held := resourceIDs("Medication", have)
	var out []json.RawMessage
	n := 0
	for _, id := range medicationRefs(have) {
		if held[id] || n == maxMedicationFetches {
			continue
		}
		n++
		if body, err := fetch.Fetch(ctx, "Medication/"+id); err == nil {
			out = append(out, body)
		}
	}
	return out
}
