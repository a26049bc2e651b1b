package hooks

import (
	"context"
	"errors"
	"time"
)

// LoggedCard is a card as the card log keeps it: no patient reference,
// only its keyed hash.
type LoggedCard struct {
	UUID, Service, Rule, Indicator, Ruleset, Tenant string
	PatientHash                                     string
	At                                              time.Time
	Figures                                         map[string]float64
	Suggestions                                     []string // suggestion uuids
}

// CardOutcome is one feedback entry for a card.
type CardOutcome struct {
	Card, Service, Outcome string
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
	// RecordOutcome returns ErrUnknownCard or ErrUnknownSuggestion for
	// feedback that names what this service did not return.
	RecordOutcome(ctx context.Context, o CardOutcome) error
}

// Errors a Recorder returns for feedback about unknown cards.
var (
	ErrUnknownCard       = errors.New("no card with this uuid was returned by this service")
	ErrUnknownSuggestion = errors.New("not a suggestion of this card")
)
