// Package hooks is halite's CDS Hooks 2.0 surface: wire types, the service
// registry and its prefetch templates, request validation, prefetch
// resolution, card rendering, the error-to-status table, and the gin handlers.
// It turns a hook call into fhirmap input, runs rules, and words the findings.
package hooks

import "encoding/json"

// Request is a CDS Hooks service call body (CDS Hooks 2.0 §Calling a CDS Service).
type Request struct {
	Hook              string             `json:"hook"`
	HookInstance      string             `json:"hookInstance"`
	FHIRServer        string             `json:"fhirServer,omitempty"`
	FHIRAuthorization *FHIRAuthorization `json:"fhirAuthorization,omitempty"`
	Context           json.RawMessage    `json:"context"`
	// Prefetch keeps each value raw: JSON null ("no data") stays distinct
	// from an absent key ("not prefetched").
	Prefetch  map[string]json.RawMessage `json:"prefetch,omitempty"`
	Extension json.RawMessage            `json:"extension,omitempty"`
}

// FHIRAuthorization is the bearer token a client lends for its FHIR server.
// The access token is never logged, stored or sent anywhere but fhirServer.
type FHIRAuthorization struct {
	AccessToken string `json:"access_token"`
	TokenType   string `json:"token_type"`
	ExpiresIn   *int   `json:"expires_in"`
	Scope       string `json:"scope"`
	Subject     string `json:"subject"`
	Patient     string `json:"patient,omitempty"`
}

// HookContext is the union of the context fields of the hooks halite serves.
type HookContext struct {
	UserID      string          `json:"userId"`
	PatientID   string          `json:"patientId"`
	EncounterID string          `json:"encounterId,omitempty"`
	Selections  []string        `json:"selections,omitempty"`
	DraftOrders json.RawMessage `json:"draftOrders,omitempty"`
}

// Response is a service call's answer. Cards is always present, possibly empty.
type Response struct {
	Cards         []Card   `json:"cards"`
	SystemActions []Action `json:"systemActions,omitempty"`
}

// Card is one piece of advice (CDS Hooks 2.0 §Card Attributes).
type Card struct {
	UUID              string          `json:"uuid,omitempty"`
	Summary           string          `json:"summary"`
	Detail            string          `json:"detail,omitempty"`
	Indicator         string          `json:"indicator"`
	Source            Source          `json:"source"`
	Suggestions       []Suggestion    `json:"suggestions,omitempty"`
	SelectionBehavior string          `json:"selectionBehavior,omitempty"`
	OverrideReasons   []Coding        `json:"overrideReasons,omitempty"`
	Links             []Link          `json:"links,omitempty"`
	Extension         json.RawMessage `json:"extension,omitempty"`
}

// Source names who the advice comes from.
type Source struct {
	Label string  `json:"label"`
	URL   string  `json:"url,omitempty"`
	Icon  string  `json:"icon,omitempty"`
	Topic *Coding `json:"topic,omitempty"`
}

// Suggestion is a set of actions the clinician may accept together.
type Suggestion struct {
	Label         string   `json:"label"`
	UUID          string   `json:"uuid,omitempty"`
	IsRecommended bool     `json:"isRecommended,omitempty"`
	Actions       []Action `json:"actions,omitempty"`
}

// Action is a create, update or delete of a FHIR resource.
type Action struct {
	Type        string          `json:"type"`
	Description string          `json:"description,omitempty"`
	Resource    json.RawMessage `json:"resource,omitempty"`
	ResourceID  string          `json:"resourceId,omitempty"`
}

// Link is a URL the card offers.
type Link struct {
	Label      string `json:"label"`
	URL        string `json:"url"`
	Type       string `json:"type"`
	AppContext string `json:"appContext,omitempty"`
}

// Coding is the CDS Hooks Coding data type.
type Coding struct {
	System  string `json:"system"`
	Code    string `json:"code"`
	Display string `json:"display,omitempty"`
}

// Discovery is the body of GET /cds-services.
type Discovery struct {
	Services []ServiceDescription `json:"services"`
}

// ServiceDescription is one discovery entry: one service on one hook.
type ServiceDescription struct {
	Hook              string            `json:"hook"`
	Title             string            `json:"title,omitempty"`
	Description       string            `json:"description"`
	ID                string            `json:"id"`
	Prefetch          map[string]string `json:"prefetch,omitempty"`
	UsageRequirements string            `json:"usageRequirements,omitempty"`
	Extension         map[string]any    `json:"extension,omitempty"`
}
