package fhirmap

import (
	"encoding/json"
	"testing"
	"time"
)

// TestMapProcedures: completed procedures of the patient are read with
// their codes and performed time (dateTime, or a period's start); others
// are counted as unused with their reason, and another patient's refused.
func TestMapProcedures(t *testing.T) {
	proc := func(id, status, subject, performed string) json.RawMessage {
		return json.RawMessage(`{"resourceType":"Procedure","id":"` + id + `","status":"` + status + `",` +
			`"code":{"coding":[{"system":"http://snomed.info/sct","code":"45368001"}]},"subject":{"reference":"Patient/` + subject + `"}` +
			performed + `}`)
	}
	in := Input{At: testAt, PatientID: testPatient, Entries: raws(
		proc("done", "completed", testPatient, `,"performedDateTime":"2026-11-13T09:00:00Z"`),
		proc("period", "completed", testPatient, `,"performedPeriod":{"start":"2026-11-14"}`),
		proc("planned", "preparation", testPatient, `,"performedDateTime":"2026-11-21T09:00:00Z"`),
		proc("undated", "completed", testPatient, ``),
		proc("other", "completed", "p2", `,"performedDateTime":"2026-11-13T09:00:00Z"`),
	)}
	f := Map(in, ruleset(t))
	if len(f.Procedures) != 2 || f.Procedures[0].Reference != "Procedure/done" || !f.Procedures[0].At.Equal(time.Date(2026, 11, 13, 9, 0, 0, 0, time.UTC)) ||
		f.Procedures[0].Codings[0].Code != "45368001" || !f.Procedures[1].At.Equal(time.Date(2026, 11, 14, 0, 0, 0, 0, time.UTC)) {
		t.Fatalf("procedures %+v", f.Procedures)
	}
	reasons := map[string]string{}
	for _, r := range f.Rejected {
		reasons[r.Reason] = r.Source
	}
	for reason, source := range map[string]string{"subject is not the patient in context": "Procedure/other",
		"no performed time": "1 × Procedure", `status "preparation" is not completed`: "1 × Procedure"} {
		if reasons[reason] != source {
			t.Errorf("no %q for %s: %+v", reason, source, f.Rejected)
		}
	}
}
