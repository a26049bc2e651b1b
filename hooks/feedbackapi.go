package hooks

import (
	"encoding/json"
	"errors"
	"fmt"
	"time"
)

// feedbackBody is the CDS Hooks 2.0 feedback request.
type feedbackBody struct {
	Feedback []struct {
		Card                string `json:"card"`
		Outcome             string `json:"outcome"`
		AcceptedSuggestions []struct {
			ID string `json:"id"`
		} `json:"acceptedSuggestions"`
		OverrideReason *struct {
			Reason      *Coding `json:"reason"`
			UserComment string  `json:"userComment"`
		} `json:"overrideReason"`
		OutcomeTimestamp string `json:"outcomeTimestamp"`
	} `json:"feedback"`
}

// MaxFeedbackEntries bounds one feedback call, whose entries are stored
// in one transaction: an EHR reports the outcomes of one response's cards.
const MaxFeedbackEntries = 256

// DecodeFeedback validates a feedback body for service and returns its
// entries; a bad entry is a 400 naming the field (feedback[i].outcome).
func DecodeFeedback(service string, body []byte) ([]CardOutcome, error) {
	var b feedbackBody
	if err := json.Unmarshal(body, &b); err != nil {
		field := jsonField(err)
		if field == "" {
			field = "body"
		}
		return nil, badRequest(field, "is not valid: %s", jsonProblem(err))
	}
	if len(b.Feedback) == 0 {
		return nil, badRequest("feedback", "must be a non-empty array")
	}
	if len(b.Feedback) > MaxFeedbackEntries {
		return nil, badRequest("feedback", "has %d entries; at most %d are taken in one call", len(b.Feedback), MaxFeedbackEntries)
	}
	out := make([]CardOutcome, 0, len(b.Feedback))
	for i, f := range b.Feedback {
		at := func(name string) string { return fmt.Sprintf("feedback[%d].%s", i, name) }
		o := CardOutcome{Card: f.Card, Service: service, Outcome: f.Outcome}
		if f.Card == "" {
			return nil, badRequest(at("card"), "is required (the card's uuid)")
		}
		switch f.Outcome {
		case "accepted":
			if len(f.AcceptedSuggestions) == 0 {
				return nil, badRequest(at("acceptedSuggestions"), "is required when the outcome is accepted")
			}
			for j, s := range f.AcceptedSuggestions {
				if s.ID == "" {
					return nil, badRequest(fmt.Sprintf("feedback[%d].acceptedSuggestions[%d].id", i, j), "is required")
				}
				o.AcceptedSuggestions = append(o.AcceptedSuggestions, s.ID)
			}
		case "overridden":
		default:
			return nil, badRequest(at("outcome"), "must be accepted or overridden")
		}
		if r := f.OverrideReason; r != nil {
			if f.Outcome != "overridden" {
				return nil, badRequest(at("overrideReason"), "is only for an overridden card")
			}
			if r.Reason == nil && r.UserComment == "" {
				return nil, badRequest(at("overrideReason"), "needs a reason or a userComment")
			}
			if r.Reason != nil {
				if r.Reason.System == "" || r.Reason.Code == "" {
					return nil, badRequest(at("overrideReason.reason"), "needs a system and a code")
				}
				o.ReasonSystem, o.ReasonCode = r.Reason.System, r.Reason.Code
			}
			o.UserComment = r.UserComment
		}
		t, err := time.Parse(time.RFC3339, f.OutcomeTimestamp)
		if err != nil {
			return nil, badRequest(at("outcomeTimestamp"), "is required as an RFC 3339 time")
		}
		o.OutcomeAt = t
		out = append(out, o)
	}
	return out, nil
}

// feedbackError maps a Recorder's refusal to a 400 naming the entry, and
// any other failure to 503.
func feedbackError(err error) error {
	var oe *OutcomeError
	i := 0
	if errors.As(err, &oe) {
		i = oe.Index
	}
	switch {
	case errors.Is(err, ErrUnknownCard):
		return badRequest(fmt.Sprintf("feedback[%d].card", i), "is not a card this service returned to this caller")
	case errors.Is(err, ErrUnknownSuggestion):
		return badRequest(fmt.Sprintf("feedback[%d].acceptedSuggestions", i), "names a suggestion this card did not offer")
	}
	return storeError(err, "feedback could not be stored")
}
