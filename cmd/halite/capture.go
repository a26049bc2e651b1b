package main

import (
	"bytes"
	"encoding/json"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"sync"
	"time"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/deid"
)

// capturer writes each answered call, de-identified, to a directory as a
// suite case (DIR/NNNN-SERVICE.json) with its expectations
// (DIR/expected/NNNN-SERVICE.json: the shifted time and the cards given),
// so that `halite suite DIR` replays them.
type capturer struct {
	dir     string
	session *deid.Session
	log     *slog.Logger
	mu      sync.Mutex
	n       int
}

// newCapturer prepares dir (and its expected/ subdirectory).
func newCapturer(dir string, log *slog.Logger) (*capturer, error) {
	if err := os.MkdirAll(filepath.Join(dir, "expected"), 0o700); err != nil {
		return nil, fmt.Errorf("capture_dir: %w", err)
	}
	for _, d := range []string{dir, filepath.Join(dir, "expected")} {
		if err := os.Chmod(d, 0o700); err != nil {
			return nil, fmt.Errorf("capture_dir: %w", err)
		}
	}
	s, err := deid.NewSession()
	if err != nil {
		return nil, err
	}
	// Numbering continues after an earlier run's files, never over them.
	existing, _ := filepath.Glob(filepath.Join(dir, "*.json"))
	return &capturer{dir: dir, session: s, log: log, n: len(existing)}, nil
}

// capture de-identifies and writes one call; a failure is logged, never
// the call's.
func (c *capturer) capture(service string, body []byte, at time.Time, resp hooks.Response) {
	out, shifted, err := c.session.Request(body, at)
	if err != nil {
		c.log.Warn("capture: call not written", "error", err.Error())
		return
	}
	var h hookExpectation
	for _, card := range resp.Cards {
		rule, _ := haliteRule(card)
		h.Cards = append(h.Cards, cardExpectation{Rule: rule, Service: service, Indicator: card.Indicator})
	}
	h.None = len(h.Cards) == 0
	var hook struct {
		Hook string `json:"hook"`
	}
	_ = json.Unmarshal(out, &hook)
	var exp bytes.Buffer
	if err := writeJSON(&exp, expectations{At: shifted.Format(time.RFC3339), Service: service, Hooks: map[string]hookExpectation{hook.Hook: h}}); err != nil {
		c.log.Warn("capture: call not written", "error", err.Error())
		return
	}
	c.mu.Lock()
	c.n++
	name := fmt.Sprintf("%04d-%s.json", c.n, service)
	c.mu.Unlock()
	for _, f := range []struct {
		path string
		data []byte
	}{{filepath.Join(c.dir, name), out}, {filepath.Join(c.dir, "expected", name), exp.Bytes()}} {
		if err := writeNew(f.path, f.data); err != nil {
			c.log.Warn("capture: call not written", "error", err.Error())
			return
		}
		// The real call time stays out of the files' times too: with it,
		// the shifted time would give the patient's offset away.
		if err := os.Chtimes(f.path, shifted, shifted); err != nil {
			c.log.Warn("capture: file time not reset", "error", err.Error())
		}
	}
}

// writeNew writes data to a file that must not exist yet, readable by its
// owner only.
func writeNew(path string, data []byte) error {
	f, err := os.OpenFile(path, os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o600)
	if err != nil {
		return err
	}
	if _, err := f.Write(data); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}
