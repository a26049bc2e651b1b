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
		stop()
	}
	cfg := defaultConfig()
	cfg.AdminPprof = true
	if err := cfg.validate(); err == nil {
		t.Error("admin_pprof without admin_listen_addr was accepted")
	}
}
