package hooks

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"regexp"
	"strings"
	"sync"
	"time"

	"github.com/halite-cds/halite/fhirmap"
)

// Fetcher reads from the client's FHIR server. ref is a relative FHIR URL
// ("Observation?patient=…") or an absolute one on the same server (a Bundle's
// next link). Implementations bound time and size and never log the token.
type Fetcher interface {
	Fetch(ctx context.Context, ref string) ([]byte, error)
}

// FetcherFactory makes a Fetcher for the server and token of one call,
// which takes every byte it reads from budget before reading it (and
// fails the fetch, wrapping the budget's error, when it cannot). It fails
// when the server may not be used; the call then proceeds as if no server
// had been given.
type FetcherFactory func(server string, auth *FHIRAuthorization, caller Caller, budget *CallBudget) (Fetcher, error)

// KeyState says how a prefetch key was resolved.
type KeyState string

// Key states.
const (
	Prefetched  KeyState = "prefetched"  // the client sent it
	Fetched     KeyState = "fetched"     // halite fetched it from fhirServer
	NoData      KeyState = "null"        // the client sent null: no data, not re-queried
	Failed      KeyState = "failed"      // the client sent an OperationOutcome, or the fetch failed
	Unavailable KeyState = "unavailable" // not sent and no usable fhirServer
)

// Resolved is the outcome for one prefetch key.
type Resolved struct {
	Key   PrefetchKey
	State KeyState
	// Resources are the resources read, each with its Bundle entry's
	// fullUrl when it came in one, so that references resolve.
	Resources []fhirmap.BundleEntry
	// Partial is set when a paginated result could not be read to its end.
	Partial bool
	// Reason explains Failed, Unavailable and Partial states, without PHI;
	// it is safe to give the caller.
	Reason string
	// Code names the kind of failure behind Reason (Code* constants, or
	// ReasonBudget), for logs, spans and the cause table.
	Code string
	// Err is the fetch error behind Reason, with detail for logs only.
	Err error
}

// publicReason is what a fetch error may tell the caller: the Fetcher's own
// public reason if it has one, else a generic one (the detail could map the
// network behind halite).
func publicReason(err error) string {
	switch {
	case errors.Is(err, ErrCallBudget):
		return "the data is larger than one call may read"
	case errors.Is(err, ErrProcessBudget):
		return "halite is reading too much data for other calls just now"
	}
	var p interface{ Public() string }
	if errors.As(err, &p) {
		return p.Public()
	}
	return "the FHIR server request failed"
}

// Limits bound prefetch resolution.
type Limits struct {
	MaxPages int // Bundle pages followed per key, the first included
}

// userTokens derive the CDS Hooks 2.0 user tokens from context.userId.
var userTokens = map[string]string{
	"userPractitionerId":     "Practitioner",
	"userPractitionerRoleId": "PractitionerRole",
	"userPatientId":          "Patient",
	"userRelatedPersonId":    "RelatedPerson",
}

var tokenPattern = regexp.MustCompile(`\{\{\s*([A-Za-z0-9_.]+)\s*\}\}`)

// RenderTemplate fills a prefetch template's tokens from the call. The values
// are validated FHIR ids and Type/id references, which need no escaping in a
// path or a query. A token with no value makes the template unusable (ok=false).
func RenderTemplate(template string, c *Call) (string, bool) {
	ok := true
	out := tokenPattern.ReplaceAllStringFunc(template, func(tok string) string {
		name := tokenPattern.FindStringSubmatch(tok)[1]
		var v string
		if field, isCtx := strings.CutPrefix(name, "context."); isCtx {
			v = c.ContextTokens[field]
		} else if typ, isUser := userTokens[name]; isUser {
			if t, id, found := strings.Cut(c.Context.UserID, "/"); found && t == typ {
				v = id
			}
		}
		if v == "" {
			ok = false
		}
		return v
	})
	return out, ok
}

