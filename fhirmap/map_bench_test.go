package fhirmap

import (
	"encoding/json"
	"fmt"
	"testing"
	"time"
)

func BenchmarkMap200(b *testing.B) {
	// 200 Observations cycling through sodium, potassium, glucose and weight,
	// one per 15 minutes back from the evaluation time, and 20 MedicationRequests.
	// Values are invented and inside the policy bounds (rules/data/policy.json).
	kinds := []struct{ code, unit, value string }{
		{"2951-2", "mmol/L", "131"}, // sodium
		{"2823-3", "mmol/L", "4.1"}, // potassium
		{"2345-7", "mg/dL", "110"},  // glucose
		{"29463-7", "kg", "70"},     // weight
	}
	in := Input{At: testAt, PatientID: testPatient,
		Patient: json.RawMessage(`{"resourceType":"Patient","id":"p1","gender":"female","birthDate":"1980-11-20"}`)}
	for i := 0; i < 200; i++ {
		k := kinds[i%len(kinds)]
		at := testAt.Add(-time.Duration(i+1) * 15 * time.Minute).Format(time.RFC3339)
		in.Entries = append(in.Entries, BundleEntry{Resource: obsSpec{id: fmt.Sprintf("o%d", i), code: k.code, effective: dt(at), value: vq(k.value, k.unit)}.raw()})
	}
	for i := 0; i < 20; i++ {
		dosage := `"dosageInstruction":[{"timing":{"repeat":{"boundsDuration":{"value":8,"code":"h"}}},"doseAndRate":[{"rateQuantity":{"value":75,"unit":"mL/h","system":"http://unitsofmeasure.org","code":"mL/h"}}]}]`
		if i%2 == 0 {
			in.Entries = append(in.Entries, BundleEntry{Resource: mr(fmt.Sprintf("a%d", i), "active", nsConcept+","+dosage)})
		} else {
			in.DraftEntries = append(in.DraftEntries, BundleEntry{Resource: mr(fmt.Sprintf("d%d", i), "draft", nsConcept+","+dosage)})
		}
	}
	rs := ruleset(b)
	// Sanity check outside the timer: everything is read.
	if f := Map(in, rs); len(f.Rejected) != 0 || len(f.Medications) != 10 || len(f.DraftOrders) != 10 {
		b.Fatalf("setup: %d rejected, %d medications, %d drafts", len(f.Rejected), len(f.Medications), len(f.DraftOrders))
	}
	b.ReportAllocs()
	b.ResetTimer()
	for b.Loop() {
		Map(in, rs)
	}
}

// BenchmarkMapObservations maps 60, 600 and 6,000 Observations (sodium,
// potassium, glucose and weight in turn, one a minute back from the
// evaluation time; invented values inside the policy bounds), to show the
// cost curve: time per Observation should stay flat (no quadratic step).
func BenchmarkMapObservations(b *testing.B) {
	kinds := []struct{ code, unit, value string }{
		{"2951-2", "mmol/L", "131"}, {"2823-3", "mmol/L", "4.1"}, {"2345-7", "mg/dL", "110"}, {"29463-7", "kg", "70"},
	}
	rs := ruleset(b)
	for _, n := range []int{60, 600, 6000} {
		in := Input{At: testAt, PatientID: testPatient,
			Patient: json.RawMessage(`{"resourceType":"Patient","id":"p1","gender":"female","birthDate":"1980-11-20"}`)}
		for i := 0; i < n; i++ {
			k := kinds[i%len(kinds)]
			at := testAt.Add(-time.Duration(i+1) * time.Minute).Format(time.RFC3339)
			in.Entries = append(in.Entries, BundleEntry{Resource: obsSpec{id: fmt.Sprintf("o%d", i), code: k.code, effective: dt(at), value: vq(k.value, k.unit)}.raw()})
		}
		if f := Map(in, rs); len(f.Rejected) != 0 {
			b.Fatalf("setup: %d rejected", len(f.Rejected))
		}
		b.Run(fmt.Sprint(n), func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				Map(in, rs)
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(n), "ns/observation")
		})
	}
}
