package hooks

import (
	"context"
	"encoding/json"

	"github.com/halite-cds/halite/fhirmap"
)

// maxMedicationFetches bounds the Medication reads one call may make.
const maxMedicationFetches = 20

// medicationRefs resolves the medicationReference of each MedicationRequest
// among rs with refs, and returns the Medications they reference, in order
// of first appearance and once each. Unresolvable and contained references
// are left out; mapping reports them.
func medicationRefs(refs *fhirmap.References, rs []fhirmap.Resource) []fhirmap.Target {
	var out []fhirmap.Target
	seen := map[string]bool{}
	for _, r := range rs {
		if r.Type != "MedicationRequest" {
			continue
		}
		var mr struct {
			MedicationReference *struct {
				Reference string `json:"reference"`
			} `json:"medicationReference"`
		}
		if fhirmap.DecodeJSON(r.Raw, &mr) != nil || mr.MedicationReference == nil {
			continue
		}
		t, err := refs.Resolve(mr.MedicationReference.Reference, r)
		if err != nil || t.Contained || t.Type != "Medication" || seen[t.Ref()] {
			continue
		}
		seen[t.Ref()] = true
		out = append(out, t)
	}
	return out
}

// readEntries reads the resources of es; those that are not FHIR resources
// are left out (mapping reports them).
func readEntries(es ...[]fhirmap.BundleEntry) []fhirmap.Resource {
	var out []fhirmap.Resource
	for _, list := range es {
		for _, e := range list {
			if r, err := fhirmap.ReadEntry(e); err == nil {
				out = append(out, r)
			}
		}
	}
	return out
}

// fetchMedications returns in.Resources with the Medications that orders
// reference but the data does not hold. CDS Hooks prefetch cannot ask for
// them (no _include in the restricted syntax), so they are read one by one
// from fhirServer, by a reference relative to it or on it. A failed read
// leaves the reference unresolved, which mapping reports.
func fetchMedications(ctx context.Context, fetch Fetcher, in fhirmap.Input) []json.RawMessage {
	if fetch == nil {
		return in.Resources
	}
	var drafts []fhirmap.BundleEntry
	for _, raw := range in.DraftOrders {
		drafts = append(drafts, fhirmap.BundleEntry{Resource: raw})
	}
	var have []fhirmap.BundleEntry
	for _, raw := range in.Resources {
		have = append(have, fhirmap.BundleEntry{Resource: raw})
	}
	rs := readEntries(have, in.Entries, drafts, in.DraftEntries)
	out := in.Resources
	n := 0
	for _, t := range medicationRefs(fhirmap.NewReferences(in.Server, rs), rs) {
		if t.Held() || n == maxMedicationFetches {
			continue
		}
		n++
		if body, err := fetch.Fetch(ctx, t.Ref()); err == nil {
			out = append(out, body)
		}
	}
	return out
}