// Resolve obtains every prefetch key of svc for the call: prefetched values as
// sent, absent ones from the FHIR server when fetch is not nil. It fails with
// KindPrecondition when a required key can be had neither way.
//
// Keys are resolved concurrently, required keys first: they have the first
// claim on the call's byte budget, so optional data (active orders, urine
// results) can never crowd out the sodium a service needs. The optional
// round is skipped when a required key already failed, and it ends before
// the call's deadline, leaving a reserve (optionalReserve) for the rest of
// the call: an optional key it cuts short is missing data, not a failed
// call. Fetcher implementations must be safe for concurrent use. A time or
// byte budget that runs out on a required key is KindUnavailable.
func Resolve(ctx context.Context, svc Service, c *Call, fetch Fetcher, lim Limits) ([]Resolved, error) {
	out := make([]Resolved, len(svc.Prefetch))
	round := func(ctx context.Context, required bool) {
		var wg sync.WaitGroup
		for i, k := range svc.Prefetch {
			if k.Required == required {
				wg.Go(func() { out[i] = resolveKey(ctx, k, c, fetch, lim) })
			}
		}
		wg.Wait()
	}
	round(ctx, true)
	if err := requiredOutcome(ctx, out, fetch); err != nil {
		return out, err
	}
	octx, cancel := context.WithCancel(ctx)
	if deadline, ok := ctx.Deadline(); ok {
		octx, cancel = context.WithDeadline(ctx, deadline.Add(-optionalReserve(time.Until(deadline))))
	}
	defer cancel()
	round(octx, false)
	return out, requiredOutcome(ctx, out, fetch)
}

// optionalReserve is the part of the time left that the optional keys
// leave to mapping, rules and the card log: a quarter, at most 500 ms.
func optionalReserve(left time.Duration) time.Duration {
	return min(left/4, 500*time.Millisecond)
}

// requiredOutcome is the call's error, if any, once the required keys are
// resolved: the deadline spent, a byte budget held by other calls, or
// required data that could not be had.
func requiredOutcome(ctx context.Context, out []Resolved, fetch Fetcher) error {
	if ctx.Err() != nil {
		if errors.Is(ctx.Err(), context.Canceled) {
			return &Error{Kind: KindUnavailable, Reason: ReasonCallerGone,
				Message: "the call was closed before it was answered", Err: ctx.Err()}
		}
		if fetch == nil {
			return &Error{Kind: KindUnavailable, Reason: ReasonCallTimeout,
				Message: "the call's time budget ran out", Err: ctx.Err()}
		}
		return &Error{Kind: KindUnavailable, Reason: ReasonFHIRTimeout,
			Message: "the call's time budget ran out while fetching FHIR data", Err: ctx.Err()}
	}
	var missing []string
	code := ""
	for _, r := range out {
		if r.Key.Required && (r.State == Failed || r.State == Unavailable) {
			if errors.Is(r.Err, ErrProcessBudget) {
				// Other calls hold the data budget: this call can succeed later.
				return &Error{Kind: KindUnavailable, Reason: ReasonBudget,
					Message: "halite is reading too much data for other calls just now", Err: r.Err}
			}
			missing = append(missing, r.Key.Key+" ("+r.Reason+")")
			if code == "" {
				code = r.Code
			}
		}
	}
	if len(missing) > 0 {
		// The 412's reason is its first missing key's: the cause table
		// then names who has to act.
		return &Error{Kind: KindPrecondition, Field: "prefetch", Reason: code,
			Message: "required data could not be obtained: " + strings.Join(missing, "; ")}
	}
	return nil
}

func resolveKey(ctx context.Context, k PrefetchKey, c *Call, fetch Fetcher, lim Limits) Resolved {
	ctx = withPrefetchKey(ctx, k.Key)
	r := Resolved{Key: k}
	raw, sent := c.Request.Prefetch[k.Key]
	if sent {
		if string(raw) == "null" {
			r.State = NoData
			return r
		}
		r.State = Prefetched
		if err := r.read(ctx, raw, fetch, lim); err != nil {
			r.State, r.Reason, r.Code, r.Resources = Failed, err.Error(), readCode(err, CodeUnreadable), nil
		}
		return r
	}
	if fetch == nil {
		r.State, r.Reason, r.Code = Unavailable, "not prefetched and no usable FHIR server", CodeNotSent
		switch {
		case c.fetchRefused != "":
			r.Code = c.fetchRefused
		case c.Request.FHIRServer != "" && c.Request.FHIRAuthorization != nil:
			r.Code = CodeServerNotUsed // this deployment fetches nothing (eval, a client switched off)
		}
		return r
	}
	query, ok := RenderTemplate(k.Template, c)
	if !ok {
		r.State, r.Reason, r.Code = Unavailable, "template has a token with no value", CodeTokenMissing
		return r
	}
	body, err := fetch.Fetch(ctx, query)
	if err != nil {
		r.State, r.Reason, r.Code, r.Err = Failed, publicReason(err), fetchCode(err), err
		return r
	}
	r.State = Fetched
	if err := r.read(ctx, body, fetch, lim); err != nil {
		r.State, r.Reason, r.Code, r.Resources = Failed, err.Error(), readCode(err, CodeFetchedBad), nil
	}
	return r
}

