package hooks

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"net/url"
	"regexp"
	"slices"
	"sort"
	"strings"
)

// Severity ranks a conformance problem.
type Severity string

// Severities of conformance problems: an error breaks CDS Hooks 2.0 or the
// service's needs (the call would be refused or lose data); a warning is
// allowed but unwise; info says what the service will do.
const (
	SeverityError   Severity = "error"
	SeverityWarning Severity = "warning"
	SeverityInfo    Severity = "info"
)

// Problem is one finding of the conformance report, at a JSON path.
type Problem struct {
	Severity Severity
	Path     string
	Message  string
}

var hookInstanceUUID = regexp.MustCompile(`^[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}$`)

// CheckRequest lists every problem of an EHR's request body against CDS
// Hooks 2.0 (required members, hookInstance, the hook's context members,
// fhirServer and fhirAuthorization) and against what each of svcs asks for
// (prefetch keys present, missing or failed; resources and Bundles that do
// not fit a key's template; data that do not name the patient in context).
// All problems are listed, each with its JSON path.
func CheckRequest(body []byte, svcs []Service) []Problem {
	var ps []Problem
	add := func(s Severity, path, format string, args ...any) {
		ps = append(ps, Problem{s, path, fmt.Sprintf(format, args...)})
	}
	var req map[string]json.RawMessage
	if err := json.Unmarshal(body, &req); err != nil || req == nil {
		add(SeverityError, "$", "the request is not a JSON object")
		return ps
	}
	hook := stringMember(req, "hook", "$", true, add)
	if id := stringMember(req, "hookInstance", "$", true, add); id != "" && !hookInstanceUUID.MatchString(id) {
		add(SeverityWarning, "$.hookInstance", "%q is not a UUID (CDS Hooks 2.0: a UUID per invocation)", id)
	}
	if hook != "" && len(svcs) == 0 {
		add(SeverityError, "$.hook", "no service of this server serves %q", hook)
	}
	server := stringMember(req, "fhirServer", "$", false, add)
	if server != "" {
		if u, err := url.Parse(server); err != nil || !u.IsAbs() || u.Host == "" {
			add(SeverityError, "$.fhirServer", "%q is not an absolute URL", server)
		} else if u.Scheme != "https" {
			add(SeverityWarning, "$.fhirServer", "the scheme MUST be https when production data is exchanged")
		}
	}
	auth := checkAuthorization(req, server != "", add)
	var ctx map[string]json.RawMessage
	patientID := ""
	switch raw, ok := req["context"]; {
	case !ok:
		add(SeverityError, "$.context", "is required")
	case json.Unmarshal(raw, &ctx) != nil || ctx == nil:
		add(SeverityError, "$.context", "must be an object")
	default:
		patientID = checkContext(hook, ctx, add)
	}
	checkPrefetch(req, svcs, patientID, server != "" && auth, add)
	// What the service itself refuses (400), in its words: the checks
	// above cannot drift from it unnoticed.
	for _, svc := range svcs {
		if _, err := DecodeCall(svc, body); err != nil {
			var e *Error
			if errors.As(err, &e) && e.Kind == KindBadRequest {
				path := "$"
				if e.Field != "" {
					path += "." + e.Field
				}
				if !slices.ContainsFunc(ps, func(p Problem) bool { return p.Path == path && p.Severity == SeverityError }) {
					add(SeverityError, path, "the service refuses the call (400): %s", e.Message)
				}
			}
			break
		}
	}
	sort.SliceStable(ps, func(i, j int) bool {
		if severityRank[ps[i].Severity] != severityRank[ps[j].Severity] {
			return severityRank[ps[i].Severity] > severityRank[ps[j].Severity]
		}
		return ps[i].Path < ps[j].Path
	})
	return ps
}

var severityRank = map[Severity]int{SeverityError: 3, SeverityWarning: 2, SeverityInfo: 1}

type addFunc func(s Severity, path, format string, args ...any)

// stringMember reads obj[name] as a string, reporting it missing (when
// required) or of another type.
func stringMember(obj map[string]json.RawMessage, name, at string, required bool, add addFunc) string {
	raw, ok := obj[name]
	path := at + "." + name
	if !ok {
		if required {
			add(SeverityError, path, "is required")
		}
		return ""
	}
	var s string
	if json.Unmarshal(raw, &s) != nil {
		add(SeverityError, path, "must be a string")
		return ""
	}
	if s == "" && required {
		add(SeverityError, path, "must not be empty")
	}
	return s
}

