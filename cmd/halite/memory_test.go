package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"runtime"
	"runtime/debug"
	"runtime/metrics"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks"
)

// deployedMemoryLimit is GOMEMLIMIT in deploy/k8s/base, podMemoryLimit
// the pod's memory limit there, deployedGOGC its GOGC.
const (
	deployedMemoryLimit = 100 << 20
	podMemoryLimit      = 128 << 20
	deployedGOGC        = 200
)

// checkPeaks fails a case whose live heap passed GOMEMLIMIT (the runtime
// could then no longer keep the process under it) or whose memory passed
// the pod's limit (the pod would be killed).
func checkPeaks(t *testing.T, name string, p memoryPeaks) {
	t.Helper()
	if p.live > deployedMemoryLimit || p.held > podMemoryLimit {
		t.Errorf("%s: %v; want the live heap under %d MiB and all under %d MiB", name, p, deployedMemoryLimit>>20, podMemoryLimit>>20)
	}
}

// memoryPeaks are what the Go runtime reported at its highest while a
// case ran: held is all its memory less what it returned to the OS (what
// the pod's limit counts); live is the heap found live by a collection
// (what GOMEMLIMIT cannot make smaller by collecting more often).
type memoryPeaks struct{ held, live uint64 }

func (m memoryPeaks) String() string {
	return fmt.Sprintf("held %.1f MiB, live heap %.1f MiB", float64(m.held)/(1<<20), float64(m.live)/(1<<20))
}

// heapWatch samples runtime/metrics (which stops nothing) every
// millisecond until stopped.
type heapWatch struct {
	stop chan struct{}
	done chan memoryPeaks
}

func watchHeap() *heapWatch {
	h := &heapWatch{stop: make(chan struct{}), done: make(chan memoryPeaks)}
	go func() {
		s := []metrics.Sample{{Name: "/memory/classes/total:bytes"}, {Name: "/memory/classes/heap/released:bytes"}, {Name: "/gc/heap/live:bytes"}}
		var p memoryPeaks
		t := time.NewTicker(time.Millisecond)
		defer t.Stop()
		for {
			metrics.Read(s)
			p.held = max(p.held, s[0].Value.Uint64()-s[1].Value.Uint64())
			p.live = max(p.live, s[2].Value.Uint64())
			select {
			case <-h.stop:
				runtime.GC() // the last case's data, found live or not
				metrics.Read(s)
				p.live = max(p.live, s[2].Value.Uint64())
				h.done <- p
				return
			case <-t.C:
			}
		}
	}()
	return h
}

func (h *heapWatch) Stop() memoryPeaks { close(h.stop); return <-h.done }

// bigFHIR is a FHIR server whose searches answer with large Bundles of
// sodium Observations for the patient, and whose reads answer from the
// scenario. Mode (the first path segment) picks the answer:
// "oversize" streams 300 MB without a length; "under" answers every search
// just under the response limit; "pages" answers that much per page,
// with a next link, ten pages deep.
type bigFHIR struct {
	store http.Handler
	under []byte // one Bundle just under the response limit
	entry []byte // one entry and a comma
}

func newBigFHIR(t *testing.T, scenario string, limit int64) *httptest.Server {
	b := readScenario(t, scenario)
	f := &bigFHIR{store: hooks.NewBundleStore(b)}
	f.entry = []byte(`{"resource":{"resourceType":"Observation","id":"o","status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2951-2"}]},` +
		`"subject":{"reference":"Patient/pt-alder"},"effectiveDateTime":"2026-11-19T06:00:00Z","valueQuantity":{"value":128,"unit":"mmol/L","system":"http://unitsofmeasure.org","code":"mmol/L"}}},`)
	var buf bytes.Buffer
	buf.WriteString(`{"resourceType":"Bundle","type":"searchset","entry":[`)
	for int64(buf.Len()+len(f.entry)+8) < limit-1024 {
		buf.Write(f.entry)
	}
	buf.Truncate(buf.Len() - 1) // the last comma
	buf.WriteString(`]}`)
	f.under = buf.Bytes()
	srv := httptest.NewServer(f)
	t.Cleanup(srv.Close)
	return srv
}

