package main

import (
	"database/sql"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"runtime/debug"
	"sort"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"
)

// privatePostgres is a PostgreSQL server this test started for itself, so
// that it can stop and resume it (SIGSTOP, SIGCONT) without touching the
// one other tests share.
type privatePostgres struct {
	dsn, data string
	as        []string // run as the postgres user when root
	bin       string
}

// startPrivatePostgres starts a PostgreSQL server from the Debian
// packages on a free loopback port; it is skipped where there are none
// (and fails in CI, which installs them).
func startPrivatePostgres(t *testing.T) *privatePostgres {
	t.Helper()
	bins, _ := filepath.Glob("/usr/lib/postgresql/*/bin")
	if len(bins) == 0 {
		if os.Getenv("CI") == "true" {
			t.Fatal("CI must run the outage test: no PostgreSQL under /usr/lib/postgresql")
		}
		t.Skip("no PostgreSQL server installed")
	}
	sort.Strings(bins)
	p := &privatePostgres{bin: bins[len(bins)-1]}
	data, err := os.MkdirTemp("", "halite-outage-pg-")
	if err != nil {
		t.Fatal(err)
	}
	p.data = data
	t.Cleanup(func() { os.RemoveAll(data) })
	if os.Geteuid() == 0 {
		if out, err := exec.Command("chown", "postgres", data).CombinedOutput(); err != nil {
			t.Fatalf("chown: %v %s", err, out)
		}
		p.as = []string{"runuser", "-u", "postgres", "--"}
	}
	if out, err := p.cmd("initdb", "-D", data, "-A", "trust", "-U", "halite").CombinedOutput(); err != nil {
		t.Fatalf("initdb: %v %s", err, out)
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	port := ln.Addr().(*net.TCPAddr).Port
	ln.Close()
	if out, err := p.cmd("pg_ctl", "-D", data, "-o", fmt.Sprintf("-p %d -k %s -c listen_addresses=127.0.0.1", port, data),
		"-l", filepath.Join(data, "log"), "-w", "start").CombinedOutput(); err != nil {
		t.Fatalf("pg_ctl start: %v %s", err, out)
	}
	t.Cleanup(func() {
		p.signal(t, syscall.SIGCONT)
		p.cmd("pg_ctl", "-D", data, "-m", "immediate", "stop").Run()
	})
	p.dsn = fmt.Sprintf("postgres://halite@127.0.0.1:%d/postgres?sslmode=disable", port)
	return p
}

func (p *privatePostgres) cmd(name string, args ...string) *exec.Cmd {
	argv := append(append(append([]string{}, p.as...), filepath.Join(p.bin, name)), args...)
	return exec.Command(argv[0], argv[1:]...)
}

// signal sends sig to the server and every process it started: stopped,
// the database accepts connections (the kernel queues them) and answers
// nothing — the outside testers' "hung PostgreSQL".
func (p *privatePostgres) signal(t *testing.T, sig syscall.Signal) {
	data, err := os.ReadFile(filepath.Join(p.data, "postmaster.pid"))
	if err != nil {
		return
	}
	pid, _ := strconv.Atoi(strings.SplitN(string(data), "\n", 2)[0])
	if pid <= 0 {
		return
	}
	syscall.Kill(pid, sig) // the postmaster first, so that it starts no new backend
	out, _ := exec.Command("pgrep", "-P", strconv.Itoa(pid)).Output()
	for _, f := range strings.Fields(string(out)) {
		if c, err := strconv.Atoi(f); err == nil {
			syscall.Kill(c, sig)
		}
	}
}

// callResult is one call of the load.
type callResult struct {
	at, took   time.Duration // since the load began
	status     int
	retryAfter string
	err        error
}

// TestStoreOutageUnderLoad pauses the store under a steady load of
// authenticated calls — a PostgreSQL server stopped with SIGSTOP, and a
// SQLite database locked by another connection — and checks that every
// call is answered within call_timeout plus a margin, with 503 and
// Retry-After while the store is out (never 401), that /readyz fails
// while PostgreSQL does not answer, that the process's memory stays
// bounded, and that calls succeed again once the store is back, with no
// restart.
func TestStoreOutageUnderLoad(t *testing.T) {
	if testing.Short() {
		t.Skip("a 12-second load")
	}
	for _, backend := range []string{"postgres", "sqlite"} {
		t.Run(backend, func(t *testing.T) { storeOutageUnderLoad(t, backend) })
	}
}

func storeOutageUnderLoad(t *testing.T, backend string) {
	const (
		callTimeout = time.Second
		margin      = 3 * time.Second // a two-core machine running the other packages' tests beside, with -race
		rate        = 60              // calls per second
		before      = 2 * time.Second
		outage      = 5 * time.Second
		after       = 4 * time.Second
	)
	defer debug.SetMemoryLimit(debug.SetMemoryLimit(deployedMemoryLimit))
	defer debug.SetGCPercent(debug.SetGCPercent(deployedGOGC))
	t.Setenv("HALITE_CONFIG", "")
	t.Setenv("HALITE_CALL_TIMEOUT", callTimeout.String())
	var pause, resume func()
	switch backend {
	case "postgres":
		pg := startPrivatePostgres(t)
		t.Setenv("HALITE_STORE_DSN", pg.dsn)
		pause, resume = func() { pg.signal(t, syscall.SIGSTOP) }, func() { pg.signal(t, syscall.SIGCONT) }
	case "sqlite":
		path := filepath.Join(t.TempDir(), "halite.db")
		t.Setenv("HALITE_STORE_DSN", "sqlite:"+path)
		var lock *sql.Tx
		var db *sql.DB
		pause = func() {
			var err error
			if db, err = sql.Open("sqlite", "file:"+path+"?_pragma=busy_timeout(10000)"); err != nil {
				t.Fatal(err)
			}
			if lock, err = db.Begin(); err != nil {
				t.Fatal(err)
			}
			// The write lock, held: every other writer waits on it.
			if _, err := lock.Exec(`DELETE FROM card_log WHERE card_uuid = 'none'`); err != nil {
				t.Fatal(err)
			}
		}
		resume = func() { lock.Rollback(); db.Close() }
	}
	dir, cfgPath := localIssuer(t)
	base, logs, stop := startServe(t, "--config", cfgPath)
	sign, err := signer(filepath.Join(dir, "issuer-private.jwk"), "https://ehr.example.org", "http://127.0.0.1/cds-services/sodium-infusion-check")
	if err != nil {
		t.Fatal(err)
	}
	total := before + outage + after
	const recoveryCalls = 5
	n := int(total.Seconds()) * rate
	tokens := make([]string, n+recoveryCalls)
	var g sync.WaitGroup
	for w := range runtime.GOMAXPROCS(0) {
		g.Go(func() {
			for i := w; i < len(tokens); i += runtime.GOMAXPROCS(0) {
				var err error
				if tokens[i], err = sign(2 * time.Minute); err != nil {
					t.Error(err)
					return
				}
			}
		})
	}
	g.Wait()
	demo, _ := os.ReadFile(filepath.Join("..", "..", "testdata", "demo", "order-sign-request.json"))
	client := &http.Client{Timeout: 10 * time.Second, Transport: &http.Transport{MaxIdleConnsPerHost: 200}}
	var start time.Time
	call := func(token string) callResult {
		req, _ := http.NewRequest(http.MethodPost, base+"/cds-services/sodium-infusion-check", strings.NewReader(string(demo)))
		req.Header.Set("Content-Type", "application/json")
		req.Header.Set("Authorization", "Bearer "+token)
		r := callResult{at: time.Since(start)}
		resp, err := client.Do(req)
		r.took = time.Since(start) - r.at
		if err != nil {
			r.err = err
			return r
		}
		io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		r.status, r.retryAfter = resp.StatusCode, resp.Header.Get("Retry-After")
		return r
	}
	ready := func() int {
		resp, err := client.Get(base + "/readyz")
		if err != nil {
			return 0
		}
		resp.Body.Close()
		return resp.StatusCode
	}
	if got := ready(); got != 200 {
		t.Fatalf("readyz %d before the outage", got)
	}

	runtime.GC()
	heap := watchHeap()
	results := make([]callResult, n)
	start = time.Now()
	tick := time.NewTicker(time.Second / rate)
	var calls sync.WaitGroup
	paused, resumed := false, false
	var readyDuring, readyAfter int
	for i := range n {
		<-tick.C
		since := time.Since(start)
		if !paused && since >= before {
			pause()
			paused = true
			calls.Go(func() { time.Sleep(outage / 2); readyDuring = ready() })
		}
		if !resumed && since >= before+outage {
			resume()
			resumed = true
			calls.Go(func() { time.Sleep(after / 2); readyAfter = ready() })
		}
		calls.Go(func() { results[i] = call(tokens[i]) })
	}
	tick.Stop()
	calls.Wait()
	if !resumed {
		resume()
	}
	peak := heap.Stop()
	// Recovered with no restart: once /readyz says so, calls succeed again.
	for deadline := time.Now().Add(10 * time.Second); ready() != 200 && time.Now().Before(deadline); {
		time.Sleep(100 * time.Millisecond)
	}
	for i := range recoveryCalls {
		if r := call(tokens[n+i]); r.err != nil || r.status != 200 {
			t.Errorf("after the outage, call %d: status %d, %v; want 200 (recovered without restart)", i, r.status, r.err)
		}
	}

	statuses := map[string]map[int]int{"before": {}, "outage": {}, "after": {}}
	var slowest time.Duration
	var lastFailure time.Duration
	for _, r := range results {
		phase := "before"
		switch {
		case r.at >= before+outage:
			phase = "after"
		case r.at >= before:
			phase = "outage"
		}
		if r.err != nil {
			t.Errorf("call at %v got no answer: %v", r.at, r.err)
			continue
		}
		statuses[phase][r.status]++
		slowest = max(slowest, r.took)
		switch {
		case r.status == http.StatusServiceUnavailable && r.retryAfter == "":
			t.Errorf("a 503 at %v has no Retry-After", r.at)
		case r.status != 200 && r.status != http.StatusServiceUnavailable:
			t.Errorf("call at %v answered %d; want 200 or 503 (never 401 for a store outage)", r.at, r.status)
		}
		if r.status != 200 {
			lastFailure = max(lastFailure, r.at)
		}
	}
	t.Logf("%s: statuses %v; slowest answer %v; readyz during %d, after %d; memory %v; last failed call started %v after the store came back",
		backend, statuses, slowest, readyDuring, readyAfter, peak, lastFailure-(before+outage))
	if slowest > callTimeout+margin {
		t.Errorf("slowest answer %v; want within call_timeout %v + %v", slowest, callTimeout, margin)
	}
	if statuses["before"][200] == 0 || statuses["outage"][http.StatusServiceUnavailable] == 0 {
		t.Errorf("want 200s before and 503s during the outage: %v", statuses)
	}
	if backend == "postgres" && (readyDuring != http.StatusServiceUnavailable || readyAfter != 200) {
		t.Errorf("readyz %d during the outage and %d after; want 503 then 200", readyDuring, readyAfter)
	}
	checkPeaks(t, backend, peak)
	resp, err := client.Get(base + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	metrics, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if !strings.Contains(string(metrics), `halite_unavailable_total{`) || !strings.Contains(string(metrics), `reason="store-timeout"`) {
		t.Errorf("the 503s are not counted by reason in /metrics")
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	l := logs.String()
	if !strings.Contains(l, `"error":"transient store-timeout"`) || !strings.Contains(l, `"level":"ERROR"`) {
		t.Errorf("503s are not logged at ERROR with their reason:\n%.3000s", l)
	}
}
