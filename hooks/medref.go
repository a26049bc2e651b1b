package hooks

import (
	"context"

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

// fetchMedications returns in.Entries with the Medications that orders
// reference but the data does not hold. CDS Hooks prefetch cannot ask for
// them (no _include in the restricted syntax), so they are read one by one
// from fhirServer, by a reference relative to it or on it. A failed read
// leaves the reference unresolved, which mapping reports.
func fetchMedications(ctx context.Context, fetch Fetcher, in fhirmap.Input) []fhirmap.BundleEntry {
	if fetch == nil {
		return in.Entries
	}
	ctx = withPrefetchKey(ctx, keyMedications)
	rs := readEntries(in.Entries, in.DraftEntries)
	out := in.Entries
	n := 0
	for _, t := range medicationRefs(fhirmap.NewReferences(in.Server, rs), rs) {
		if t.Held() || n == maxMedicationFetches {
			continue
		}
		n++
		if body, err := fetch.Fetch(ctx, t.Ref()); err == nil {
			out = append(out, fhirmap.BundleEntry{Resource: body})
		}
	}
	return out
}
