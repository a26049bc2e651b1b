package hooks

import (
	"errors"
	"fmt"
	"net/http"
)

// Kind classifies an error for the one table that maps errors to HTTP status.
type Kind int

// Error kinds. KindInternal is the default for errors that carry no kind.
const (
	KindInternal         Kind = iota // a fault in halite: 500
	KindBadRequest                   // malformed or invalid request: 400
	KindUnauthorized                 // no valid caller token: 401, no detail
	KindForbidden                    // a browser origin that is not allowed: 403
	KindUnknownService               // no such service or endpoint: 404
	KindMethodNotAllowed             // wrong method on a known endpoint: 405
	KindPrecondition                 // required FHIR data neither prefetched nor fetchable: 412
	KindTooLarge                     // request body over the limit: 413
	KindUnsupportedMedia             // a body that is not declared as JSON: 415
	KindUnavailable                  // halite cannot answer now (store, budget, deadline): 503 with Retry-After
	KindTimeout                      // the request body did not arrive within the call's deadline: 408
)

// statusOf is the single table from error kind to HTTP status and FHIR
// OperationOutcome issue type (FHIR R4 IssueType value set).
var statusOf = map[Kind]struct {
	status    int
	issueType string
}{
	KindInternal:         {http.StatusInternalServerError, "exception"},
	KindBadRequest:       {http.StatusBadRequest, "invalid"},
	KindUnauthorized:     {http.StatusUnauthorized, "login"},
	KindForbidden:        {http.StatusForbidden, "forbidden"},
	KindUnknownService:   {http.StatusNotFound, "not-found"},
	KindMethodNotAllowed: {http.StatusMethodNotAllowed, "not-supported"},
	KindPrecondition:     {http.StatusPreconditionFailed, "incomplete"},
	KindTooLarge:         {http.StatusRequestEntityTooLarge, "too-long"},
	KindUnsupportedMedia: {http.StatusUnsupportedMediaType, "not-supported"},
	KindUnavailable:      {http.StatusServiceUnavailable, "transient"},
	KindTimeout:          {http.StatusRequestTimeout, "timeout"},
}

// Reasons a call is answered 503 (Error.Reason with KindUnavailable), for
// logs and the halite.unavailable metric. None carries request values.
const (
	ReasonStoreBusy      = "store-busy"       // the database refused for contention (locked, busy)
	ReasonStoreTimeout   = "store-timeout"    // the database did not answer within the call's deadline
	ReasonStoreQueueFull = "store-queue-full" // the store writer's queue is full: shed at once
	ReasonStoreFault     = "store-fault"      // the database failed otherwise (down, closed)
	ReasonFHIRTimeout    = "fhir-timeout"     // the call's deadline ran out while reading FHIR data
	ReasonCallTimeout    = "call-timeout"     // the call's deadline ran out in halite (none of the above)
	ReasonBudget         = "budget-exhausted" // the process's byte budget for data in flight is spent
	ReasonKeysTimeout    = "keys-unavailable" // the caller's key set could not be had within the deadline
)

// RetryAfterSeconds is the Retry-After every 503 carries: long enough for
// a queue to drain or a database to fail over, short enough for a
// clinician's next action.
const RetryAfterSeconds = 2

// Error is an error with a kind and, for bad requests, the field at fault
// (a path such as "context.patientId").
type Error struct {
	Kind    Kind
	Field   string
	Message string
	// Reason names why a KindUnavailable error happened (Reason* constants).
	Reason string
	Err    error
}

// Error returns the field, the message and the wrapped cause.
func (e *Error) Error() string {
	msg := e.Message
	if e.Field != "" {
		msg = e.Field + ": " + msg
	}
	if e.Err != nil {
		msg += ": " + e.Err.Error()
	}
	return msg
}

// Unwrap returns the wrapped cause.
func (e *Error) Unwrap() error { return e.Err }

func badRequest(field, format string, args ...any) *Error {
	return &Error{Kind: KindBadRequest, Field: field, Message: fmt.Sprintf(format, args...)}
}

// KindOf returns the kind of err, KindInternal when it has none.
func KindOf(err error) Kind {
	var e *Error
	if errors.As(err, &e) {
		return e.Kind
	}
	return KindInternal
}

// StatusOf returns the HTTP status for err.
func StatusOf(err error) int { return statusOf[KindOf(err)].status }

// OperationOutcome is the FHIR R4 OperationOutcome halite returns as the body
// of every error response (CDS Hooks 3.0 ballot recommends it; 2.0 allows it).
type OperationOutcome struct {
	ResourceType string         `json:"resourceType"`
	Issue        []OutcomeIssue `json:"issue"`
}

// OutcomeIssue is one issue of an OperationOutcome.
type OutcomeIssue struct {
	Severity    string   `json:"severity"`
	Code        string   `json:"code"`
	Diagnostics string   `json:"diagnostics,omitempty"`
	Expression  []string `json:"expression,omitempty"`
}

// OutcomeOf renders err as an OperationOutcome. Internal and
// authentication errors carry no detail, which could leak internals or
// guide an attacker.
func OutcomeOf(err error) OperationOutcome {
	kind := KindOf(err)
	issue := OutcomeIssue{Severity: "error", Code: statusOf[kind].issueType}
	switch kind {
	case KindInternal:
		issue.Diagnostics = "internal error"
	case KindUnauthorized:
		issue.Diagnostics = "authentication required" // never why: that would help an attacker
	default:
		var e *Error
		if errors.As(err, &e) {
			issue.Diagnostics = e.Message
			if e.Field != "" {
				issue.Diagnostics = e.Field + " " + e.Message
				issue.Expression = []string{e.Field}
			}
		}
	}
	return OperationOutcome{ResourceType: "OperationOutcome", Issue: []OutcomeIssue{issue}}
}
