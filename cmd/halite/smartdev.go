package main

import (
	"crypto/rand"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"net/url"
	"strings"
	"sync"
	"time"

	"github.com/halite-cds/halite/hooks/fhirclient"
)

// smartDev is a small SMART App Launch 2.0 authorization server for
// development only (serve-bundle --smart): an EHR launch of an app
// against the bundle's FHIR server, with the authorization code grant and
// PKCE (S256) for a public client. It approves every launch it issued
// itself, for the bundle's one patient, and grants one access token, the
// one the bundle's FHIR server accepts. It holds grants in memory.
type smartDev struct {
	base      string // http://HOST:PORT
	patientID string
	token     string

	mu       sync.Mutex
	launches map[string]launchGrant // launch id → the app and appContext it was issued for
	codes    map[string]grant
	origins  map[string]bool // the launched apps' origins, the only ones CORS allows
}

// launchGrant is a launch waiting for its authorization request.
type launchGrant struct{ origin, appContext string }

// grant is an authorization code waiting for its token request.
type grant struct {
	launch                                  launchGrant
	clientID, redirectURI, challenge, scope string
	expires                                 time.Time
}

// codeLifetime bounds how long an authorization code may wait.
const codeLifetime = time.Minute

func newSMARTDev(base, patientID, token string) *smartDev {
	return &smartDev{base: base, patientID: patientID, token: token, launches: map[string]launchGrant{}, codes: map[string]grant{},
		origins: map[string]bool{}}
}

func (d *smartDev) fhirBase() string { return d.base + "/fhir" }

// routes adds the launch, discovery, authorize and token endpoints to mux,
// and wraps fhir (the bundle's FHIR server) for browsers: CORS for any
// origin (bearer tokens, no cookies) and the SMART configuration.
func (d *smartDev) routes(mux *http.ServeMux, fhir http.Handler) {
	mux.HandleFunc("GET /launch", d.launch)
	mux.HandleFunc("GET /auth/authorize", d.authorize)
	mux.Handle("/auth/token", d.cors(http.HandlerFunc(d.tokenEndpoint)))
	mux.Handle("GET /fhir/.well-known/smart-configuration", d.cors(http.HandlerFunc(d.configuration)))
	mux.Handle("/fhir/", d.cors(fhir))
}

// cors lets the launched apps' pages (loopback origins this server sent a
// launch to) read the answers, and no other page.
func (d *smartDev) cors(h http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		d.mu.Lock()
		allowed := d.origins[r.Header.Get("Origin")]
		d.mu.Unlock()
		w.Header().Add("Vary", "Origin")
		if !allowed {
			if r.Method == http.MethodOptions {
				http.Error(w, "origin not allowed", http.StatusForbidden)
				return
			}
			h.ServeHTTP(w, r) // a page of another origin cannot read it
			return
		}
		w.Header().Set("Access-Control-Allow-Origin", r.Header.Get("Origin"))
		if r.Method == http.MethodOptions {
			w.Header().Set("Access-Control-Allow-Headers", "Authorization, Content-Type, Accept")
			w.Header().Set("Access-Control-Allow-Methods", "GET, POST")
			w.WriteHeader(http.StatusNoContent)
			return
		}
		h.ServeHTTP(w, r)
	})
}

// configuration is the server's SMART configuration (SMART App Launch 2.0
// §Conformance: .well-known/smart-configuration).
func (d *smartDev) configuration(w http.ResponseWriter, _ *http.Request) {
	answerJSON(w, http.StatusOK, map[string]any{
		"issuer":                                d.base,
		"authorization_endpoint":                d.base + "/auth/authorize",
		"token_endpoint":                        d.base + "/auth/token",
		"grant_types_supported":                 []string{"authorization_code"},
		"code_challenge_methods_supported":      []string{"S256"},
		"token_endpoint_auth_methods_supported": []string{"none"},
		"scopes_supported":                      []string{"launch", "patient/*.rs", "patient/Patient.rs", "patient/Observation.rs", "patient/MedicationRequest.rs", "patient/MedicationAdministration.rs", "patient/Condition.rs", "patient/Procedure.rs", "patient/Medication.rs"},
		"response_types_supported":              []string{"code"},
		"capabilities":                          []string{"launch-ehr", "client-public", "context-ehr-patient", "permission-patient", "permission-v2"},
	})
}

// launch plays the EHR opening a card's SMART link: url is the link's
// URL and appContext its appContext; the browser goes to the app with iss
// and a launch id that carries the appContext.
func (d *smartDev) launch(w http.ResponseWriter, r *http.Request) {
	app, err := url.Parse(r.URL.Query().Get("url"))
	if err != nil || (app.Scheme != "http" && app.Scheme != "https") || app.Host == "" || !fhirclient.IsLoopback(app.Hostname()) {
		http.Error(w, "url: the app's launch URL (a card link's url) on a loopback address is required", http.StatusBadRequest)
		return
	}
	origin := app.Scheme + "://" + app.Host
	id, err := randomString()
	if err != nil {
		http.Error(w, "launch: "+err.Error(), http.StatusInternalServerError)
		return
	}
	d.mu.Lock()
	d.launches[id] = launchGrant{origin: origin, appContext: r.URL.Query().Get("appContext")}
	d.origins[origin] = true
	d.mu.Unlock()
	q := app.Query()
	q.Set("iss", d.fhirBase())
	q.Set("launch", id)
	app.RawQuery = q.Encode()
	http.Redirect(w, r, app.String(), http.StatusFound)
}

