package hooks

import (
	"context"
	"testing"

	"github.com/google/uuid"
)

// TestRecordIDsAreTimeOrdered: card and suggestion uuids are RFC 9562
// version 7 (§5.7) with the RFC 4122 variant, distinct, and those of a
// later response sort after those of an earlier one, as the card log's
// key index relies on.
func TestRecordIDsAreTimeOrdered(t *testing.T) {
	e := testEngine(t, nil)
	svc := mustService(t, "sodium-drug-risk")
	req, _ := loadRequest(t, svc, 60)
	body := mustMarshal(t, req)
	seen := map[string]bool{}
	var last string
	for range 3 {
		out, err := e.Handle(context.Background(), svc.ID, body, scenarioAt)
		if err != nil {
			t.Fatal(err)
		}
		var ids []string
		for _, c := range out.Response.Cards {
			ids = append(ids, c.UUID)
			for _, s := range c.Suggestions {
				ids = append(ids, s.UUID)
			}
		}
		if len(ids) < 2 {
			t.Fatalf("%d ids; the load patient should get cards with suggestions", len(ids))
		}
		first := ids[0]
		for _, id := range ids {
			u, err := uuid.Parse(id)
			if err != nil || u.Version() != 7 || u.Variant() != uuid.RFC4122 {
				t.Errorf("%s: version %d, variant %v, err %v; want version 7, RFC 4122 variant", id, u.Version(), u.Variant(), err)
			}
			if seen[id] {
				t.Errorf("%s given twice", id)
			}
			seen[id] = true
			if id < first {
				first = id
			}
		}
		if first <= last {
			t.Errorf("response ids start at %s, not after the previous response's %s", first, last)
		}
		for _, id := range ids {
			last = max(last, id)
		}
	}
}
