package fhirclient_test

import (
	"context"
	"errors"
	"net/http"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/halite-cds/halite/hooks/fhirclient"
	"go.opentelemetry.io/otel/propagation"
	"go.opentelemetry.io/otel/trace"
)

// TestFetchErrorCodes: every way a fetch fails has its code, for the
// cause table (hooks.CodeCause) and the fetch metric.
func TestFetchErrorCodes(t *testing.T) {
	for _, tc := range []struct {
		name    string
		handler http.HandlerFunc
		ref     string
		maxBody int64
		timeout time.Duration
		want    string
	}{
		{name: "404", handler: func(w http.ResponseWriter, _ *http.Request) { w.WriteHeader(404) }, want: "http-status"},
		{name: "500", handler: func(w http.ResponseWriter, _ *http.Request) { w.WriteHeader(500) }, want: "http-status"},
		{name: "401", handler: func(w http.ResponseWriter, _ *http.Request) { w.WriteHeader(401) }, want: "http-auth"},
		{name: "403", handler: func(w http.ResponseWriter, _ *http.Request) { w.WriteHeader(403) }, want: "http-auth"},
		{name: "redirect", handler: func(w http.ResponseWriter, r *http.Request) {
			http.Redirect(w, r, "https://elsewhere.example.org/", http.StatusFound)
		}, want: "http-status"},
		{name: "too large", maxBody: 10, want: "too-large"},
		{name: "slow", handler: func(w http.ResponseWriter, r *http.Request) {
			select {
			case <-r.Context().Done():
			case <-time.After(2 * time.Second):
			}
		}, timeout: 50 * time.Millisecond, want: "timeout"},
		{name: "off origin", ref: "https://elsewhere.example.org/r4/Patient/1", want: "off-origin"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			s := startServer(t, false, tc.handler)
			c := newClient(t, s, "/r4", "tok", fhirclient.Options{MaxResponseBytes: tc.maxBody, Timeout: tc.timeout})
			ref := tc.ref
			if ref == "" {
				ref = "Patient/1"
			}
			_, err := c.Fetch(context.Background(), ref)
			var fe *fhirclient.Error
			if !errors.As(err, &fe) {
				t.Fatalf("error %v is not a *fhirclient.Error", err)
			}
			if !slices.Contains(fhirclient.Codes(), fe.Code()) {
				t.Errorf("code %q is not listed by Codes()", fe.Code())
			}
			if fe.Code() != tc.want {
				t.Errorf("code %q, want %q (%v)", fe.Code(), tc.want, err)
			}
		})
	}
	_, err := fhirclient.New("http://fhir.example.org/r4", "", fhirclient.Options{MaxResponseBytes: 1})
	var fe *fhirclient.Error
	if !errors.As(err, &fe) || fe.Code() != "insecure-fhir-server" || !errors.Is(err, fhirclient.ErrInsecure) {
		t.Errorf("an http server: %v, want code insecure-fhir-server", err)
	}
	// An address the transport refuses to dial (loopback, not allowed).
	blocked, err := fhirclient.New("https://127.0.0.1:1/r4", "", fhirclient.Options{MaxResponseBytes: 1,
		Transport: fhirclient.NewTransport(false, false)})
	if err != nil {
		t.Fatal(err)
	}
	_, err = blocked.Fetch(context.Background(), "Patient/1")
	if !errors.As(err, &fe) || fe.Code() != "blocked-address" {
		t.Errorf("a loopback address without development mode: %v, want code blocked-address", err)
	}
}

// TestFetchSendsTraceContext: with a propagator the request carries the
// W3C traceparent of the caller's span (its trace id and span id);
// without one, none.
func TestFetchSendsTraceContext(t *testing.T) {
	var got []string
	s := startServer(t, false, func(w http.ResponseWriter, r *http.Request) {
		got = append(got, r.Header.Get("traceparent"))
		_, _ = w.Write([]byte(`{"resourceType":"Patient","id":"1"}`))
	})
	tid, _ := trace.TraceIDFromHex("4bf92f3577b34da6a3ce929d0e0e4736")
	sid, _ := trace.SpanIDFromHex("00f067aa0ba902b7")
	ctx := trace.ContextWithSpanContext(context.Background(), trace.NewSpanContext(trace.SpanContextConfig{
		TraceID: tid, SpanID: sid, TraceFlags: trace.FlagsSampled}))
	with := newClient(t, s, "/r4", "tok", fhirclient.Options{Propagator: propagation.TraceContext{}})
	without := newClient(t, s, "/r4", "tok", fhirclient.Options{})
	for _, c := range []*fhirclient.Client{with, without} {
		if _, err := c.Fetch(ctx, "Patient/1"); err != nil {
			t.Fatal(err)
		}
	}
	want := "00-4bf92f3577b34da6a3ce929d0e0e4736-00f067aa0ba902b7-01"
	if len(got) != 2 || got[0] != want || got[1] != "" {
		t.Errorf("traceparent headers %q, want [%q, \"\"]", got, want)
	}
	if strings.Contains(strings.Join(got, ""), "tok") {
		t.Error("the token leaked into a trace header")
	}
}
