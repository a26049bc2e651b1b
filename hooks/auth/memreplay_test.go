package auth

import (
	"container/heap"
	"context"
	"errors"
	"sync"
	"time"
)

// MemoryReplay is a ReplayCache in memory, bounded in size, for the tests
// (halite keeps its replay cache in the store). Entries
// are also kept in expiry order, so each call drops the expired ones in
// time proportional to their number, never scanning the live ones.
type MemoryReplay struct {
	mu      sync.Mutex
	seen    map[string]struct{} // live keys; their expiries are in byUntil
	byUntil expiryHeap
	max     int
	now     func() time.Time
}

// NewMemoryReplay returns a cache holding at most max live jti values.
func NewMemoryReplay(max int, now func() time.Time) *MemoryReplay {
	if now == nil {
		now = time.Now
	}
	return &MemoryReplay{seen: map[string]struct{}{}, max: max, now: now}
}

// Remember implements ReplayCache. A full cache refuses new tokens rather
// than forget live ones.
func (m *MemoryReplay) Remember(_ context.Context, iss, jti string, until time.Time) (bool, error) {
	key := iss + "\x00" + jti
	now := m.now()
	m.mu.Lock()
	defer m.mu.Unlock()
	for len(m.byUntil) > 0 && !now.Before(m.byUntil[0].until) {
		// Each live key has exactly one heap entry: a key is added again
		// only after its entry was popped here.
		delete(m.seen, heap.Pop(&m.byUntil).(expiry).key)
	}
	if _, ok := m.seen[key]; ok {
		return true, nil
	}
	if !now.Before(until) {
		return false, nil // already expired: nothing to remember
	}
	if len(m.seen) >= m.max {
		return false, errors.New("replay cache full")
	}
	m.seen[key] = struct{}{}
	heap.Push(&m.byUntil, expiry{key: key, until: until})
	return false, nil
}

// expiry is one remembered jti and when it may be forgotten.
type expiry struct {
	key   string
	until time.Time
}

// expiryHeap is a min-heap of expiries (container/heap).
type expiryHeap []expiry

func (h expiryHeap) Len() int           { return len(h) }
func (h expiryHeap) Less(i, j int) bool { return h[i].until.Before(h[j].until) }
func (h expiryHeap) Swap(i, j int)      { h[i], h[j] = h[j], h[i] }
func (h *expiryHeap) Push(x any)        { *h = append(*h, x.(expiry)) }
func (h *expiryHeap) Pop() any {
	old := *h
	e := old[len(old)-1]
	*h = old[:len(old)-1]
	return e
}
