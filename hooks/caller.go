package hooks

import "context"

// Caller is the authenticated EHR behind a call. In development mode,
// without trusted issuers, it is the zero Caller.
type Caller struct {
	Issuer string
	Tenant string
}

// Authenticator verifies the Authorization header of a call made to
// audience (the exact URL called). A refusal is answered 401 without
// detail; if the error has a Label method, the label is logged (never the
// token).
type Authenticator interface {
	Authenticate(ctx context.Context, authorization, audience string) (Caller, error)
}

type callerKey struct{}

// WithCaller returns ctx carrying the call's authenticated caller.
func WithCaller(ctx context.Context, c Caller) context.Context {
	return context.WithValue(ctx, callerKey{}, c)
}

// CallerFrom returns the caller WithCaller stored, or the zero Caller.
func CallerFrom(ctx context.Context) Caller {
	c, _ := ctx.Value(callerKey{}).(Caller)
	return c
}
