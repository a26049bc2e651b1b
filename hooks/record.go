package hooks

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/halite-cds/halite/rules"
)

// LoggedCard is a card as the card log keeps it: no patient reference,
// only its keyed hash.
type LoggedCard struct {
	UUID, Service, Rule, Indicator, Ruleset string
	// Issuer and Tenant are the authenticated caller's (empty in
	// development mode); feedback is taken only from the same caller.
	Issuer, Tenant string
	PatientHash    string
	At             time.Time
	Figures        map[string]float64
	Suggestions    []string // suggestion uuids
	// Moment is when the finding was made (rules.MomentSelect, …); Subject
	// and Draft are keyed hashes of its product and draft order.
	Moment         rules.Moment
	Subject, Draft string
	// Suppressed is why the finding was held back ("" for a card returned).
	Suppressed string
}

// PriorQuery selects the cards shown to one caller, for one patient (by
// its keyed hash), by one service, from Since up to Until.
type PriorQuery struct {
	Service, Issuer, Tenant, PatientHash string
	Since, Until                         time.Time
}

// CardOutcome is one feedback entry for a card.
type CardOutcome struct {
	Card, Service, Outcome string
	Issuer, Tenant         string // the caller reporting it
	AcceptedSuggestions    []string
	ReasonSystem           string
	ReasonCode             string
	UserComment            string
	OutcomeAt              time.Time
}

// Recorder is the durable card log and feedback record; cmd fills it
// with a hooks/feedback store. A nil error means the record is durable.
type Recorder interface {
	LogCards(ctx context.Context, cards []LoggedCard) error
	// RecordOutcomes stores the entries of one feedback call, all or
	// none. An entry naming a card this service did not return to this
	// caller, or a suggestion the card did not offer, is returned as an
	// *OutcomeError wrapping ErrUnknownCard or ErrUnknownSuggestion.
	RecordOutcomes(ctx context.Context, entries []CardOutcome) error
	// PriorCards returns the cards q selects that were returned (not held
	// back), so a repeat can be recognised on any replica.
	PriorCards(ctx context.Context, q PriorQuery) ([]rules.ShownCard, error)
	// CountCall counts a call to a service (answered or failed), for the
	// burden report; it must not wait for the database.
	CountCall(c CallCount)
}

// CallCount is one hook call to a service, answered or failed, with no
// patient data.
type CallCount struct {
	At                                     time.Time
	Service, Hook, Issuer, Tenant, Ruleset string
	Cards, Suppressed                      int
	Failed                                 bool
}

// Errors a Recorder returns for feedback about unknown cards.
var (
	ErrUnknownCard       = errors.New("no card with this uuid was returned by this service")
	ErrUnknownSuggestion = errors.New("not a suggestion of this card")
)

// OutcomeError is a feedback entry, by index, that was refused.
type OutcomeError struct {
	Index int
	Err   error
}

func (e *OutcomeError) Error() string { return fmt.Sprintf("feedback[%d]: %v", e.Index, e.Err) }

// Unwrap returns the entry's error.
func (e *OutcomeError) Unwrap() error { return e.Err }
