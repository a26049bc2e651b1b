package main

import (
	"io"
	"log/slog"
	"net/http"
	"testing"
)

// TestAdminListener: /metrics is served on the admin listener; Go's
// profiles only when admin_pprof is set; admin_pprof without an admin
// listener is refused (profiles never reach the main listener).
func TestAdminListener(t *testing.T) {
	metrics := http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) { io.WriteString(w, "# metrics\n") })
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	for _, withPprof := range []bool{false, true} {
		addr, stop, err := serveAdmin("127.0.0.1:0", metrics, withPprof, log)
		if err != nil {
			t.Fatal(err)
		}
		get := func(path string) int {
			resp, err := http.Get("http://" + addr + path)
			if err != nil {
				t.Fatal(err)
			}
			resp.Body.Close()
			return resp.StatusCode
		}
		want := http.StatusNotFound
		if withPprof {
			want = http.StatusOK
		}
		if m, p := get("/metrics"), get("/debug/pprof/"); m != http.StatusOK || p != want {
			t.Errorf("pprof %v: /metrics %d, /debug/pprof/ %d (want %d)", withPprof, m, p, want)
		}
		if withPprof {
			if got := get("/debug/pprof/profile?seconds=86400"); got != http.StatusBadRequest {
				t.Errorf("a day-long CPU profile: %d, want 400", got)
			}
		}
		stop()
	}
	for addr, ok := range map[string]bool{"": false, ":9090": false, "0.0.0.0:9090": false, "203.0.113.7:9090": false,
		"127.0.0.1:9090": true, "10.1.2.3:9090": true} {
		cfg := defaultConfig()
		cfg.deriveBudgets(0)
		cfg.AdminPprof, cfg.AdminAddr = true, addr
		if err := cfg.validate(); (err == nil) != ok {
			t.Errorf("admin_pprof on %q: %v; want accepted %v", addr, err, ok)
		}
	}
}
