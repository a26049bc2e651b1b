// Package feedback keeps the durable card log and the EHR's feedback on
// cards (CDS Hooks 2.0 feedback), so a committee can see which advice is
// accepted and why it is overridden. Patients appear only as a keyed hash.
package feedback

import (
	"context"
	"errors"
	"fmt"
	"time"
)

// CardRecord is one card returned to an EHR.
type CardRecord struct {
	UUID, Service, Rule, Indicator, Ruleset string
	// Issuer and Tenant are the authenticated caller's; feedback on the
	// card is taken only from the same caller.
	Issuer, Tenant string
	// PatientHash is the keyed hash of the patient reference, never the
	// reference itself.
	PatientHash string
	At          time.Time
	Figures     map[string]float64
	Suggestions []string // suggestion uuids
	// Moment is when the card was found: "select", "sign" or "chart".
	Moment string
	// Subject and Draft are keyed hashes of the card's product and draft
	// order ("" when it has none).
	Subject, Draft string
	// Suppressed, when set, is why the finding was held back: the record
	// counts it, but it was never returned and takes no feedback.
	Suppressed string
}

// PriorQuery selects the cards shown to one caller for one patient by one
// service from Since up to and including Until.
type PriorQuery struct {
	Service, Issuer, Tenant, PatientHash string
	Since, Until                         time.Time
}

// PriorCard is a card shown earlier, with the time of the latest override
// that gave a reason (zero when none did).
type PriorCard struct {
	Rule, Moment, Subject, Draft, Indicator string
	Figures                                 map[string]float64
	At, OverriddenAt                        time.Time
}

// MaxPriorCards bounds what one PriorCards lookup returns.
const MaxPriorCards = 200

// Outcomes a card can have.
const (
	Accepted   = "accepted"
	Overridden = "overridden"
)

// FeedbackRecord is one outcome the EHR reported for a card.
type FeedbackRecord struct {
	Card, Service, Outcome string
	// Issuer and Tenant are the caller's, matched against the card's.
	Issuer, Tenant      string
	AcceptedSuggestions []string
	ReasonSystem        string
	ReasonCode          string
	UserComment         string
	OutcomeAt           time.Time
}

// Errors of RecordFeedback, wrapped in an EntryError.
var (
	ErrUnknownCard       = errors.New("no card with this uuid was returned by this service to this caller")
	ErrUnknownSuggestion = errors.New("an accepted suggestion is not one of the card's")
)

// EntryError is a feedback entry that could not be stored, by its index
// in the call; none of the call's entries were stored.
type EntryError struct {
	Index int
	Err   error
}

func (e *EntryError) Error() string { return fmt.Sprintf("feedback entry %d: %v", e.Index, e.Err) }

// Unwrap returns the entry's error.
func (e *EntryError) Unwrap() error { return e.Err }

// Store is the card log and feedback record. Implementations write
// durably before returning: a nil error means the record survives a crash.
type Store interface {
	// LogCards records the cards of one response.
	LogCards(ctx context.Context, cards []CardRecord) error
	// RecordFeedback records the outcomes of one feedback call, all or
	// none; a repeat of the same card, outcome and time is accepted and
	// stored once.
	RecordFeedback(ctx context.Context, entries []FeedbackRecord) error
	// PriorCards returns, for the patient, service and caller of q, the
	// latest card shown (not held back) of each rule, subject and moment
	// and the latest one overridden with a reason, when they fall between
	// q.Since and q.Until (an override by its time), the latest first, at
	// most MaxPriorCards.
	PriorCards(ctx context.Context, q PriorQuery) ([]PriorCard, error)
	// CountCall counts one hook call answered; it never waits for the
	// database (see DB.CountCall).
	CountCall(c CallRecord)
	// Purge deletes cards (and their feedback) logged before t, and
	// expired JWT replay entries.
	Purge(ctx context.Context, before time.Time) (int64, error)
	// Report summarises the cards logged in [from, to) and their outcomes.
	Report(ctx context.Context, from, to time.Time) (Report, error)
	// Counts reports how many cards and feedback records are held.
	Counts(ctx context.Context) (cards, feedback int64, err error)
	Close() error
}
