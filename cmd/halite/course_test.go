package main

import (
	"bytes"
	"context"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestPostPituitaryCourse evaluates scenario 52 (pituitary surgery on
// 2026-11-10, invented) on several days, as the chart would be opened
// through the course, and checks the phase each card reads — the
// triphasic sequence of the review literature (polyuria in the first days,
// water retention about days 5 to 10, then diabetes insipidus that may last:
// Almalki MH et al., Sultan Qaboos Univ Med J 2021; Khardori R, Medscape
// 2020) — and the critical card for desmopressin continued into the
// retention phase. The figures are worked in testdata/scenarios/README.md.
func TestPostPituitaryCourse(t *testing.T) {
	file := filepath.Join("..", "..", "testdata", "scenarios", "52-ten-days-after-pituitary-surgery.json")
	raw, err := os.ReadFile(file)
	if err != nil {
		t.Fatal(err)
	}
	// The same chart with the oral desmopressin order still active.
	active := filepath.Join(t.TempDir(), "active.json")
	stopped := []byte(`"id": "mr-bramble-ddavp-oral",
        "status": "stopped"`)
	if !bytes.Contains(raw, stopped) {
		t.Fatal("scenario 52 no longer holds the stopped desmopressin order")
	}
	if err := os.WriteFile(active, bytes.Replace(raw, stopped, []byte(`"id": "mr-bramble-ddavp-oral",
        "status": "active"`), 1), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name, file, at string
		want           []string
	}{
		// Day 1: sodium 140 → 145 (+5 in 24 h), urine 130 mOsm/kg, 360, 350
		// and 340 mL in the last three hours (all above 300 mL/h).
		{"day 1", file, "2026-11-11T07:00:00Z", []string{"Dilute urine (130 mOsm/kg) and polyuria with sodium rising 5.0 in 24 h to 145",
			"first, polyuric phase"}},
		// Day 7: sodium 136 → 133 (below 135; the 24-h fall, from 135.75
		// interpolated at the window's start, is 2.75 < 3), urine 560 mOsm/kg and sodium 58; effective
		// osmolality 2 × 133 + 5.4 = 271.4 < 275.
		{"day 7", file, "2026-11-17T08:00:00Z", []string{"Labs consistent with the SIADH criteria: effective osmolality 271",
			"fits the second phase, water retention", "desmopressin doses given since: 3"}},
		{"day 7, desmopressin still ordered", active, "2026-11-17T08:00:00Z", []string{
			"Desmopressin on day 7 after pituitary surgery, sodium 133: the water-retention phase may have begun", `"indicator": "critical"`, "fits the second phase"}},
		// Day 10: sodium 138 → 146, urine 140 mOsm/kg, 320-340 mL/h, after
		// the 133 of day 7.
		{"day 10", file, "2026-11-20T08:00:00Z", []string{"Dilute urine (140 mOsm/kg) with sodium 146",
			"after a sodium of 133 on 2026-11-17, fits the third phase"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var out, errOut bytes.Buffer
			err := run(context.Background(), []string{"eval", "--hook", "patient-view", "--at", tc.at, "--json", tc.file}, &out, &errOut)
			var ex *exitError
			if err != nil && !errors.As(err, &ex) {
				t.Fatalf("eval: %v %s", err, errOut.String())
			}
			for _, w := range tc.want {
				if !strings.Contains(out.String(), w) {
					t.Errorf("output lacks %q:\n%s", w, out.String())
				}
			}
		})
	}
}
