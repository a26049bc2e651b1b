// Package fhirclient is halite's outbound FHIR client: it reads from the
// fhirServer a CDS client names, with that client's bearer token, under the
// call's deadline, with bounded response size, and never leaves the server's
// origin; it follows no redirect (a 3xx answer is a failed fetch). Errors
// never contain the token or the query string (which carries patient
// identifiers).
package fhirclient

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/url"
	"slices"
	"strings"
	"syscall"
	"time"

	"go.opentelemetry.io/otel/propagation"
)

// Options bound the client.
type Options struct {
	Timeout          time.Duration // per request, within the caller's deadline
	MaxResponseBytes int64
	// AllowHTTPLoopback permits loopback servers, over plain http too; for
	// development only. Everything else must be https to a public address.
	AllowHTTPLoopback bool
	// Transport is the transport to use, normally one NewTransport shared by
	// all clients; nil makes a new guarded one.
	Transport http.RoundTripper
	// Budget, when set, is where the client takes every byte of an answer
	// before reading it; when it refuses, the fetch fails wrapping its error
	// (and ErrBudget), having read no more. Typically one call's budget.
	Budget Budget
	// Propagator, when set, writes the call's trace context into each
	// request's headers (W3C traceparent), so the FHIR server's side of a
	// fetch joins halite's trace.
	Propagator propagation.TextMapPropagator
}

// Budget gives bytes or refuses at once; it never waits.
type Budget interface {
	Take(n int64) error
}

// Client reads from one FHIR server with one token.
type Client struct {
	base     *url.URL
	token    string
	http     *http.Client
	maxBytes int64
	budget   Budget
	prop     propagation.TextMapPropagator
}

// Errors a caller may test for.
var (
	ErrInsecure   = errors.New("fhirServer must use https")
	ErrOffOrigin  = errors.New("URL is not on the fhirServer's origin")
	ErrTooLarge   = errors.New("response is larger than the limit")
	ErrHTTPStatus = errors.New("unexpected HTTP status")
	ErrRedirect   = errors.New("redirect not followed") // also an ErrHTTPStatus
	ErrBadRef     = errors.New("not a valid FHIR URL")
	ErrBudget     = errors.New("the byte budget for answers is spent")
)

// New returns a client for server (the base URL) and token.
func New(server, token string, opt Options) (*Client, error) {
	base, err := url.Parse(strings.TrimRight(server, "/"))
	if err != nil || base.Host == "" {
		return nil, fmt.Errorf("fhir client: fhirServer is not an absolute URL")
	}
	switch {
	case base.Scheme == "https":
	case base.Scheme == "http" && opt.AllowHTTPLoopback && IsLoopback(base.Hostname()):
	default:
		return nil, &Error{Reason: "fhirServer must use https", Err: fmt.Errorf("fhir client: %w", ErrInsecure)}
	}
	if opt.MaxResponseBytes <= 0 {
		return nil, fmt.Errorf("fhir client: MaxResponseBytes must be positive")
	}
	c := &Client{base: base, token: token, maxBytes: opt.MaxResponseBytes, budget: opt.Budget, prop: opt.Propagator}
	transport := opt.Transport
	if transport == nil {
		transport = NewTransport(opt.AllowHTTPLoopback, false)
	}
	c.http = &http.Client{
		Timeout:   opt.Timeout,
		Transport: transport,
		// No redirect is followed, so the token goes to no other URL; the
		// 3xx itself is returned and refused in fetch.
		CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse },
	}
	return c, nil
}

// ErrBlockedAddress means fhirServer resolved to an address halite does not
// call: private, link-local, unspecified or multicast, or loopback outside
// development. The check is made on the address actually dialled, so DNS
// rebinding cannot slip past it.
var ErrBlockedAddress = errors.New("fhirServer resolves to a blocked address")

// NewTransport is the default transport with a dial-time address check
// (loopback allowed only with allowLoopback, private ranges only with
// allowPrivate, for a FHIR server the configuration says is on a private
// network). Make one per setting and share it through Options.Transport: a
// transport per client would keep a connection pool per call.
func NewTransport(allowLoopback, allowPrivate bool) http.RoundTripper {
	d := &net.Dialer{Timeout: 5 * time.Second, Control: func(_, address string, _ syscall.RawConn) error {
		host, _, err := net.SplitHostPort(address)
		if err != nil {
			return ErrBlockedAddress
		}
		ip := net.ParseIP(host)
		switch {
		case ip == nil:
			return ErrBlockedAddress
		case ip.IsLoopback():
			if !allowLoopback {
				return ErrBlockedAddress
			}
		case ip.IsPrivate() && allowPrivate:
		case ip.IsPrivate(), ip.IsLinkLocalUnicast(), ip.IsLinkLocalMulticast(), ip.IsUnspecified(),
			ip.IsMulticast(), ip.IsInterfaceLocalMulticast():
			return ErrBlockedAddress
		}
		return nil
	}}
	t := http.DefaultTransport.(*http.Transport).Clone()
	t.DialContext = d.DialContext
	t.Proxy = nil // a proxy would be dialled instead of the checked address
	return t
}

