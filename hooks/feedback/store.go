// Package feedback keeps the durable card log and the EHR's feedback on
// cards (CDS Hooks 2.0 feedback), so a committee can see which advice is
// accepted and why it is overridden. Patients appear only as a keyed hash.
package feedback

import (
	"context"
	"errors"
	"time"
)

// CardRecord is one card returned to an EHR.
type CardRecord struct {
	UUID, Service, Rule, Indicator, Ruleset, Tenant string
	// PatientHash is the keyed hash of the patient reference, never the
	// reference itself.
	PatientHash string
	At          time.Time
	Figures     map[string]float64
	Suggestions []string // suggestion uuids
}

// Outcomes a card can have.
const (
	Accepted   = "accepted"
	Overridden = "overridden"
)

// FeedbackRecord is one outcome the EHR reported for a card.
type FeedbackRecord struct {
	Card, Service, Outcome string
	AcceptedSuggestions    []string
	ReasonSystem           string
	ReasonCode             string
	UserComment            string
	OutcomeAt              time.Time
}

// Errors of RecordFeedback.
var (
	ErrUnknownCard       = errors.New("no card with this uuid was returned by this service")
	ErrUnknownSuggestion = errors.New("an accepted suggestion is not one of the card's")
)

// Store is the card log and feedback record. Implementations write
// durably before returning: a nil error means the record survives a crash.
type Store interface {
	// LogCards records the cards of one response.
	LogCards(ctx context.Context, cards []CardRecord) error
	// RecordFeedback records one outcome; a repeat of the same card,
	// outcome and time is accepted and stored once.
	RecordFeedback(ctx context.Context, f FeedbackRecord) error
	// Purge deletes cards (and their feedback) logged before t.
	Purge(ctx context.Context, before time.Time) (int64, error)
	// Report summarises the cards logged in [from, to) and their outcomes.
	Report(ctx context.Context, from, to time.Time) (Report, error)
	// Counts reports how many cards and feedback records are held.
	Counts(ctx context.Context) (cards, feedback int64, err error)
	Close() error
}
