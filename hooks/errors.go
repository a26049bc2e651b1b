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
	ReasonCallerGone     = "caller-gone"      // the EHR closed the call before it was answered
)

// ReasonNoStore is a 503 for feedback sent to a deployment that keeps no
// store: a configuration matter.
const ReasonNoStore = "no-store"

// Reasons a call is answered 412 (Error.Reason with KindPrecondition), and
// why a prefetch key was not had (Resolved.Code). None carries request
// values.
const (
	CodeNotSent        = "not-sent"             // not prefetched, and the call named no FHIR server with a token
	CodeServerNotUsed  = "fhir-server-not-used" // a FHIR server was named, but this deployment does not call it (allowlist, no client)
	CodeTokenMissing   = "template-token"       // the prefetch template has a token the call's context does not fill
	CodeOutcome        = "operation-outcome"    // the data is an OperationOutcome reporting an error
	CodeUnreadable     = "unreadable"           // the data the EHR sent is not a FHIR resource or Bundle
	CodeFetchedBad     = "fetched-unreadable"   // the FHIR server's answer is not a FHIR resource or Bundle
	CodeTimeout        = "timeout"              // the FHIR server did not answer in time
	CodeHTTPAuth       = "http-auth"            // the FHIR server refused the EHR's token (401, 403)
	CodeHTTPStatus     = "http-status"          // the FHIR server answered another status than 200 (a redirect included)
	CodeUnreachable    = "unreachable"          // the FHIR server could not be reached
	CodeOffOrigin      = "off-origin"           // a link pointed away from the FHIR server
	CodeBlockedAddress = "blocked-address"      // the FHIR server resolves to an address this deployment does not call
	CodeInsecure       = "insecure-fhir-server" // the FHIR server named is not https (loopback aside, in development)
	CodeTooLarge       = "too-large"            // an answer larger than fhir_client.max_response_bytes
	CodeCallBudget     = "call-budget"          // the data is larger than one call may read (budget.call_bytes)
	CodeCancelled      = "cancelled"            // the EHR went away before the data came
)

// Cause categories: who has to act on a failure. Spans
// (halite.error.cause), the request metric's cause label and the access
// log's cause field all take them from causeTable.
const (
	CauseCaller        = "caller"        // the EHR: its request, token, key set or prefetch
	CauseConfiguration = "configuration" // halite's deployment settings: allowlists, limits, stores
	CauseFHIRServer    = "fhir-server"   // the EHR's FHIR server
	CauseStore         = "store"         // halite's database
	CauseHalite        = "halite"        // a fault in halite, or its capacity spent
)

// causeTable is the one table from an error's reason (503 reasons, 412 and
// prefetch codes) to its cause. Errors with no reason in it take their
// kind's cause from kindCause.
var causeTable = map[string]string{
	ReasonStoreBusy:      CauseStore,
	ReasonStoreTimeout:   CauseStore,
	ReasonStoreQueueFull: CauseStore,
	ReasonStoreFault:     CauseStore,
	ReasonNoStore:        CauseConfiguration,
	ReasonFHIRTimeout:    CauseFHIRServer,
	ReasonCallTimeout:    CauseHalite,
	ReasonBudget:         CauseHalite,
	ReasonKeysTimeout:    CauseCaller, // the issuer's key set did not come in time
	ReasonCallerGone:     CauseCaller,
	CodeNotSent:          CauseCaller,
	CodeServerNotUsed:    CauseConfiguration,
	CodeTokenMissing:     CauseCaller,
	CodeOutcome:          CauseFHIRServer,
	CodeUnreadable:       CauseCaller,
	CodeFetchedBad:       CauseFHIRServer,
	CodeTimeout:          CauseFHIRServer,
	CodeHTTPAuth:         CauseCaller, // the token is the EHR's
	CodeHTTPStatus:       CauseFHIRServer,
	CodeUnreachable:      CauseFHIRServer,
	CodeOffOrigin:        CauseFHIRServer,
	CodeBlockedAddress:   CauseConfiguration,
	CodeInsecure:         CauseCaller,
	CodeTooLarge:         CauseConfiguration,
	CodeCallBudget:       CauseConfiguration,
	CodeCancelled:        CauseCaller,
}

// kindCause is the cause of an error whose reason causeTable does not name.
var kindCause = map[Kind]string{
	KindInternal:         CauseHalite,
	KindBadRequest:       CauseCaller,
	KindUnauthorized:     CauseCaller,
	KindForbidden:        CauseCaller,
	KindUnknownService:   CauseCaller,
	KindMethodNotAllowed: CauseCaller,
	KindPrecondition:     CauseCaller,
	KindTooLarge:         CauseCaller,
	KindUnsupportedMedia: CauseCaller,
	KindUnavailable:      CauseHalite,
	KindTimeout:          CauseCaller,
}

// CauseOf is who has to act on err: the cause of its reason, else of its
// kind.
func CauseOf(err error) string {
	var e *Error
	if errors.As(err, &e) {
		if c, ok := causeTable[e.Reason]; ok {
			return c
		}
	}
	return kindCause[KindOf(err)]
}

// CodeCause is the cause of a prefetch code or reason ("" for none known).
func CodeCause(code string) string { return causeTable[code] }

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
