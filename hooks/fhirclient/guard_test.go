package fhirclient_test

import (
	"errors"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks/fhirclient"
)

// TestBlockedAddresses: the default transport refuses to dial private,
// link-local and (outside development) loopback addresses, checked on the
// address dialled. Control runs before connect, so no packet leaves.
func TestBlockedAddresses(t *testing.T) {
	var hit atomic.Bool
	srv := httptest.NewTLSServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) { hit.Store(true) }))
	defer srv.Close()
	for _, base := range []string{
		"https://10.255.255.1/fhir", "https://169.254.169.254/latest", "https://192.168.0.1/fhir",
		"https://[fe80::1]/fhir", "https://0.0.0.0/fhir", srv.URL + "/fhir",
	} {
		c, err := fhirclient.New(base, "s3cr3t-token", fhirclient.Options{Timeout: 2 * time.Second, MaxResponseBytes: 1 << 10})
		if err != nil {
			t.Fatalf("%s: %v", base, err)
		}
		_, err = c.Fetch(t.Context(), "Patient/pat-XYZ")
		var fe *fhirclient.Error
		if !errors.As(err, &fe) || !strings.Contains(err.Error(), fhirclient.ErrBlockedAddress.Error()) {
			t.Errorf("%s: got %v, want the blocked-address error", base, err)
			continue
		}
		if fe.Public() != "the FHIR server could not be reached" {
			t.Errorf("%s: public reason %q tells the caller too much", base, fe.Public())
		}
	}
	if hit.Load() {
		t.Error("the loopback server was reached without AllowHTTPLoopback")
	}
}

func TestPublicReasonForStatus(t *testing.T) {
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) { http.NotFound(w, r) }))
	defer srv.Close()
	c, err := fhirclient.New(srv.URL, "t", fhirclient.Options{Timeout: 2 * time.Second, MaxResponseBytes: 1 << 10,
		AllowHTTPLoopback: true})
	if err != nil {
		t.Fatal(err)
	}
	_, err = c.Fetch(t.Context(), "Patient/p")
	var fe *fhirclient.Error
	if !errors.As(err, &fe) || fe.Public() != "the FHIR server answered HTTP 404" || !errors.Is(err, fhirclient.ErrHTTPStatus) {
		t.Errorf("got %v", err)
	}
	// The status reaches the fetch span through this method.
	var st interface{ HTTPStatus() int }
	if !errors.As(err, &st) || st.HTTPStatus() != 404 {
		t.Errorf("no HTTPStatus 404 in %v", err)
	}
}

// TestAllowPrivateKeepsOtherGuards: a transport for an allowlist entry on a
// private network dials private ranges, but still refuses link-local
// (cloud metadata) and, outside development, loopback.
func TestAllowPrivateKeepsOtherGuards(t *testing.T) {
	opts := fhirclient.Options{Timeout: 300 * time.Millisecond, MaxResponseBytes: 1 << 10, Transport: fhirclient.NewTransport(false, true)}
	for base, blocked := range map[string]bool{
		"https://169.254.169.254/latest": true, "https://127.0.0.1/fhir": true, "https://10.255.255.1/fhir": false,
	} {
		c, err := fhirclient.New(base, "t", opts)
		if err != nil {
			t.Fatal(err)
		}
		_, err = c.Fetch(t.Context(), "Patient/p")
		if got := err != nil && strings.Contains(err.Error(), fhirclient.ErrBlockedAddress.Error()); got != blocked {
			t.Errorf("%s: blocked %v (%v), want %v", base, got, err, blocked)
		}
	}
}
