// Package app serves halite's sodium course, a SMART on FHIR app, from
// assets embedded in the binary (dist/, built from src/ by `npm run build`
// in this directory; CI rebuilds it and fails if it differs). The page
// reads FHIR with the clinician's token in the browser and computes with
// halite's own rules compiled to WebAssembly; it sends no patient data to
// halite.
package app

import (
	"compress/gzip"
	"embed"
	"io"
	"io/fs"
	"net/http"
	"path"
	"strings"
)

//go:embed dist
var dist embed.FS

// Path is where the app is served; LaunchPath is its SMART launch URL's path.
const (
	Path       = "/app/"
	LaunchPath = Path + "launch.html"
)

// contentTypes are the types of the files dist holds.
var contentTypes = map[string]string{
	".html": "text/html; charset=utf-8",
	".js":   "text/javascript; charset=utf-8",
	".css":  "text/css; charset=utf-8",
	".wasm": "application/wasm",
}

// Handler serves the app under Path. connect lists the origins the page
// may call (FHIR servers and their authorization servers) besides its own:
// its Content-Security-Policy allows no other host, no inline script or
// style, and WebAssembly only as compiled from halite's own module.
func Handler(connect []string) http.Handler {
	files, err := fs.Sub(dist, "dist")
	if err != nil {
		panic("app: embedded assets missing: " + err.Error()) // a build defect, caught by every test
	}
	csp := strings.Join([]string{
		"default-src 'none'",
		"script-src 'self' 'wasm-unsafe-eval'",
		"style-src 'self'",
		"img-src 'self' data:",
		"connect-src " + strings.Join(append([]string{"'self'"}, connect...), " "),
		"base-uri 'none'",
		"form-action 'none'",
		"object-src 'none'",
	}, "; ")
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.Method != http.MethodGet && r.Method != http.MethodHead {
			http.Error(w, "method not allowed", http.StatusMethodNotAllowed)
			return
		}
		name := strings.TrimPrefix(r.URL.Path, Path)
		if name == "" {
			name = "index.html"
		}
		if strings.Contains(name, "/") || path.Ext(name) == "" {
			http.NotFound(w, r)
			return
		}
		h := w.Header()
		h.Set("Content-Security-Policy", csp)
		h.Set("X-Content-Type-Options", "nosniff")
		// The page's address carries the authorization code after the
		// launch: it must not leave in a Referer.
		h.Set("Referrer-Policy", "no-referrer")
		h.Set("Cache-Control", "no-cache")
		ct, ok := contentTypes[path.Ext(name)]
		if !ok {
			http.NotFound(w, r)
			return
		}
		h.Set("Content-Type", ct)
		if name == "halite.wasm" {
			serveGzipped(w, r, files, name+".gz")
			return
		}
		body, err := fs.ReadFile(files, name)
		if err != nil {
			http.NotFound(w, r)
			return
		}
		_, _ = w.Write(body)
	})
}

// serveGzipped serves a gzipped asset as it is to a client that accepts
// gzip, and decompressed to one that does not.
func serveGzipped(w http.ResponseWriter, r *http.Request, files fs.FS, name string) {
	f, err := files.Open(name)
	if err != nil {
		http.NotFound(w, r)
		return
	}
	defer f.Close()
	w.Header().Add("Vary", "Accept-Encoding")
	if strings.Contains(r.Header.Get("Accept-Encoding"), "gzip") {
		w.Header().Set("Content-Encoding", "gzip")
		_, _ = io.Copy(w, f)
		return
	}
	zr, err := gzip.NewReader(f)
	if err != nil {
		http.Error(w, "asset unreadable", http.StatusInternalServerError)
		return
	}
	_, _ = io.Copy(w, zr)
}
