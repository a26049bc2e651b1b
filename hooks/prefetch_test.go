package hooks

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/halite-cds/halite/fhirmap"
)

// mapFetcher serves canned bodies by ref and records what was asked.
type mapFetcher struct {
	mu     sync.Mutex
	bodies map[string]string
	asked  []string
}

func (f *mapFetcher) Fetch(_ context.Context, ref string) ([]byte, error) {
	f.mu.Lock()
	defer f.mu.Unlock()
	f.asked = append(f.asked, ref)
	b, ok := f.bodies[ref]
	if !ok {
		return nil, errors.New("fetch Observation: unexpected HTTP status 500")
	}
	return []byte(b), nil
}

func oneKeyService(required bool) Service {
	return Service{ID: "t", Hooks: []string{HookPatientView}, Prefetch: []PrefetchKey{
		{Key: "k", Template: "Observation?patient={{context.patientId}}", Required: required, What: "test data"}}}
}

func callWith(prefetch map[string]json.RawMessage) *Call {
	return &Call{Request: Request{Prefetch: prefetch}, Context: HookContext{PatientID: "p1"},
		ContextTokens: map[string]string{"patientId": "p1"}}
}

const (
	obsA = `{"resourceType":"Observation","id":"a"}`
	obsB = `{"resourceType":"Observation","id":"b"}`
)

