package rules

import (
	"testing"
	"time"
)

// TestVolume24h on invented orders: the arithmetic is the definition of
// the quantities (rate × hours, dose × count), so expectations are derived.
func TestVolume24h(t *testing.T) {
	f := func(v float64) *float64 { return &v }
	i := func(v int) *int { return &v }
	q := func(v float64, u string) *Quantity { return &Quantity{Value: v, Unit: u} }
	at := time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC)
	sixHours, past := at.Add(6*time.Hour), at.Add(-time.Hour)
	for _, tc := range []struct {
		name  string
		o     MedicationOrder
		want  float64
		known bool
	}{
		{"25 mL/h for 24 h", MedicationOrder{RateMlPerHour: f(25)}, 0.6, true},
		{"25 mL/h bounded to 20 h", MedicationOrder{RateMlPerHour: f(25), Bounds: q(20, "h")}, 0.5, true},
		{"420 mL/h for 1 h", MedicationOrder{RateMlPerHour: f(420), Bounds: q(1, "h")}, 0.42, true},
		// One dispense (a 1 L bag) is not a stop: bags are replaced (issue 19).
		{"100 mL/h, 1 L dispensed", MedicationOrder{RateMlPerHour: f(100), DispenseQuantity: q(1, "L")}, 2.4, true},
		{"100 mL/h ending in 6 h", MedicationOrder{RateMlPerHour: f(100), EndsAt: &sixHours}, 0.6, true},
		{"100 mL/h that has ended", MedicationOrder{RateMlPerHour: f(100), EndsAt: &past}, 0, true},
		{"150 mL bolus once", MedicationOrder{Dose: q(150, "mL"), Duration: q(20, "min")}, 0.15, true},
		{"100 mL every 6 h", MedicationOrder{Dose: q(100, "mL"), Frequency: i(1), Period: q(6, "h")}, 0.4, true},
		{"oral 50 mg: no volume", MedicationOrder{Dose: q(50, "mg")}, 0, false},
		{"nothing said", MedicationOrder{}, 0, false},
		{"negative rate", MedicationOrder{RateMlPerHour: f(-2000)}, 0, false},
		{"zero dose", MedicationOrder{Dose: q(0, "mL")}, 0, false},
		{"a dispense does not cap a dose either", MedicationOrder{Dose: q(500, "mL"), Frequency: i(1), Period: q(8, "h"), DispenseQuantity: q(500, "mL")}, 1.5, true},
	} {
		got, basis, ok := Volume24h(tc.o, at)
		if ok != tc.known || !near(got, tc.want, 1e-9) || (ok && basis == "") {
			t.Errorf("%s: %v L (%q) %v, want %v L %v", tc.name, got, basis, ok, tc.want, tc.known)
		}
	}
}