func (f *bigFHIR) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	mode, rest, _ := strings.Cut(strings.TrimPrefix(r.URL.Path, "/"), "/")
	if r.URL.RawQuery == "" { // a read: the scenario's resource
		r.URL.Path = "/" + rest
		f.store.ServeHTTP(w, r)
		return
	}
	w.Header().Set("Content-Type", "application/fhir+json")
	switch mode {
	case "oversize":
		w.Write([]byte(`{"resourceType":"Bundle","type":"searchset","entry":[`))
		for n := 0; n < 300<<20; n += len(f.entry) {
			if _, err := w.Write(f.entry); err != nil {
				return // halite stopped reading
			}
		}
	case "under":
		w.Header().Set("Content-Length", fmt.Sprint(len(f.under)))
		w.Write(f.under)
	case "pages":
		if len(r.URL.Query()["page"]) >= 9 { // the tenth page is the last
			w.Header().Set("Content-Length", fmt.Sprint(len(f.under)))
			w.Write(f.under)
			return
		}
		// The same page with a next link written before its entries, from
		// the one buffer: the server holds no copy per page.
		head := []byte(`{"resourceType":"Bundle","type":"searchset","entry":[`)
		link := []byte(`{"resourceType":"Bundle","type":"searchset","link":[{"relation":"next","url":"http://` + r.Host + r.URL.Path +
			"?" + r.URL.RawQuery + `&page=1"}],"entry":[`)
		w.Header().Set("Content-Length", fmt.Sprint(len(f.under)-len(head)+len(link)))
		w.Write(link)
		w.Write(f.under[len(head):])
	}
}

// TestMemoryBudgetsHold runs the outside testers' memory cases through
// `halite serve` with the deployed runtime settings (GOMEMLIMIT 100MiB,
// GOGC 200; budgets derived from them: 20 MiB for all calls, 5 MiB a
// call and a response): an endless answer, answers just under the limit
// on every key, ten such pages, and three such calls at once. Each call is
// answered, and what the process holds stays under the memory limit.
func TestMemoryBudgetsHold(t *testing.T) {
	if testing.Short() {
		t.Skip("moves hundreds of megabytes")
	}
	defer debug.SetMemoryLimit(debug.SetMemoryLimit(deployedMemoryLimit))
	defer debug.SetGCPercent(debug.SetGCPercent(deployedGOGC))
	t.Setenv("HALITE_CONFIG", "")
	cfg := defaultConfig()
	cfg.deriveBudgets(deployedMemoryLimit)
	const scenario = "01-chronic-hypona-3pct-infusion.json"
	fhir := newBigFHIR(t, scenario, cfg.FHIRClient.MaxResponseBytes)
	base, logs, stop := startServe(t)
	request := func(mode string) []byte {
		var out bytes.Buffer
		if err := run(context.Background(), []string{"request", "--hook", "order-sign", "--no-prefetch",
			"--fhir-server", fhir.URL + "/" + mode, "--access-token", "tok", "--service", "sodium-infusion-check",
			filepath.Join("..", "..", "testdata", "scenarios", scenario)}, &out, io.Discard); err != nil {
			t.Fatal(err)
		}
		return out.Bytes()
	}
	call := func(body []byte) (int, string) {
		resp, err := http.Post(base+"/cds-services/sodium-infusion-check", "application/json", bytes.NewReader(body))
		if err != nil {
			t.Error(err)
			return 0, ""
		}
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		return resp.StatusCode, string(b)
	}
	for _, tc := range []struct {
		mode  string
		calls int
	}{{"oversize", 1}, {"under", 1}, {"pages", 1}, {"under", 3}, {"pages", 3}} {
		name := fmt.Sprintf("%s x%d", tc.mode, tc.calls)
		body := request(tc.mode)
		runtime.GC()
		h := watchHeap()
		var wg sync.WaitGroup
		for range tc.calls {
			wg.Go(func() {
				status, b := call(body)
				// Answered either way: with cards from what fitted, or 412 when
				// the required sodium data did not fit, or 503 when other calls
				// held the process's budget.
				if status != 200 && status != 412 && status != 503 {
					t.Errorf("%s: status %d: %.300s", name, status, b)
				}
				t.Logf("%s: status %d %.160s", name, status, b)
			})
		}
		wg.Wait()
		peak := h.Stop()
		t.Logf("%s: %v (GOMEMLIMIT %d MiB, pod limit %d MiB)", name, peak, deployedMemoryLimit>>20, podMemoryLimit>>20)
		checkPeaks(t, name, peak)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(logs.String(), `"process_bytes":20971520`) {
		t.Errorf("serve did not derive its budgets from the memory limit:\n%.2000s", logs.String())
	}
	var line map[string]any
	for _, l := range strings.Split(logs.String(), "\n") {
		if strings.Contains(l, "tok") && json.Unmarshal([]byte(l), &line) == nil && strings.Contains(fmt.Sprint(line), "Bearer tok") {
			t.Errorf("log holds the access token: %s", l)
		}
	}
}
