package hooks

import (
	"context"
	"encoding/json"
	"net/http/httptest"
	"path/filepath"
	"reflect"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks/fhirclient"
	"github.com/halite-cds/halite/rules"
)

// TestPrefetchFetchEquivalence answers every scenario twice: once with the
// data prefetched, once with no prefetch and a FHIR server (serving the same
// bundle by search, in pages of three, behind a bearer token). CDS Hooks 2.0
// requires prefetched data to equal the template's result against
// fhirServer, so both must give the same facts and the same response.
var uuidPattern = regexp.MustCompile(`"uuid":"[0-9a-f-]{36}"`)

func TestPrefetchFetchEquivalence(t *testing.T) {
	files, err := filepath.Glob(filepath.Join("..", "testdata", "scenarios", "*.json"))
	if err != nil || len(files) == 0 {
		t.Fatalf("no scenarios: %v", err)
	}
	const token = "test-access-token"
	newFetcher := func(server string, auth *FHIRAuthorization, _ Caller, _ *CallBudget) (Fetcher, error) {
		return fhirclient.New(server, auth.AccessToken, fhirclient.Options{
			Timeout: 5 * time.Second, MaxResponseBytes: 1 << 20, AllowHTTPLoopback: true})
	}
	withFetch := testEngine(t, newFetcher)
	prefetchOnly := testEngine(t, nil)
	for _, file := range files {
		b := loadScenario(t, filepath.Base(file))
		store := NewBundleStore(b)
		store.PageSize, store.Token = 3, token
		fhir := httptest.NewServer(store)
		for _, svc := range NewRegistry(nil, nil).Services() {
			for _, hook := range svc.Hooks {
				name := filepath.Base(file) + "/" + svc.ID + "/" + hook
				opt := RequestOptions{Hook: hook, UserID: "Practitioner/test-user"}
				pre, err := BuildRequest(b, svc, opt)
				if err != nil {
					t.Errorf("%s: %v", name, err)
					continue
				}
				opt.OmitPrefetch, opt.FHIRServer, opt.AccessToken = true, fhir.URL+"/fhir/r4", token
				fet, err := BuildRequest(b, svc, opt)
				if err != nil {
					t.Fatalf("%s: %v", name, err)
				}
				a, err := prefetchOnly.Handle(context.Background(), svc.ID, mustMarshal(t, pre), scenarioAt)
				if err != nil {
					t.Fatalf("%s prefetched: %v", name, err)
				}
				f, err := withFetch.Handle(context.Background(), svc.ID, mustMarshal(t, fet), scenarioAt)
				if err != nil {
					t.Fatalf("%s fetched: %v", name, err)
				}
				for _, k := range f.Keys {
					if k.State != Fetched || k.Partial {
						t.Errorf("%s: key %s %s partial=%v (%s)", name, k.Key.Key, k.State, k.Partial, k.Reason)
					}
				}
				// Scenario 09's draft names its product by a Medication reference
				// (0.9% NaCl with KCl, two ingredients): prefetch carries it in
				// draftOrders, the fetch path must read Medication/{id}.
				if strings.HasPrefix(filepath.Base(file), "09-") && hook != HookPatientView {
					for _, o := range []*Outcome{a, f} {
						d := o.Facts.DraftOrders
						if len(d) != 1 || d[0].Medication.Source != rules.FromReferenced || len(d[0].Medication.Ingredients) != 2 {
							t.Errorf("%s: referenced Medication not resolved: %+v", name, d)
						}
					}
				}
				if !reflect.DeepEqual(a.Facts, f.Facts) {
					t.Errorf("%s: facts differ\nprefetch: %+v\nfetched:  %+v", name, a.Facts, f.Facts)
				}
				ra, _ := json.Marshal(a.Response)
				rf, _ := json.Marshal(f.Response)
				// Card uuids are random per call; everything else must match.
				ra, rf = uuidPattern.ReplaceAll(ra, []byte(`"uuid":"-"`)), uuidPattern.ReplaceAll(rf, []byte(`"uuid":"-"`))
				if string(ra) != string(rf) {
					t.Errorf("%s: responses differ\n%s\n%s", name, ra, rf)
				}
			}
		}
		fhir.Close()
	}
}
