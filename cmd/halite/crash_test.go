package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/feedback"
)

// TestCrashChildServe is the child of TestCrashLosesNothing: it runs
// `halite serve` until killed. It does nothing in a normal test run.
func TestCrashChildServe(t *testing.T) {
	if os.Getenv("HALITE_TEST_CRASH_CHILD") != "1" {
		t.Skip("only run as the child of TestCrashLosesNothing")
	}
	err := run(context.Background(), []string{"serve", "--addr", "127.0.0.1:0"}, os.Stdout, io.Discard)
	t.Fatalf("serve returned %v", err)
}

// TestCrashLosesNothing kills a serving child with SIGKILL in the middle of
// a load of service calls and feedback; every card and feedback whose HTTP
// response was 200 must be in the store after the restart, with commits
// synced (full) or only written to the WAL (normal): a crash of halite
// alone loses nothing either way.
func TestCrashLosesNothing(t *testing.T) {
	if testing.Short() {
		t.Skip("crash test")
	}
	for _, setting := range []string{feedback.SyncFull, feedback.SyncNormal} {
		t.Run(setting, func(t *testing.T) { crashLosesNothing(t, setting) })
	}
}

func crashLosesNothing(t *testing.T, synchronous string) {
	db := filepath.Join(t.TempDir(), "halite.db")
	cmd := exec.Command(os.Args[0], "-test.run=^TestCrashChildServe$")
	cmd.Env = append(os.Environ(), "HALITE_TEST_CRASH_CHILD=1", "HALITE_STORE_DSN=sqlite:"+db, "HALITE_CONFIG=",
		"HALITE_STORE_SQLITE_SYNCHRONOUS="+synchronous)
	out, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	line, err := bufio.NewReader(out).ReadString('\n')
	if err != nil || !strings.Contains(line, "listening on ") {
		cmd.Process.Kill()
		t.Fatalf("child did not start: %q %v", line, err)
	}
	base := strings.TrimSpace(line[strings.Index(line, "http://"):])
	var req bytes.Buffer
	scenario := filepath.Join("..", "..", "testdata", "scenarios", "14-hypona-3pct-overshoot.json")
	if err := run(context.Background(), []string{"request", "--hook", "order-sign", "--service", "sodium-infusion-check", scenario}, &req, io.Discard); err != nil {
		t.Fatal(err)
	}
	body := req.Bytes()

	var mu sync.Mutex
	var cards, feedbacks []string // acknowledged with 200
	stopLoad := make(chan struct{})
	var wg sync.WaitGroup
	client := &http.Client{Timeout: 5 * time.Second}
	for w := 0; w < 8; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for {
				select {
				case <-stopLoad:
					return
				default:
				}
				resp, err := client.Post(base+"/cds-services/sodium-infusion-check", "application/json", bytes.NewReader(body))
				if err != nil {
					return // the child is gone
				}
				var r hooks.Response
				ok := resp.StatusCode == 200 && json.NewDecoder(resp.Body).Decode(&r) == nil
				resp.Body.Close()
				if !ok || len(r.Cards) == 0 {
					continue
				}
				mu.Lock()
				for _, c := range r.Cards {
					cards = append(cards, c.UUID)
				}
				mu.Unlock()
				fb := fmt.Sprintf(`{"feedback":[{"card":%q,"outcome":"overridden","overrideReason":{"userComment":"load"},"outcomeTimestamp":"2026-12-02T10:00:00Z"}]}`, r.Cards[0].UUID)
				if resp, err := client.Post(base+"/cds-services/sodium-infusion-check/feedback", "application/json", strings.NewReader(fb)); err == nil {
					if resp.StatusCode == 200 {
						mu.Lock()
						feedbacks = append(feedbacks, r.Cards[0].UUID)
						mu.Unlock()
					}
					resp.Body.Close()
				}
			}
		}()
	}
	time.Sleep(1500 * time.Millisecond)
	if err := cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	cmd.Wait()
	close(stopLoad)
	wg.Wait()

	st, err := feedback.OpenSQLite(db, feedback.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	lost := 0
	for _, id := range cards {
		if !st.HasCard(context.Background(), id) {
			lost++
		}
	}
	lostFB := 0
	for _, id := range feedbacks {
		if !st.HasFeedback(context.Background(), id) {
			lostFB++
		}
	}
	t.Logf("acknowledged before SIGKILL: %d cards, %d feedback; lost: %d cards, %d feedback", len(cards), len(feedbacks), lost, lostFB)
	if len(cards) < 20 || len(feedbacks) < 10 {
		t.Fatalf("too little load to prove anything: %d cards, %d feedback", len(cards), len(feedbacks))
	}
	if lost != 0 || lostFB != 0 {
		t.Errorf("lost %d acknowledged cards and %d acknowledged feedback records", lost, lostFB)
	}
}