// IsLoopback reports whether host is "localhost" or a loopback IP address.
func IsLoopback(host string) bool {
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// sameOrigin reports whether u is on the base's scheme and host and at or
// under its path. Paths with dot segments are refused outright, so "../"
// can never climb out of the base.
func (c *Client) sameOrigin(u *url.URL) bool {
	if HasDotSegment(u.Path) {
		return false
	}
	return u.Scheme == c.base.Scheme && u.Host == c.base.Host &&
		(u.Path == c.base.Path || strings.HasPrefix(u.Path, c.base.Path+"/"))
}

// HasDotSegment reports whether path p has a "." or ".." segment.
func HasDotSegment(p string) bool {
	for _, seg := range strings.Split(p, "/") {
		if seg == "." || seg == ".." {
			return true
		}
	}
	return false
}

// Error is a failed fetch. Its message carries the detail for logs (never
// the token, URL or query); Public is the short reason safe to give the
// caller, which tells nothing about the network beyond the FHIR server's
// own answer.
type Error struct {
	Reason string
	Err    error
}

func (e *Error) Error() string { return e.Err.Error() }

// Unwrap returns the detailed cause.
func (e *Error) Unwrap() error { return e.Err }

// Public returns the reason to show the caller.
func (e *Error) Public() string { return e.Reason }

// Code names the kind of failure for logs, spans and metrics: "timeout",
// "http-auth" (401, 403), "http-status" (any other non-200 answer, a
// redirect included), "too-large", "off-origin" (also a reference that is
// not a FHIR URL), "blocked-address", "insecure-fhir-server", or
// "unreachable".
func (e *Error) Code() string { return codeOf(e.Err) }

// Codes lists every code Error.Code returns.
func Codes() []string {
	return []string{"insecure-fhir-server", "http-auth", "http-status", "too-large", "timeout", "off-origin", "blocked-address", "unreachable"}
}

func codeOf(err error) string {
	var se *statusError
	switch {
	case errors.Is(err, ErrInsecure):
		return "insecure-fhir-server"
	case errors.As(err, &se) && (se.code == http.StatusUnauthorized || se.code == http.StatusForbidden):
		return "http-auth"
	case errors.As(err, &se):
		return "http-status"
	case errors.Is(err, ErrTooLarge):
		return "too-large"
	case errors.Is(err, context.DeadlineExceeded):
		return "timeout"
	case errors.Is(err, ErrOffOrigin), errors.Is(err, ErrBadRef):
		return "off-origin"
	case errors.Is(err, ErrBlockedAddress):
		return "blocked-address"
	}
	return "unreachable"
}

// statusError is a non-200 answer; redirect marks a 3xx with a Location.
type statusError struct {
	code     int
	redirect bool
}

func (e *statusError) Error() string {
	if e.redirect {
		return fmt.Sprintf("%v (HTTP %d)", ErrRedirect, e.code)
	}
	return fmt.Sprintf("%v %d", ErrHTTPStatus, e.code)
}

func (e *statusError) Is(target error) bool {
	return target == ErrHTTPStatus || (e.redirect && target == ErrRedirect)
}

// HTTPStatus is the status the server answered with, for traces.
func (e *statusError) HTTPStatus() int { return e.code }

// Fetch GETs ref, a FHIR URL relative to the base ("Patient/1",
// "Observation?…") or an absolute URL on the same origin (a next link).
// Its errors are *Error.
func (c *Client) Fetch(ctx context.Context, ref string) ([]byte, error) {
	body, err := c.fetch(ctx, ref)
	if err != nil {
		return nil, &Error{Reason: publicReason(err), Err: err}
	}
	return body, nil
}

func publicReason(err error) string {
	var se *statusError
	switch {
	case errors.Is(err, ErrRedirect):
		return "the FHIR server answered with a redirect, which halite does not follow"
	case errors.As(err, &se):
		return fmt.Sprintf("the FHIR server answered HTTP %d", se.code)
	case errors.Is(err, ErrTooLarge):
		return "the FHIR server's answer was larger than the limit"
	case errors.Is(err, ErrBudget):
		return "the answer did not fit halite's byte budget"
	case errors.Is(err, context.DeadlineExceeded):
		return "the FHIR server did not answer in time"
	case errors.Is(err, ErrOffOrigin), errors.Is(err, ErrBadRef):
		return "a link pointed away from fhirServer"
	}
	return "the FHIR server could not be reached"
}

func (c *Client) fetch(ctx context.Context, ref string) ([]byte, error) {
	u, op, err := c.resolve(ref)
	if err != nil {
		return nil, err
	}
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, u.String(), nil)
	if err != nil {
		return nil, fmt.Errorf("fetch %s: %w", op, ErrBadRef) // the error would quote the URL
	}
	req.Header.Set("Accept", "application/fhir+json")
	if c.prop != nil {
		c.prop.Inject(ctx, propagation.HeaderCarrier(req.Header))
	}
	if c.token != "" {
		req.Header.Set("Authorization", "Bearer "+c.token)
	}
	resp, err := c.http.Do(req)
	if err != nil {
		return nil, fmt.Errorf("fetch %s: %w", op, cause(err))
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		_, _ = io.Copy(io.Discard, io.LimitReader(resp.Body, 64<<10))
		redirect := resp.StatusCode/100 == 3 && resp.Header.Get("Location") != ""
		return nil, fmt.Errorf("fetch %s: %w", op, &statusError{code: resp.StatusCode, redirect: redirect})
	}
	if resp.ContentLength > c.maxBytes {
		return nil, fmt.Errorf("fetch %s: %w of %d bytes", op, ErrTooLarge, c.maxBytes)
	}
	body, err := c.readBody(resp)
	if err != nil {
		return nil, fmt.Errorf("fetch %s: %w", op, err)
	}
	return body, nil
}

