package hooks

import (
	"errors"
	"sync"
)

// Errors of a budget that cannot give what is asked. Neither waits: a call
// that finds its budget spent is answered with what it has.
var (
	// ErrCallBudget: this call has read as many bytes of FHIR data as one
	// call may hold.
	ErrCallBudget = errors.New("the call's byte budget for FHIR data is spent")
	// ErrProcessBudget: the calls in flight together hold as many bytes of
	// outside data as the process may.
	ErrProcessBudget = errors.New("the process's byte budget for data in flight is spent")
)

// ProcessBudget bounds the bytes of outside data (request bodies and FHIR
// answers) that all calls in flight hold together, so that no mix of
// calls can take the process past its memory limit. Safe for concurrent
// use; a nil *ProcessBudget is unlimited.
type ProcessBudget struct {
	mu          sync.Mutex
	limit, used int64
}

// NewProcessBudget returns a budget of limit bytes.
func NewProcessBudget(limit int64) *ProcessBudget { return &ProcessBudget{limit: limit} }

// take reserves n bytes, or fails at once with ErrProcessBudget.
func (b *ProcessBudget) take(n int64) error {
	if b == nil {
		return nil
	}
	b.mu.Lock()
	defer b.mu.Unlock()
	if b.used+n > b.limit {
		return ErrProcessBudget
	}
	b.used += n
	return nil
}

func (b *ProcessBudget) release(n int64) {
	if b == nil || n == 0 {
		return
	}
	b.mu.Lock()
	b.used -= n
	b.mu.Unlock()
}

// InUse reports the bytes reserved now (for tests and metrics).
func (b *ProcessBudget) InUse() int64 {
	if b == nil {
		return 0
	}
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.used
}

// CallBudget is one call's share: what it reads from FHIR servers (every
// key, every page, every Medication read) is taken from it and from the
// process budget; Release gives it all back when the call has answered.
// A zero limit is unlimited for the call (the process budget still holds).
type CallBudget struct {
	process *ProcessBudget
	limit   int64

	mu   sync.Mutex
	used int64 // taken from this call's limit and from the process
	held int64 // taken from the process outside the call's limit (the request body)
}

// NewCallBudget returns a call's budget of limit bytes drawn from p.
func NewCallBudget(p *ProcessBudget, limit int64) *CallBudget {
	return &CallBudget{process: p, limit: limit}
}

// Take reserves n bytes of FHIR data for the call, failing at once with
// ErrCallBudget or ErrProcessBudget when either budget cannot give them.
func (b *CallBudget) Take(n int64) error {
	b.mu.Lock()
	defer b.mu.Unlock()
	if b.limit > 0 && b.used+n > b.limit {
		return ErrCallBudget
	}
	if err := b.process.take(n); err != nil {
		return err
	}
	b.used += n
	return nil
}

// Hold reserves n bytes from the process budget only (a request body,
// bounded by its own limit), failing at once with ErrProcessBudget.
func (b *CallBudget) Hold(n int64) error {
	b.mu.Lock()
	defer b.mu.Unlock()
	if err := b.process.take(n); err != nil {
		return err
	}
	b.held += n
	return nil
}

// Release returns everything the call took to the process budget.
func (b *CallBudget) Release() {
	b.mu.Lock()
	defer b.mu.Unlock()
	b.process.release(b.used + b.held)
	b.used, b.held = 0, 0
}
