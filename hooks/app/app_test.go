package app

import (
	"compress/gzip"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
)

// TestHandler: every page and asset is served with its type and a strict
// Content-Security-Policy naming only the origins given; the WebAssembly
// module goes gzipped to a client that accepts it and plain to one that
// does not; nothing outside the assets is served.
func TestHandler(t *testing.T) {
	h := Handler([]string{"https://fhir.example.org"})
	get := func(path, encoding string) *httptest.ResponseRecorder {
		r := httptest.NewRequest(http.MethodGet, path, nil)
		if encoding != "" {
			r.Header.Set("Accept-Encoding", encoding)
		}
		w := httptest.NewRecorder()
		h.ServeHTTP(w, r)
		return w
	}
	for path, ct := range map[string]string{
		"/app/":             "text/html; charset=utf-8",
		"/app/launch.html":  "text/html; charset=utf-8",
		"/app/app.js":       "text/javascript; charset=utf-8",
		"/app/launch.js":    "text/javascript; charset=utf-8",
		"/app/wasm_exec.js": "text/javascript; charset=utf-8",
		"/app/style.css":    "text/css; charset=utf-8",
	} {
		w := get(path, "")
		if w.Code != 200 || w.Header().Get("Content-Type") != ct || w.Body.Len() == 0 {
			t.Errorf("%s: %d %q (%d bytes)", path, w.Code, w.Header().Get("Content-Type"), w.Body.Len())
		}
		csp := w.Header().Get("Content-Security-Policy")
		for _, want := range []string{"default-src 'none'", "script-src 'self' 'wasm-unsafe-eval'", "connect-src 'self' https://fhir.example.org;", "object-src 'none'"} {
			if !strings.Contains(csp+";", want) {
				t.Errorf("%s: CSP %q lacks %q", path, csp, want)
			}
		}
		if strings.Contains(csp, "unsafe-inline") || strings.Contains(csp, "*") {
			t.Errorf("%s: CSP %q allows inline code or any host", path, csp)
		}
		if w.Header().Get("Referrer-Policy") != "no-referrer" || w.Header().Get("X-Content-Type-Options") != "nosniff" {
			t.Errorf("%s: headers %v", path, w.Header())
		}
	}
	gz := get("/app/halite.wasm", "gzip, br")
	if gz.Code != 200 || gz.Header().Get("Content-Encoding") != "gzip" || gz.Header().Get("Content-Type") != "application/wasm" {
		t.Fatalf("wasm (gzip): %d %v", gz.Code, gz.Header())
	}
	zr, err := gzip.NewReader(gz.Body)
	if err != nil {
		t.Fatal(err)
	}
	unzipped, _ := io.ReadAll(zr)
	plain := get("/app/halite.wasm", "")
	if plain.Header().Get("Content-Encoding") != "" || string(plain.Body.Bytes()) != string(unzipped) || !strings.HasPrefix(string(unzipped), "\x00asm") {
		t.Errorf("wasm (plain): %d bytes, encoding %q; a WebAssembly module of %d bytes wanted", plain.Body.Len(), plain.Header().Get("Content-Encoding"), len(unzipped))
	}
	for _, path := range []string{"/app/halite.wasm.gz", "/app/../go.mod", "/app/x/app.js", "/app/missing.js", "/app/README"} {
		if w := get(path, ""); w.Code != 404 {
			t.Errorf("%s: %d, want 404", path, w.Code)
		}
	}
	r := httptest.NewRequest(http.MethodPost, "/app/", nil)
	w := httptest.NewRecorder()
	h.ServeHTTP(w, r)
	if w.Code != 405 {
		t.Errorf("POST: %d", w.Code)
	}
}