// authorize approves a request for a launch this server issued, after
// checking it as SMART App Launch 2.0 asks (response_type code, the FHIR
// server as aud, PKCE with S256), and sends the code to redirect_uri.
func (d *smartDev) authorize(w http.ResponseWriter, r *http.Request) {
	q := r.URL.Query()
	redirect, err := url.Parse(q.Get("redirect_uri"))
	if err != nil || (redirect.Scheme != "http" && redirect.Scheme != "https") || redirect.Host == "" || redirect.Fragment != "" {
		http.Error(w, "redirect_uri: an absolute http(s) URL is required", http.StatusBadRequest)
		return
	}
	d.mu.Lock()
	l, known := d.launches[q.Get("launch")]
	d.mu.Unlock()
	var problem string
	switch {
	case known && redirect.Scheme+"://"+redirect.Host != l.origin:
		problem = "redirect_uri must be on the launched app's origin"
	case q.Get("response_type") != "code":
		problem = "response_type must be code"
	case q.Get("client_id") == "":
		problem = "client_id is required"
	case !known:
		problem = "launch is not one this server issued"
	case strings.TrimRight(q.Get("aud"), "/") != d.fhirBase():
		problem = "aud must be the FHIR server " + d.fhirBase()
	case q.Get("code_challenge_method") != "S256" || q.Get("code_challenge") == "":
		problem = "PKCE with code_challenge_method S256 is required"
	case q.Get("state") == "":
		problem = "state is required"
	}
	if problem != "" {
		http.Error(w, problem, http.StatusBadRequest)
		return
	}
	code, err := randomString()
	if err != nil {
		http.Error(w, "authorize: "+err.Error(), http.StatusInternalServerError)
		return
	}
	d.mu.Lock()
	delete(d.launches, q.Get("launch")) // a launch is authorized once
	d.codes[code] = grant{launch: l, clientID: q.Get("client_id"), redirectURI: q.Get("redirect_uri"),
		challenge: q.Get("code_challenge"), scope: q.Get("scope"), expires: time.Now().Add(codeLifetime)}
	d.mu.Unlock()
	back := redirect.Query()
	back.Set("code", code)
	back.Set("state", q.Get("state"))
	redirect.RawQuery = back.Encode()
	http.Redirect(w, r, redirect.String(), http.StatusFound)
}

// tokenEndpoint exchanges a code, once, for the access token, with the
// launch's patient and the card's appContext (CDS Hooks 2.0 §Link).
func (d *smartDev) tokenEndpoint(w http.ResponseWriter, r *http.Request) {
	if r.Method != http.MethodPost {
		http.Error(w, "method not allowed", http.StatusMethodNotAllowed)
		return
	}
	r.Body = http.MaxBytesReader(w, r.Body, 16<<10)
	if err := r.ParseForm(); err != nil {
		tokenError(w, "invalid_request", "the body must be a form")
		return
	}
	f := r.PostForm
	if f.Get("grant_type") != "authorization_code" {
		tokenError(w, "unsupported_grant_type", "only authorization_code")
		return
	}
	d.mu.Lock()
	g, ok := d.codes[f.Get("code")]
	delete(d.codes, f.Get("code")) // a code is used once, right or wrong
	ctx := g.launch.appContext
	d.mu.Unlock()
	sum := sha256.Sum256([]byte(f.Get("code_verifier")))
	challenge := base64.RawURLEncoding.EncodeToString(sum[:])
	switch {
	case !ok || time.Now().After(g.expires):
		tokenError(w, "invalid_grant", "unknown, used or expired code")
	case f.Get("redirect_uri") != g.redirectURI || f.Get("client_id") != g.clientID:
		tokenError(w, "invalid_grant", "redirect_uri or client_id differ from the authorization request")
	case subtle.ConstantTimeCompare([]byte(challenge), []byte(g.challenge)) != 1:
		tokenError(w, "invalid_grant", "code_verifier does not match the code_challenge")
	default:
		resp := map[string]any{"access_token": d.token, "token_type": "Bearer", "expires_in": 3600,
			"scope": g.scope, "patient": d.patientID, "need_patient_banner": true}
		if ctx != "" {
			resp["appContext"] = ctx
		}
		w.Header().Set("Cache-Control", "no-store")
		answerJSON(w, http.StatusOK, resp)
	}
}

func tokenError(w http.ResponseWriter, code, description string) {
	answerJSON(w, http.StatusBadRequest, map[string]string{"error": code, "error_description": description})
}

func answerJSON(w http.ResponseWriter, status int, v any) {
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(status)
	_ = json.NewEncoder(w).Encode(v)
}

// randomString is 128 random bits, base64url.
func randomString() (string, error) {
	b := make([]byte, 16)
	if _, err := rand.Read(b); err != nil {
		return "", fmt.Errorf("random: %w", err)
	}
	return base64.RawURLEncoding.EncodeToString(b), nil
}

// errNoPatient is a bundle with no Patient or more than one: a SMART
// launch is for one patient.
var errNoPatient = errors.New("--smart: the bundle must hold exactly one Patient")