// TestResolveStates covers each prefetch key state of CDS Hooks 2.0
// §Prefetch (absent, null, OperationOutcome, paginated Bundle).
func TestResolveStates(t *testing.T) {
	page1 := `{"resourceType":"Bundle","type":"searchset","link":[{"relation":"next","url":"https://ehr.example.org/fhir/Observation?page=2"}],"entry":[{"resource":` + obsA + `}]}`
	page2 := `{"resourceType":"Bundle","type":"searchset","entry":[{"resource":` + obsB + `}]}`
	warn := `{"resourceType":"OperationOutcome","issue":[{"severity":"warning","code":"informational"}]}`
	for _, tc := range []struct {
		name      string
		prefetch  map[string]json.RawMessage
		fetcher   *mapFetcher
		state     KeyState
		ids       string
		partial   bool
		wantAsked int
	}{
		{name: "prefetched bundle", prefetch: map[string]json.RawMessage{"k": json.RawMessage(page2)},
			state: Prefetched, ids: "b"},
		{name: "null means no data, never re-queried",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage("null")},
			fetcher:  &mapFetcher{}, state: NoData},
		{name: "OperationOutcome is a failed prefetch, not re-queried",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"exception"}]}`)},
			fetcher:  &mapFetcher{}, state: Failed},
		{name: "Bundle holding an error OperationOutcome fails",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage(`{"resourceType":"Bundle","type":"searchset","entry":[{"resource":{"resourceType":"OperationOutcome","issue":[{"severity":"fatal","code":"exception"}]}}]}`)},
			state:    Failed},
		{name: "search warning OperationOutcome is skipped",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage(`{"resourceType":"Bundle","type":"searchset","entry":[{"resource":` + warn + `},{"resource":` + obsA + `}]}`)},
			state:    Prefetched, ids: "a"},
		{name: "absent without server", state: Unavailable},
		{name: "absent is fetched, next link followed",
			fetcher: &mapFetcher{bodies: map[string]string{"Observation?patient=p1": page1,
				"https://ehr.example.org/fhir/Observation?page=2": page2}},
			state: Fetched, ids: "a,b", wantAsked: 2},
		{name: "prefetched first page, rest fetched",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage(page1)},
			fetcher:  &mapFetcher{bodies: map[string]string{"https://ehr.example.org/fhir/Observation?page=2": page2}},
			state:    Prefetched, ids: "a,b", wantAsked: 1},
		{name: "prefetched first page without server is partial",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage(page1)},
			state:    Prefetched, ids: "a", partial: true},
		{name: "failing next page is partial",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage(page1)},
			fetcher:  &mapFetcher{}, state: Prefetched, ids: "a", partial: true, wantAsked: 1},
		{name: "fetch error fails", fetcher: &mapFetcher{}, state: Failed, wantAsked: 1},
		{name: "single resource", prefetch: map[string]json.RawMessage{"k": json.RawMessage(obsA)},
			state: Prefetched, ids: "a"},
		{name: "single resource whose elements do not fit a Bundle's",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage(`{"resourceType":"Encounter","id":"e","status":"finished","type":[{"text":"ward stay"}],"link":{}}`)},
			state:    Prefetched, ids: "e"},
		{name: "Bundle with a non-string id fails",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage(`{"resourceType":"Bundle","id":5,"type":"searchset","entry":[{"resource":` + obsA + `}]}`)},
			state:    Failed},
		{name: "malformed Bundle fails",
			prefetch: map[string]json.RawMessage{"k": json.RawMessage(`{"resourceType":"Bundle","type":"searchset","entry":{"resource":` + obsA + `}}`)},
			state:    Failed},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var f Fetcher
			if tc.fetcher != nil {
				f = tc.fetcher
			}
			got, err := Resolve(context.Background(), oneKeyService(false), callWith(tc.prefetch), f, Limits{MaxPages: 5})
			if err != nil {
				t.Fatalf("Resolve: %v", err)
			}
			r := got[0]
			if r.State != tc.state || r.Partial != tc.partial {
				t.Errorf("state %s partial %v (%s), want %s partial %v", r.State, r.Partial, r.Reason, tc.state, tc.partial)
			}
			if ids := idsOf(t, r.Resources); ids != tc.ids {
				t.Errorf("resources %q, want %q", ids, tc.ids)
			}
			if tc.fetcher != nil && len(tc.fetcher.asked) != tc.wantAsked {
				t.Errorf("fetched %v, want %d fetches", tc.fetcher.asked, tc.wantAsked)
			}
		})
	}
}

func idsOf(t *testing.T, rs []fhirmap.BundleEntry) string {
	var ids []string
	for _, r := range rs {
		var h struct{ ID string }
		if err := json.Unmarshal(r.Resource, &h); err != nil {
			t.Fatal(err)
		}
		ids = append(ids, h.ID)
	}
	return strings.Join(ids, ",")
}

func TestResolvePageBound(t *testing.T) {
	bodies := map[string]string{}
	for i := 1; i <= 10; i++ {
		ref := fmt.Sprintf("https://ehr.example.org/fhir/Observation?page=%d", i)
		if i == 1 {
			ref = "Observation?patient=p1"
		}
		bodies[ref] = fmt.Sprintf(`{"resourceType":"Bundle","type":"searchset","link":[{"relation":"next","url":"https://ehr.example.org/fhir/Observation?page=%d"}],"entry":[{"resource":{"resourceType":"Observation","id":"o%d"}}]}`, i+1, i)
	}
	f := &mapFetcher{bodies: bodies}
	got, err := Resolve(context.Background(), oneKeyService(false), callWith(nil), f, Limits{MaxPages: 3})
	if err != nil {
		t.Fatal(err)
	}
	if len(f.asked) != 3 || len(got[0].Resources) != 3 || !got[0].Partial {
		t.Errorf("asked %d pages, %d resources, partial %v; want 3, 3, true", len(f.asked), len(got[0].Resources), got[0].Partial)
	}
}

// TestResolveRequiredIs412 follows CDS Hooks 2.0: a required key that is
// neither prefetched nor fetchable is answered 412 Precondition Failed.
func TestResolveRequiredIs412(t *testing.T) {
	for _, tc := range []struct {
		name     string
		prefetch map[string]json.RawMessage
		fetcher  Fetcher
	}{
		{"absent, no server", nil, nil},
		{"absent, fetch fails", nil, &mapFetcher{}},
		{"OperationOutcome", map[string]json.RawMessage{"k": json.RawMessage(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"timeout"}]}`)}, nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := Resolve(context.Background(), oneKeyService(true), callWith(tc.prefetch), tc.fetcher, Limits{MaxPages: 2})
			if StatusOf(err) != 412 {
				t.Fatalf("got %v (status %d), want 412", err, StatusOf(err))
			}
			if !strings.Contains(err.Error(), "k (") {
				t.Errorf("error %q does not name the key", err)
			}
		})
	}
	// null for a required key is "no data", not a failure.
	if _, err := Resolve(context.Background(), oneKeyService(true),
		callWith(map[string]json.RawMessage{"k": json.RawMessage("null")}), nil, Limits{MaxPages: 1}); err != nil {
		t.Errorf("null required key: %v", err)
	}
}