// checkAuthorization checks fhirAuthorization's members (CDS Hooks 2.0
// §Passing the Access Token) and cds-r-1; it reports whether a usable
// token was sent.
func checkAuthorization(req map[string]json.RawMessage, haveServer bool, add addFunc) bool {
	raw, ok := req["fhirAuthorization"]
	if !ok || string(bytes.TrimSpace(raw)) == "null" {
		return false
	}
	var auth map[string]json.RawMessage
	if json.Unmarshal(raw, &auth) != nil || auth == nil {
		add(SeverityError, "$.fhirAuthorization", "must be an object")
		return false
	}
	if !haveServer {
		add(SeverityError, "$.fhirAuthorization", "is sent without fhirServer (cds-r-1: fhirAuthorization requires fhirServer)")
	}
	usable := stringMember(auth, "access_token", "$.fhirAuthorization", true, add) != ""
	switch tt := stringMember(auth, "token_type", "$.fhirAuthorization", true, add); {
	case tt == "" || tt == "Bearer":
	case strings.EqualFold(tt, "Bearer"):
		add(SeverityWarning, "$.fhirAuthorization.token_type", "%q: CDS Hooks fixes the value Bearer (accepted in any case, RFC 6749)", tt)
	default:
		add(SeverityError, "$.fhirAuthorization.token_type", "%q: the fixed value is Bearer", tt)
	}
	switch v, ok := auth["expires_in"]; {
	case !ok:
		add(SeverityError, "$.fhirAuthorization.expires_in", "is required")
	default:
		var n int64
		if v = bytes.TrimSpace(v); len(v) == 0 || (v[0] != '-' && (v[0] < '0' || v[0] > '9')) || json.Unmarshal(v, &n) != nil {
			add(SeverityError, "$.fhirAuthorization.expires_in", "must be an integer number of seconds")
		}
	}
	stringMember(auth, "scope", "$.fhirAuthorization", true, add)
	stringMember(auth, "subject", "$.fhirAuthorization", true, add)
	return usable
}

// contextMembers are the context members of each hook halite serves, with
// whether each is required (CDS Hooks hook definitions, reference notes).
var contextMembers = map[string]map[string]bool{
	HookPatientView: {"userId": true, "patientId": true, "encounterId": false},
	HookOrderSelect: {"userId": true, "patientId": true, "encounterId": false, "selections": true, "draftOrders": true},
	HookOrderSign:   {"userId": true, "patientId": true, "encounterId": false, "draftOrders": true},
}

// requestTypes are the FHIR R4 request resources draftOrders carries.
var requestTypes = map[string]bool{"MedicationRequest": true, "ServiceRequest": true, "DeviceRequest": true, "NutritionOrder": true,
	"VisionPrescription": true, "Medication": true}

// checkContext checks the hook's context members and returns patientId.
func checkContext(hook string, ctx map[string]json.RawMessage, add addFunc) string {
	members, known := contextMembers[hook]
	if !known {
		return ""
	}
	names := make([]string, 0, len(members))
	for n := range members {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		if _, ok := ctx[n]; !ok && members[n] {
			add(SeverityError, "$.context."+n, "is required for %s", hook)
		}
	}
	others := make([]string, 0, len(ctx))
	for n := range ctx {
		if _, ok := members[n]; !ok {
			others = append(others, n)
		}
	}
	sort.Strings(others)
	for _, n := range others {
		add(SeverityInfo, "$.context."+n, "is not a context member of %s; it is ignored", hook)
	}
	if user := stringMember(ctx, "userId", "$.context", false, add); user != "" && !validUser(hook, user) {
		add(SeverityError, "$.context.userId", "%q is not a reference of a type %s allows (%s)", user, hook, strings.Join(userTypes[hook], ", "))
	}
	patientID := stringMember(ctx, "patientId", "$.context", false, add)
	if patientID != "" && !fhirID.MatchString(patientID) {
		add(SeverityError, "$.context.patientId", "%q is not a FHIR id", patientID)
	}
	if enc := stringMember(ctx, "encounterId", "$.context", false, add); enc != "" && !fhirID.MatchString(enc) {
		add(SeverityError, "$.context.encounterId", "%q is not a FHIR id (an id, not a reference)", enc)
	}
	refs := map[string]bool{}
	if raw, ok := ctx["draftOrders"]; ok {
		refs = checkDraftOrders(hook, raw, patientID, add)
	}
	if raw, ok := ctx["selections"]; ok && hook == HookOrderSelect {
		var sel []string
		switch {
		case json.Unmarshal(raw, &sel) != nil:
			add(SeverityError, "$.context.selections", "must be an array of strings")
		case len(sel) == 0:
			add(SeverityError, "$.context.selections", "must not be empty")
		}
		for i, s := range sel {
			if !refs[s] {
				add(SeverityError, fmt.Sprintf("$.context.selections[%d]", i), "%q is not an entry of draftOrders", s)
			}
		}
	}
	return patientID
}

