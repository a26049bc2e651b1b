package rules

import (
	"testing"
	"time"
)

// benchFacts is an invented order-sign call: 60 sodium results over 5 days,
// potassium, glucose and urea, a weight, and three selected drafts (3% saline
// over the limit, 0.9% saline, tolvaptan).
func benchFacts(b *testing.B) Facts {
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	birth := time.Date(1970, 1, 1, 0, 0, 0, 0, time.UTC)
	f := Facts{At: at, Patient: Patient{BirthDate: &birth, Sex: SexFemale}, Labs: map[Analyte][]Measurement{}}
	for i := 0; i < 60; i++ {
		f.Labs[Sodium] = append(f.Labs[Sodium], Measurement{Analyte: Sodium, Value: 110 + float64(i)/6,
			At: at.Add(-time.Duration(118-2*i) * time.Hour), Source: "Observation/na"})
	}
	f.Labs[Potassium] = []Measurement{{Analyte: Potassium, Value: 3.9, At: at.Add(-3 * time.Hour)}}
	f.Labs[Glucose] = []Measurement{{Analyte: Glucose, Value: 7, At: at.Add(-3 * time.Hour)}}
	f.Labs[Urea] = []Measurement{{Analyte: Urea, Value: 6, At: at.Add(-3 * time.Hour)}}
	f.Labs[BodyWeight] = []Measurement{{Analyte: BodyWeight, Value: 70, At: at.Add(-20 * time.Hour)}}
	r1, r2 := 40.0, 100.0
	f.DraftOrders = []MedicationOrder{
		{Reference: "MedicationRequest/a", Medication: Medication{Text: "3% saline"}, RateMlPerHour: &r1, Selected: true},
		{Reference: "MedicationRequest/b", Medication: Medication{Codings: []Coding{{System: SystemRxNorm, Code: "1807639"}}}, RateMlPerHour: &r2, Selected: true},
		{Reference: "MedicationRequest/c", Medication: Medication{Text: "tolvaptan 15 mg tablet"}, Selected: true},
	}
	return f
}

// BenchmarkEvaluate measures the infusion check's rule evaluation alone.
func BenchmarkEvaluate(b *testing.B) {
	rs, err := Load()
	if err != nil {
		b.Fatal(err)
	}
	f := benchFacts(b)
	if n := len(rs.Evaluate(InfusionCheck, f)); n != 2 {
		b.Fatalf("%d findings, want 2 (3%% over the limit, tolvaptan)", n)
	}
	b.ReportAllocs()
	for b.Loop() {
		rs.Evaluate(InfusionCheck, f)
	}
}

// BenchmarkMatchDrug matches one product-coded order, then one named only
// in text (the slowest path: every name of the knowledge base), against the
// whole knowledge base.
func BenchmarkMatchDrug(b *testing.B) {
	rs, err := Load()
	if err != nil {
		b.Fatal(err)
	}
	coded := Medication{Codings: []Coding{{System: SystemRxNorm, Code: "200371"}}}
	named := Medication{Text: "escitalopram 10 mg tablet, take one daily"}
	if len(rs.MatchDrug(coded)) != 1 || len(rs.MatchDrug(named)) != 1 {
		b.Fatal("benchmark orders did not match")
	}
	b.Run("product code", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			rs.MatchDrug(coded)
		}
	})
	b.Run("name", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			rs.MatchDrug(named)
		}
	})
}

// BenchmarkEvaluateDrugRisk: the drug-risk check on the same call with 20
// active medications (a mix of coded and named, some risk drugs).
func BenchmarkEvaluateDrugRisk(b *testing.B) {
	rs, err := Load()
	if err != nil {
		b.Fatal(err)
	}
	f := benchFacts(b)
	names := []string{"omeprazole", "metformin", "amlodipine", "atorvastatin", "hydrochlorothiazide"}
	for i := 0; i < 20; i++ {
		f.Medications = append(f.Medications, MedicationOrder{Reference: "MedicationRequest/m", Status: "active",
			Medication: Medication{Text: names[i%len(names)] + " tablet"}})
	}
	f.DraftOrders = append(f.DraftOrders, MedicationOrder{Reference: "MedicationRequest/s", Status: "draft", Selected: true,
		Medication: Medication{Codings: []Coding{{System: SystemRxNorm, Code: "200371"}}}})
	if n := len(rs.Evaluate(DrugRisk, f)); n != 1 {
		b.Fatalf("%d findings, want 1 (citalopram)", n)
	}
	b.ReportAllocs()
	for b.Loop() {
		rs.Evaluate(DrugRisk, f)
	}
}
