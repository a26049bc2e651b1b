package auth

import (
	"context"
	"errors"
	"sync"
	"time"
)

// MemoryReplay is a ReplayCache for one node, bounded in size; expired
// entries are dropped as new ones arrive.
type MemoryReplay struct {
	mu   sync.Mutex
	seen map[string]time.Time
	max  int
	now  func() time.Time
}

// NewMemoryReplay returns a cache holding at most max live jti values.
func NewMemoryReplay(max int, now func() time.Time) *MemoryReplay {
	if now == nil {
		now = time.Now
	}
	return &MemoryReplay{seen: map[string]time.Time{}, max: max, now: now}
}

// Remember implements ReplayCache. A full cache refuses new tokens rather
// than forget live ones.
func (m *MemoryReplay) Remember(_ context.Context, iss, jti string, until time.Time) (bool, error) {
	key := iss + "\x00" + jti
	now := m.now()
	m.mu.Lock()
	defer m.mu.Unlock()
	if exp, ok := m.seen[key]; ok && now.Before(exp) {
		return true, nil
	}
	if len(m.seen) >= m.max {
		for k, exp := range m.seen {
			if !now.Before(exp) {
				delete(m.seen, k)
			}
		}
		if len(m.seen) >= m.max {
			return false, errors.New("replay cache full")
		}
	}
	m.seen[key] = until
	return false, nil
}