// readCode is the code of a value that could not be read: an
// OperationOutcome, or otherwise unreadable (whose fault depends on who
// sent it).
func readCode(err error, unreadable string) string {
	if errors.Is(err, errOutcome) {
		return CodeOutcome
	}
	return unreadable
}

// fetchCode classifies a failed fetch for logs, spans and the cause table.
// A Fetcher may name its own code (a method Code() string) from the
// Code* constants; others are told apart by their errors.
func fetchCode(err error) string {
	switch {
	case errors.Is(err, ErrCallBudget):
		return CodeCallBudget
	case errors.Is(err, ErrProcessBudget):
		return ReasonBudget
	case errors.Is(err, context.Canceled):
		return CodeCancelled
	case errors.Is(err, context.DeadlineExceeded):
		return CodeTimeout
	}
	var named interface{ Code() string }
	if errors.As(err, &named) {
		if code := named.Code(); CodeCause(code) != "" {
			return code
		}
	}
	var st interface{ HTTPStatus() int }
	if errors.As(err, &st) {
		if s := st.HTTPStatus(); s == 401 || s == 403 {
			return CodeHTTPAuth
		}
		return CodeHTTPStatus
	}
	return CodeUnreachable
}

// errOutcome means the data was an OperationOutcome reporting an error.
var errOutcome = errors.New("the FHIR server reported an error (OperationOutcome)")

// read takes the resources out of one value (a resource or a Bundle),
// following next links while a fetcher is available.
func (r *Resolved) read(ctx context.Context, raw []byte, fetch Fetcher, lim Limits) error {
	for page := 1; ; page++ {
		// Most values are Bundles: read one as such in one pass, and only
		// when that fails read the head to tell what the value is.
		b, err := fhirmap.ParseBundle(raw)
		if err != nil {
			res, headErr := fhirmap.ReadResource(raw)
			switch {
			case headErr != nil:
				return fmt.Errorf("page %d: %w", page, headErr)
			case res.Type == "OperationOutcome":
				return errOutcome
			case res.Type == "Bundle":
				return fmt.Errorf("page %d: %w", page, err)
			}
			r.Resources = append(r.Resources, fhirmap.BundleEntry{Resource: raw})
			return nil
		}
		for _, e := range b.Entries {
			er, err := fhirmap.ReadResource(e.Resource)
			if err == nil && er.Type == "OperationOutcome" {
				if outcomeIsError(e.Resource) {
					return errOutcome
				}
				continue // a search warning (search.mode "outcome")
			}
			r.Resources = append(r.Resources, e)
		}
		if b.Next == "" {
			return nil
		}
		if fetch == nil {
			r.Partial, r.Reason = true, "the result has more pages and there is no usable FHIR server to read them"
			return nil
		}
		if page >= lim.MaxPages {
			r.Partial, r.Reason = true, fmt.Sprintf("the result has more than %d pages; only %d were read", lim.MaxPages, page)
			return nil
		}
		if raw, err = fetch.Fetch(ctx, b.Next); err != nil {
			r.Partial, r.Reason, r.Code, r.Err = true, "reading page "+fmt.Sprint(page+1)+": "+publicReason(err), fetchCode(err), err
			return nil
		}
	}
}

func outcomeIsError(raw json.RawMessage) bool {
	var oo struct {
		Issue []struct {
			Severity string `json:"severity"`
		} `json:"issue"`
	}
	if json.Unmarshal(raw, &oo) != nil {
		return true
	}
	for _, i := range oo.Issue {
		if i.Severity == "error" || i.Severity == "fatal" {
			return true
		}
	}
	return false
}