// budgetFetcher serves bodies after a delay each, taking their bytes from
// one call budget first, as the FHIR client does.
type budgetFetcher struct {
	budget *CallBudget
	bodies map[string]string
	delay  map[string]time.Duration
}

func (f *budgetFetcher) Fetch(_ context.Context, ref string) ([]byte, error) {
	time.Sleep(f.delay[ref])
	b := f.bodies[ref]
	if err := f.budget.Take(int64(len(b))); err != nil {
		return nil, fmt.Errorf("fetch %s: %w", ref, err)
	}
	return []byte(b), nil
}

// TestResolveRequiredKeysClaimTheBudgetFirst: an optional key whose answer
// would leave too little of the call's byte budget for a required one must
// not cost the call (the required key is read first; the optional one fails
// alone). The required key answers later than the optional one, which on a
// concurrent resolution let the optional one take the budget first.
func TestResolveRequiredKeysClaimTheBudgetFirst(t *testing.T) {
	svc := Service{ID: "t", Hooks: []string{HookPatientView}, Prefetch: []PrefetchKey{
		{Key: "optional", Template: "MedicationRequest?patient={{context.patientId}}", What: "orders"},
		{Key: "required", Template: "Observation?patient={{context.patientId}}", Required: true, What: "sodium"}}}
	required := `{"resourceType":"Bundle","type":"searchset","entry":[{"resource":` + obsA + `}]}`
	optional := `{"resourceType":"Bundle","type":"searchset","entry":[{"resource":` + obsB + `}],"x":"` + strings.Repeat("y", 200) + `"}`
	budget := NewCallBudget(NewProcessBudget(1<<20), int64(len(optional))+10) // room for either, not both
	f := &budgetFetcher{budget: budget,
		bodies: map[string]string{"Observation?patient=p1": required, "MedicationRequest?patient=p1": optional},
		delay:  map[string]time.Duration{"Observation?patient=p1": 50 * time.Millisecond}}
	out, err := Resolve(context.Background(), svc, callWith(nil), f, Limits{MaxPages: 1})
	if err != nil {
		t.Fatalf("the required key lost the budget to an optional one: %v", err)
	}
	if out[1].State != Fetched || out[0].State != Failed || !errors.Is(out[0].Err, ErrCallBudget) {
		t.Errorf("states: optional %s (%v), required %s", out[0].State, out[0].Err, out[1].State)
	}
}

// slowFetcher answers each query after a delay, or gives up when ctx ends.
type slowFetcher struct{ delay time.Duration }

func (f slowFetcher) Fetch(ctx context.Context, ref string) ([]byte, error) {
	select {
	case <-time.After(f.delay):
		return []byte(`{"resourceType":"Bundle","type":"searchset","entry":[{"resource":` + obsA + `}]}`), nil
	case <-ctx.Done():
		return nil, fmt.Errorf("fetch %s: %w", ref, ctx.Err())
	}
}

// TestResolveOptionalRoundCannotFailTheCall: read one after the other, an
// optional key that runs into the deadline is missing data, not a failed
// call (review finding: a 60-ms required and a 60-ms optional key under a
// 100-ms deadline); a failed required key skips the optional round.
func TestResolveOptionalRoundCannotFailTheCall(t *testing.T) {
	svc := Service{ID: "t", Hooks: []string{HookPatientView}, Prefetch: []PrefetchKey{
		{Key: "optional", Template: "MedicationRequest?patient={{context.patientId}}", What: "orders"},
		{Key: "required", Template: "Observation?patient={{context.patientId}}", Required: true, What: "sodium"}}}
	ctx, cancel := context.WithTimeout(context.Background(), 100*time.Millisecond)
	defer cancel()
	out, err := Resolve(ctx, svc, callWith(nil), slowFetcher{60 * time.Millisecond}, Limits{MaxPages: 1})
	if err != nil || out[1].State != Fetched || out[0].State != Failed {
		t.Errorf("err %v; required %s, optional %s (%s)", err, out[1].State, out[0].State, out[0].Reason)
	}
	f := &mapFetcher{bodies: map[string]string{}}
	if _, err := Resolve(context.Background(), svc, callWith(nil), f, Limits{MaxPages: 1}); StatusOf(err) != 412 || len(f.asked) != 1 {
		t.Errorf("err %v, asked %v: want 412 after the required key alone", err, f.asked)
	}
}
