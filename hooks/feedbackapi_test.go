package hooks

import (
	"errors"
	"fmt"
	"strings"
	"testing"
)

// TestDecodeFeedbackEntryLimit: up to MaxFeedbackEntries entries are
// taken in one call; one more is a 400 naming the feedback array.
func TestDecodeFeedbackEntryLimit(t *testing.T) {
	body := func(n int) []byte {
		entries := make([]string, n)
		for i := range entries {
			entries[i] = fmt.Sprintf(`{"card":"c%d","outcome":"overridden","outcomeTimestamp":"2026-12-02T10:00:00Z"}`, i)
		}
		return []byte(`{"feedback":[` + strings.Join(entries, ",") + `]}`)
	}
	if got, err := DecodeFeedback("sodium-drug-risk", body(MaxFeedbackEntries)); err != nil || len(got) != MaxFeedbackEntries {
		t.Fatalf("%d entries: %d decoded, %v", MaxFeedbackEntries, len(got), err)
	}
	_, err := DecodeFeedback("sodium-drug-risk", body(MaxFeedbackEntries+1))
	var e *Error
	if !errors.As(err, &e) || e.Kind != KindBadRequest || e.Field != "feedback" {
		t.Errorf("%d entries: %v; want a 400 naming feedback", MaxFeedbackEntries+1, err)
	}
}
