package hooks

import (
	"errors"
	"testing"
)

func TestBudget(t *testing.T) {
	p := NewProcessBudget(100)
	a, b := NewCallBudget(p, 60), NewCallBudget(p, 0)
	for _, tc := range []struct {
		name string
		do   func() error
		want error
		used int64
	}{
		{"a takes within both", func() error { return a.Take(50) }, nil, 50},
		{"a past its call limit", func() error { return a.Take(11) }, ErrCallBudget, 50},
		{"a up to its call limit", func() error { return a.Take(10) }, nil, 60},
		{"b has no call limit but the process's", func() error { return b.Take(41) }, ErrProcessBudget, 60},
		{"b holds a body from the process", func() error { return b.Hold(40) }, nil, 100},
		{"nothing is left for anyone", func() error { return b.Take(1) }, ErrProcessBudget, 100},
		{"a's release gives the process back what a took", func() error { a.Release(); return nil }, nil, 40},
		{"b may now take", func() error { return b.Take(30) }, nil, 70},
		{"b's release gives back body and data", func() error { b.Release(); return nil }, nil, 0},
		{"a second release gives nothing twice", func() error { b.Release(); return nil }, nil, 0},
	} {
		if err := tc.do(); !errors.Is(err, tc.want) || (tc.want == nil && err != nil) {
			t.Errorf("%s: error %v, want %v", tc.name, err, tc.want)
		}
		if got := p.InUse(); got != tc.used {
			t.Errorf("%s: process in use %d, want %d", tc.name, got, tc.used)
		}
	}
	var unlimited *ProcessBudget
	if err := NewCallBudget(unlimited, 0).Take(1 << 40); err != nil {
		t.Errorf("a nil process budget is unlimited: %v", err)
	}
}