// readChunk is how much of an answer of undeclared length is taken from
// the budget at a time.
const readChunk = 64 << 10

// readBody reads an answer of at most maxBytes, taking each part from the
// budget before reading it: a declared length at once, into a buffer of
// that size; an undeclared one a chunk at a time.
func (c *Client) readBody(resp *http.Response) ([]byte, error) {
	take := func(n int64) error {
		if c.budget == nil {
			return nil
		}
		if err := c.budget.Take(n); err != nil {
			return fmt.Errorf("%w: %w", ErrBudget, err)
		}
		return nil
	}
	if n := resp.ContentLength; n >= 0 {
		if err := take(n); err != nil {
			return nil, err
		}
		body := make([]byte, n)
		if _, err := io.ReadFull(resp.Body, body); err != nil {
			return nil, fmt.Errorf("reading body: %w", cause(err))
		}
		return body, nil
	}
	var body []byte
	for {
		if int64(len(body)) > c.maxBytes {
			return nil, fmt.Errorf("%w of %d bytes", ErrTooLarge, c.maxBytes)
		}
		step := min(readChunk, c.maxBytes+1-int64(len(body)))
		if err := take(step); err != nil {
			return nil, err
		}
		body = slices.Grow(body, int(step))
		n, err := io.ReadFull(resp.Body, body[len(body):len(body)+int(step)])
		body = body[:len(body)+n]
		switch {
		case errors.Is(err, io.ErrUnexpectedEOF), errors.Is(err, io.EOF):
			return body, nil
		case err != nil:
			return nil, fmt.Errorf("reading body: %w", cause(err))
		}
	}
}

// resolve makes ref absolute and names the operation for errors by its
// resource type only.
func (c *Client) resolve(ref string) (*url.URL, string, error) {
	parsed, err := url.Parse(ref)
	if err != nil {
		return nil, "resource", fmt.Errorf("fetch resource: %w", ErrBadRef)
	}
	u := parsed
	if parsed.Scheme == "" && parsed.Host == "" {
		u = &url.URL{Scheme: c.base.Scheme, Host: c.base.Host,
			Path: c.base.Path + "/" + strings.TrimLeft(parsed.Path, "/"), RawQuery: parsed.RawQuery}
	}
	op := operation(strings.TrimPrefix(u.Path, c.base.Path))
	if !c.sameOrigin(u) {
		return nil, op, fmt.Errorf("fetch %s: %w", op, ErrOffOrigin)
	}
	return u, op, nil
}

// operation is the resource type a path names, or "resource": never any
// other text from the path, which may hold identifiers.
func operation(p string) string {
	typ, _, _ := strings.Cut(strings.TrimLeft(p, "/"), "/")
	if typ == "" || typ[0] < 'A' || typ[0] > 'Z' {
		return "resource"
	}
	for _, r := range typ {
		if (r < 'A' || r > 'Z') && (r < 'a' || r > 'z') {
			return "resource"
		}
	}
	return typ
}

// cause strips URLs from transport errors (url.Error prints the URL, whose
// query holds patient identifiers) and keeps context errors testable.
func cause(err error) error {
	switch {
	case errors.Is(err, context.Canceled):
		return fmt.Errorf("cancelled: %w", context.Canceled)
	case errors.Is(err, context.DeadlineExceeded):
		return fmt.Errorf("timed out: %w", context.DeadlineExceeded)
	}
	if errors.Is(err, ErrBlockedAddress) {
		return ErrBlockedAddress
	}
	var ue *url.Error
	if errors.As(err, &ue) {
		if ue.Timeout() {
			return fmt.Errorf("timed out: %w", context.DeadlineExceeded)
		}
		var oe *net.OpError
		if errors.As(ue.Err, &oe) {
			return fmt.Errorf("%s: %v", oe.Op, oe.Err)
		}
		return errors.New("transport error")
	}
	return errors.New("transport error")
}
