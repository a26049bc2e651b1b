package hooks

import (
	"bytes"
	"encoding/json"
	"fmt"
	"net/url"
	"reflect"
	"regexp"
	"strings"

	"github.com/halite-cds/halite/fhirmap"
)

// fhirID is the FHIR R4 id datatype: 1–64 of [A-Za-z0-9-.].
var fhirID = regexp.MustCompile(`^[A-Za-z0-9\-.]{1,64}$`)

// Call is a decoded, validated service call.
type Call struct {
	Request Request
	Context HookContext
	// ContextTokens are the validated root-level context fields usable as
	// prefetch tokens (CDS Hooks 2.0 §Prefetch tokens): userId, patientId and
	// encounterId, whose values are FHIR ids or Type/id references.
	ContextTokens map[string]string
	// DraftEntries are the entries of context.draftOrders: each resource
	// with its fullUrl, for resolving references.
	DraftEntries []fhirmap.BundleEntry
	// UnknownPrefetchKeys counts the prefetch keys the service did not ask
	// for; they are ignored, and their names (the EHR's text) never logged.
	UnknownPrefetchKeys int
	// fetchRefused, when set, is why the FHIR server the call names is not
	// used (a Code* constant): prefetch keys not sent carry it.
	fetchRefused string
}

// contextFields are the context fields halite reads.
var contextFields = []string{"userId", "patientId", "encounterId", "selections", "draftOrders"}

// userTypes lists the resource types context.userId may name, per hook
// (CDS Hooks Library: patient-view, order-select, order-sign).
var userTypes = map[string][]string{
	HookPatientView: {"Practitioner", "PractitionerRole", "Patient", "RelatedPerson"},
	HookOrderSelect: {"Practitioner", "PractitionerRole"},
	HookOrderSign:   {"Practitioner", "PractitionerRole"},
}

// DecodeCall parses and validates body as a call to svc. Unknown fields and
// extension objects are tolerated; every error names the field at fault.
func DecodeCall(svc Service, body []byte) (*Call, error) {
	var c Call
	if len(bytes.TrimSpace(body)) == 0 {
		return nil, badRequest("", "request body is empty")
	}
	body, err := fhirmap.ReadDocument(body)
	if err != nil {
		return nil, badRequest("", "%v: a CDS Hooks request is a JSON object", err)
	}
	if err := fhirmap.DecodeJSON(body, &c.Request); err != nil {
		return nil, badRequest(jsonField(err), "request is not a valid CDS Hooks JSON object: %s", jsonProblem(err))
	}
	r := &c.Request
	switch {
	case r.Hook == "":
		return nil, badRequest("hook", "is required")
	case !svc.Serves(r.Hook):
		return nil, badRequest("hook", "service %s does not serve hook %q (it serves %s)",
			svc.ID, r.Hook, strings.Join(svc.Hooks, ", "))
	case r.HookInstance == "":
		return nil, badRequest("hookInstance", "is required")
	}
	if err := validateServer(r); err != nil {
		return nil, err
	}
	if err := c.decodeContext(); err != nil {
		return nil, err
	}
	for key, v := range r.Prefetch {
		if !svc.asks(key) {
			c.UnknownPrefetchKeys++
			continue
		}
		if !isNullOrObject(v) {
			return nil, badRequest("prefetch."+key, "must be a FHIR resource or null")
		}
	}
	if len(r.Extension) > 0 && !isObject(r.Extension) {
		return nil, badRequest("extension", "must be an object")
	}
	return &c, nil
}

func validateServer(r *Request) error {
	if r.FHIRServer != "" {
		u, err := url.Parse(r.FHIRServer)
		if err != nil || (u.Scheme != "https" && u.Scheme != "http") || u.Host == "" {
			return badRequest("fhirServer", "must be an absolute http(s) URL")
		}
	}
	a := r.FHIRAuthorization
	if a == nil {
		return nil
	}
	switch {
	case r.FHIRServer == "":
		return badRequest("fhirServer", "is required when fhirAuthorization is present")
	case a.AccessToken == "":
		return badRequest("fhirAuthorization.access_token", "is required")
	case !strings.EqualFold(a.TokenType, "Bearer"): // RFC 6749 §5.1: case-insensitive
		return badRequest("fhirAuthorization.token_type", "must be \"Bearer\"")
	case a.ExpiresIn == nil:
		return badRequest("fhirAuthorization.expires_in", "is required")
	case a.Scope == "":
		return badRequest("fhirAuthorization.scope", "is required")
	case a.Subject == "":
		return badRequest("fhirAuthorization.subject", "is required")
	}
	return nil
}