// bundleEntry is what the report reads of a Bundle entry's resource.
type bundleEntry struct {
	Search *struct {
		Mode string `json:"mode"`
	} `json:"search"`
	Resource *struct {
		ResourceType string          `json:"resourceType"`
		ID           string          `json:"id"`
		Status       string          `json:"status"`
		Subject      *referenceField `json:"subject"`
		Patient      *referenceField `json:"patient"`
	} `json:"resource"`
}

type referenceField struct {
	Reference string `json:"reference"`
}

// checkDraftOrders checks context.draftOrders and returns its entries'
// references.
func checkDraftOrders(hook string, raw json.RawMessage, patientID string, add addFunc) map[string]bool {
	refs := map[string]bool{}
	var b struct {
		ResourceType string        `json:"resourceType"`
		Entry        []bundleEntry `json:"entry"`
	}
	if json.Unmarshal(raw, &b) != nil || b.ResourceType != "Bundle" {
		add(SeverityError, "$.context.draftOrders", "must be a FHIR Bundle")
		return refs
	}
	for i, e := range b.Entry {
		path := fmt.Sprintf("$.context.draftOrders.entry[%d].resource", i)
		r := e.Resource
		if r == nil {
			add(SeverityError, path, "is missing")
			continue
		}
		if !requestTypes[r.ResourceType] {
			add(SeverityWarning, path, "a %s is not a request resource; halite ignores it", r.ResourceType)
			continue
		}
		refs[r.ResourceType+"/"+r.ID] = true
		if r.ResourceType == "Medication" {
			continue
		}
		if r.Status != "draft" {
			add(SeverityWarning, path+".status", "%q: draft orders normally carry status draft (a re-sign after revision may not)", r.Status)
		}
		checkPatientRef(path, r.Subject, r.Patient, patientID, add)
	}
	return refs
}

// checkPatientRef reports a resource whose subject or patient does not name
// the patient in context.
func checkPatientRef(path string, subject, patient *referenceField, patientID string, add addFunc) {
	ref := subject
	member := "subject"
	if ref == nil {
		ref, member = patient, "patient"
	}
	switch {
	case patientID == "":
	case ref == nil:
		add(SeverityError, path, "names no patient (subject or patient)")
	case !namesPatient(ref.Reference, patientID):
		add(SeverityError, path+"."+member+".reference", "%q is not the patient in context (Patient/%s)", ref.Reference, patientID)
	}
}

// namesPatient reports whether a reference names Patient/patientID,
// relative or absolute, with or without a version; a urn: reference is
// resolved by the service within the Bundle and is not judged here.
func namesPatient(ref, patientID string) bool {
	if strings.HasPrefix(ref, "urn:") {
		return true
	}
	ref, _, _ = strings.Cut(ref, "/_history/")
	return ref == "Patient/"+patientID || strings.HasSuffix(ref, "/Patient/"+patientID)
}

