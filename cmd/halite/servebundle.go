package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"time"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/fhirclient"
)

// serveBundle serves a bundle as a small read-only FHIR server on loopback,
// so the fetch path can be tried: point a request's fhirServer at it
// (`halite request --no-prefetch --fhir-server URL --access-token T`).
func serveBundle(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("serve-bundle", "serve-bundle [--addr HOST:PORT] [--page-size N] [--token T] [--smart] BUNDLE", stderr)
	addr := fs.String("addr", "127.0.0.1:8090", "loopback listen address `HOST:PORT`")
	pageSize := fs.Int("page-size", 0, "split search results into pages of `N` entries linked by next (0: one page)")
	token := fs.String("token", "", "require this bearer `token`")
	smart := fs.Bool("smart", false, "also run a SMART App Launch authorization server for development (EHR launch at /launch, PKCE); the FHIR server then accepts only the token it grants")
	path, err := parseBundleArgs(fs, args)
	if err != nil {
		return err
	}
	host, _, err := net.SplitHostPort(*addr)
	if err != nil || !fhirclient.IsLoopback(host) {
		return fmt.Errorf("--addr: %q: serve-bundle listens on a loopback address only", *addr)
	}
	if *pageSize < 0 {
		return errors.New("--page-size: must not be negative")
	}
	b, err := readBundle(path)
	if err != nil {
		return err
	}
	store := hooks.NewBundleStore(b)
	store.PageSize, store.Token = *pageSize, *token
	ln, err := net.Listen("tcp", *addr)
	if err != nil {
		return fmt.Errorf("serve-bundle: %w", err)
	}
	defer ln.Close()
	var handler http.Handler = store
	var dev *smartDev
	if *smart {
		if *token != "" {
			return errors.New("--smart: the token is the one the authorization server grants; leave --token out")
		}
		patient, err := onePatient(b)
		if err != nil {
			return err
		}
		if store.Token, err = randomString(); err != nil {
			return err
		}
		dev = newSMARTDev("http://"+ln.Addr().String(), patient, store.Token)
		mux := http.NewServeMux()
		dev.routes(mux, store)
		handler = mux
	}
	srv := &http.Server{Handler: handler, ReadHeaderTimeout: 10 * time.Second}
	served := make(chan error, 1)
	go func() { served <- srv.Serve(ln) }()
	fmt.Fprintf(stdout, "serving %s as a read-only FHIR server at http://%s/fhir\n", path, ln.Addr())
	if dev != nil {
		fmt.Fprintf(stdout, "SMART launch (development only): http://%s/launch?url=APP_LAUNCH_URL&appContext=CARD_APP_CONTEXT\n", ln.Addr())
	}
	select {
	case err := <-served:
		return fmt.Errorf("serve-bundle: %w", err)
	case <-ctx.Done():
	}
	shutdownCtx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
	defer cancel()
	if err := srv.Shutdown(shutdownCtx); err != nil {
		// A client's connection that never sent a request holds Shutdown
		// for up to 5 s; a test server need not wait for it.
		return srv.Close()
	}
	return nil
}

// onePatient is the id of the bundle's one Patient.
func onePatient(b *fhirmap.Bundle) (string, error) {
	id := ""
	for _, e := range b.Entries {
		r, err := fhirmap.ReadResource(e.Resource)
		if err != nil || r.Type != "Patient" {
			continue
		}
		if id != "" || r.ID == "" {
			return "", errNoPatient
		}
		id = r.ID
	}
	if id == "" {
		return "", errNoPatient
	}
	return id, nil
}