func (c *Call) decodeContext() error {
	raw := c.Request.Context
	if len(raw) == 0 || string(raw) == "null" {
		return badRequest("context", "is required")
	}
	var fields map[string]json.RawMessage
	if err := fhirmap.DecodeJSON(raw, &fields); err != nil {
		return badRequest("context", "must be an object")
	}
	// encoding/json matches keys case-insensitively; a case variant of a
	// field halite reads could be validated under one spelling and used
	// under another, so it is refused.
	for name := range fields {
		for _, known := range contextFields {
			if name != known && strings.EqualFold(name, known) {
				return badRequest("context."+name, "is not a context field; field names are case-sensitive (%s)", known)
			}
		}
	}
	if err := fhirmap.DecodeJSON(raw, &c.Context); err != nil {
		return badRequest("context."+jsonField(err), "has the wrong type: %s", jsonProblem(err))
	}
	ctx := &c.Context
	hook := c.Request.Hook
	if ctx.UserID == "" {
		return badRequest("context.userId", "is required")
	}
	if !validUser(hook, ctx.UserID) {
		return badRequest("context.userId", "must be a reference of the form %s/{id}",
			strings.Join(userTypes[hook], "|"))
	}
	if ctx.PatientID == "" {
		return badRequest("context.patientId", "is required")
	}
	if !fhirID.MatchString(ctx.PatientID) {
		return badRequest("context.patientId", "must be a FHIR id (1–64 letters, digits, '-' or '.')")
	}
	if _, ok := fields["encounterId"]; ok && !fhirID.MatchString(ctx.EncounterID) {
		return badRequest("context.encounterId", "must be a FHIR id")
	}
	// Prefetch tokens come from the validated fields only.
	c.ContextTokens = map[string]string{"userId": ctx.UserID, "patientId": ctx.PatientID}
	if ctx.EncounterID != "" {
		c.ContextTokens["encounterId"] = ctx.EncounterID
	}
	if a := c.Request.FHIRAuthorization; a != nil && a.Patient != "" && a.Patient != ctx.PatientID {
		return badRequest("fhirAuthorization.patient", "names a patient other than context.patientId")
	}
	if hook == HookPatientView {
		return nil
	}
	return c.decodeOrders(fields)
}

// decodeOrders validates draftOrders (order hooks) and selections (order-select).
func (c *Call) decodeOrders(fields map[string]json.RawMessage) error {
	ctx := &c.Context
	if len(ctx.DraftOrders) == 0 || string(ctx.DraftOrders) == "null" {
		return badRequest("context.draftOrders", "is required for %s", c.Request.Hook)
	}
	var b struct {
		ResourceType string `json:"resourceType"`
		Entry        []struct {
			FullURL  string          `json:"fullUrl"`
			Resource json.RawMessage `json:"resource"`
		} `json:"entry"`
	}
	if err := fhirmap.DecodeJSON(ctx.DraftOrders, &b); err != nil || b.ResourceType != "Bundle" {
		return badRequest("context.draftOrders", "must be a FHIR Bundle")
	}
	refs := map[string]bool{}
	for i, e := range b.Entry {
		var h struct {
			ResourceType string `json:"resourceType"`
			ID           string `json:"id"`
		}
		if fhirmap.DecodeJSON(e.Resource, &h) != nil || h.ResourceType == "" {
			return badRequest(fmt.Sprintf("context.draftOrders.entry[%d].resource", i), "must be a FHIR resource")
		}
		if err := fhirmap.CheckR4(fhirmap.Resource{Type: h.ResourceType, ID: h.ID, Raw: e.Resource}); err != nil {
			return badRequest(fmt.Sprintf("context.draftOrders.entry[%d].resource", i), "%v", err)
		}
		refs[h.ResourceType+"/"+h.ID] = true
		c.DraftEntries = append(c.DraftEntries, fhirmap.BundleEntry{FullURL: e.FullURL, Resource: e.Resource})
	}
	if c.Request.Hook != HookOrderSelect {
		return nil
	}
	if _, ok := fields["selections"]; !ok || len(ctx.Selections) == 0 {
		return badRequest("context.selections", "is required for order-select and must not be empty")
	}
	for i, s := range ctx.Selections {
		if !refs[s] {
			return badRequest(fmt.Sprintf("context.selections[%d]", i), "%q is not an entry of draftOrders", s)
		}
	}
	return nil
}

func validUser(hook, ref string) bool {
	typ, id, ok := strings.Cut(ref, "/")
	if !ok || !fhirID.MatchString(id) {
		return false
	}
	for _, t := range userTypes[hook] {
		if t == typ {
			return true
		}
	}
	return false
}

func isObject(v json.RawMessage) bool {
	v = bytes.TrimSpace(v)
	return len(v) > 0 && v[0] == '{'
}

func isNullOrObject(v json.RawMessage) bool {
	return string(bytes.TrimSpace(v)) == "null" || isObject(v)
}

// jsonField names the field a json error is about, when the error says.
func jsonField(err error) string {
	if te, ok := err.(*json.UnmarshalTypeError); ok {
		return te.Field
	}
	return ""
}

// jsonKind names a Go kind as the JSON value it decodes from, so that an
// error never shows a Go type name.
func jsonKind(k reflect.Kind) string {
	switch k {
	case reflect.Struct, reflect.Map:
		return "a JSON object"
	case reflect.Slice, reflect.Array:
		return "a JSON array"
	case reflect.String:
		return "a JSON string"
	case reflect.Bool:
		return "true or false"
	case reflect.Int, reflect.Int8, reflect.Int16, reflect.Int32, reflect.Int64, reflect.Uint, reflect.Uint8,
		reflect.Uint16, reflect.Uint32, reflect.Uint64, reflect.Float32, reflect.Float64:
		return "a JSON number"
	}
	return "another JSON value"
}

func jsonProblem(err error) string {
	switch e := err.(type) {
	case *json.UnmarshalTypeError:
		return fmt.Sprintf("expected %s, got JSON %s", jsonKind(e.Type.Kind()), e.Value)
	case *json.SyntaxError:
		return fmt.Sprintf("syntax error at byte %d", e.Offset)
	}
	return "malformed JSON"
}