// checkPrefetch checks each service's prefetch keys against what was sent.
func checkPrefetch(req map[string]json.RawMessage, svcs []Service, patientID string, canFetch bool, add addFunc) {
	var prefetch map[string]json.RawMessage
	if raw, ok := req["prefetch"]; ok && json.Unmarshal(raw, &prefetch) != nil {
		add(SeverityError, "$.prefetch", "must be an object")
		return
	}
	asked := map[string]bool{}
	for _, svc := range svcs {
		for _, k := range svc.Prefetch {
			if asked[k.Key] {
				continue
			}
			asked[k.Key] = true
			path := "$.prefetch." + k.Key
			raw, ok := prefetch[k.Key]
			switch {
			case !ok && k.Required && !canFetch:
				add(SeverityError, path, "is missing and the service cannot fetch it (no fhirServer with fhirAuthorization): %s answers 412", svc.ID)
			case !ok && canFetch:
				add(SeverityInfo, path, "is missing: the service fetches %s from fhirServer", k.What)
			case !ok:
				add(SeverityWarning, path, "is missing and cannot be fetched: the cards cannot use %s", k.What)
			case string(bytes.TrimSpace(raw)) == "null":
				add(SeverityInfo, path, "is null: read as no data, not re-queried")
			default:
				checkKey(path, k, raw, patientID, svc.ID, add)
			}
		}
	}
	keys := make([]string, 0, len(prefetch))
	for k := range prefetch {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	for _, k := range keys {
		if !asked[k] {
			add(SeverityInfo, "$.prefetch."+k, "is not a key of these services; it is ignored")
		}
	}
}

// checkKey checks one prefetched value against its template: a read gives
// the resource of its type, a search a searchset Bundle of the searched
// type; an OperationOutcome is a failed key.
func checkKey(path string, k PrefetchKey, raw json.RawMessage, patientID, service string, add addFunc) {
	var head struct {
		ResourceType string          `json:"resourceType"`
		ID           string          `json:"id"`
		Type         string          `json:"type"`
		Entry        []bundleEntry   `json:"entry"`
		Subject      *referenceField `json:"subject"`
		Patient      *referenceField `json:"patient"`
	}
	if json.Unmarshal(raw, &head) != nil || head.ResourceType == "" {
		add(SeverityError, path, "is not a FHIR resource")
		return
	}
	want, search := templateType(k.Template)
	switch {
	case head.ResourceType == "OperationOutcome" && k.Required:
		add(SeverityError, path, "is an OperationOutcome: the key failed, and it is required: %s answers 412", service)
	case head.ResourceType == "OperationOutcome":
		add(SeverityWarning, path, "is an OperationOutcome: the key failed, and the service does not re-query it")
	case !search && head.ResourceType != want:
		add(SeverityError, path+".resourceType", "%q: the key reads a %s resource (template %s…)", head.ResourceType, want, shortTemplate(k.Template))
	case !search && want == "Patient" && patientID != "" && head.ID != patientID:
		add(SeverityError, path+".id", "%q is not the patient in context (%s)", head.ID, patientID)
	case search && head.ResourceType != "Bundle":
		add(SeverityError, path+".resourceType", "%q: the key searches %s resources, so a searchset Bundle is expected (template %s…)", head.ResourceType, want, shortTemplate(k.Template))
	case search:
		if head.Type != "searchset" {
			add(SeverityWarning, path+".type", "%q: a search result is a searchset Bundle", head.Type)
		}
		for i, e := range head.Entry {
			ep := fmt.Sprintf("%s.entry[%d].resource", path, i)
			switch r := e.Resource; {
			case r == nil:
				add(SeverityError, ep, "is missing")
			case r.ResourceType == "OperationOutcome" && e.Search != nil && e.Search.Mode == "outcome":
				// a server's note on the search (search.mode outcome): read by the service, not an error
			case r.ResourceType == "OperationOutcome":
				add(SeverityWarning, ep, "an OperationOutcome in the search result: with an error or fatal issue the key fails")
			case r.ResourceType != want:
				add(SeverityError, ep+".resourceType", "%q does not fit the key's search of %s resources", r.ResourceType, want)
			default:
				checkPatientRef(ep, r.Subject, r.Patient, patientID, add)
			}
		}
	}
}

// shortTemplate is the start of a template, for a message.
func shortTemplate(t string) string {
	if len(t) > 40 {
		return t[:40]
	}
	return t
}

// templateType is the resource type a prefetch template reads or searches,
// and whether it searches.
func templateType(t string) (string, bool) {
	if typ, _, ok := strings.Cut(t, "?"); ok {
		return typ, true
	}
	typ, _, _ := strings.Cut(t, "/")
	return typ, false
}
