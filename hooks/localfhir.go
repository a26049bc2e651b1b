package hooks

import (
	"bytes"
	"encoding/json"
	"fmt"
	"net/http"
	"net/url"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/halite-cds/halite/fhirmap"
)

// BundleStore answers FHIR reads and searches from the resources of one
// Bundle, for the search parameters halite's prefetch templates use. It is
// how `halite request` fills prefetch from a file, and, as an http.Handler,
// a small read-only FHIR server for testing the fetch path.
//
// It serves the Bundle as a server that processed it as a transaction
// would: references among its entries (urn:uuid:, urn:oid:, absolute or
// relative to an entry's fullUrl) are rewritten to the relative Type/id of
// the entry they resolve to, and a resource without an id known by a urn
// fullUrl gets that id (fhirmap.ReadEntry).
type BundleStore struct {
	resources []stored
	refs      *fhirmap.References
	// PageSize, when positive, makes ServeHTTP split search results into
	// pages of that many entries linked by "next".
	PageSize int
	// Token, when set, is the bearer token ServeHTTP requires.
	Token string
}

type stored struct {
	res    fhirmap.Resource
	fields searchFields
}

// searchFields are the elements the supported search parameters read.
type searchFields struct {
	Status  string     `json:"status"`
	Subject *refField  `json:"subject"`
	Patient *refField  `json:"patient"`
	Code    *codeField `json:"code"`
	// MedicationCC is what the code parameter searches on medication
	// resources (FHIR R4: MedicationAdministration.medication as
	// CodeableConcept).
	MedicationCC   *codeField   `json:"medicationCodeableConcept"`
	ClinicalStatus *codeField   `json:"clinicalStatus"`
	EffDateTime    string       `json:"effectiveDateTime"`
	EffInstant     string       `json:"effectiveInstant"`
	EffPeriod      *periodField `json:"effectivePeriod"`
	AuthoredOn     string       `json:"authoredOn"`
	RecordedDate   string       `json:"recordedDate"`
}

type refField struct {
	Reference string `json:"reference"`
}

type codeField struct {
	Coding []struct {
		System string `json:"system"`
		Code   string `json:"code"`
	} `json:"coding"`
}

type periodField struct {
	Start string `json:"start"`
	End   string `json:"end"`
}

// NewBundleStore indexes the resources of b. Entries that are not FHIR
// resources are skipped; mapping reports them.
func NewBundleStore(b *fhirmap.Bundle) *BundleStore {
	var rs []fhirmap.Resource
	for _, e := range b.Entries {
		if r, err := fhirmap.ReadEntry(e); err == nil {
			rs = append(rs, r)
		}
	}
	s := &BundleStore{refs: fhirmap.NewReferences("", rs)}
	for _, r := range rs {
		r.Raw = s.relativise(r)
		var f searchFields
		_ = fhirmap.DecodeJSON(r.Raw, &f) // a resource with odd fields still matches by type and id
		s.resources = append(s.resources, stored{res: r, fields: f})
	}
	return s
}

// relativise returns r's JSON with every reference to another entry
// written as that entry's Type/id, and r's id when it had none; the JSON
// is returned unchanged when nothing needs rewriting.
func (s *BundleStore) relativise(r fhirmap.Resource) json.RawMessage {
	dec := json.NewDecoder(bytes.NewReader(r.Raw))
	dec.UseNumber()
	var v map[string]any
	if dec.Decode(&v) != nil {
		return r.Raw
	}
	changed := false
	if _, has := v["id"]; !has && r.ID != "" {
		v["id"], changed = r.ID, true
	}
	var walk func(any)
	walk = func(x any) {
		switch x := x.(type) {
		case map[string]any:
			if ref, ok := x["reference"].(string); ok && !strings.HasPrefix(ref, "#") {
				if t, err := s.refs.Resolve(ref, r); err == nil && t.Held() && t.Ref() != ref {
					x["reference"], changed = t.Ref(), true
				}
			}
			for k, e := range x {
				if k != "contained" {
					walk(e)
				}
			}
		case []any:
			for _, e := range x {
				walk(e)
			}
		}
	}
	walk(v)
	if !changed {
		return r.Raw
	}
	out, err := json.Marshal(v)
	if err != nil {
		return r.Raw
	}
	return out
}

// Query runs a relative FHIR read ("Patient/1") or search ("Observation?…").
// A read that finds nothing answers JSON null, as a CDS client would prefetch
// it; a search answers a searchset Bundle holding every match.
func (s *BundleStore) Query(ref string) (json.RawMessage, error) {
	matches, read, err := s.match(ref)
	if err != nil {
		return nil, err
	}
	if read {
		if len(matches) == 0 {
			return json.RawMessage("null"), nil
		}
		return matches[0].res.Raw, nil
	}
	return searchset(s.withMedications(matches), ""), nil
}

// withMedications adds the Medications that matched MedicationRequests
// reference, as an EHR that includes them in its prefetch would.
func (s *BundleStore) withMedications(matches []stored) []stored {
	rs := make([]fhirmap.Resource, len(matches))
	held := map[string]bool{}
	for i, m := range matches {
		rs[i] = m.res
		held[m.res.Ref()] = true
	}
	for _, t := range medicationRefs(s.refs, rs) {
		if held[t.Ref()] {
			continue
		}
		for _, r := range s.resources {
			if r.res.Ref() == t.Ref() {
				matches = append(matches, r)
				break
			}
		}
	}
	return matches
}

func (s *BundleStore) match(ref string) (out []stored, read bool, err error) {
	path, rawQuery, _ := strings.Cut(ref, "?")
	typ, id, isRead := strings.Cut(strings.Trim(path, "/"), "/")
	if isRead {
		for _, r := range s.resources {
			if r.res.Type == typ && r.res.ID == id {
				return []stored{r}, true, nil
			}
		}
		return nil, true, nil
	}
	q, err := url.ParseQuery(rawQuery)
	if err != nil {
		return nil, false, fmt.Errorf("query %s: %w", typ, err)
	}
	count := -1
	sortDesc, sortBy := false, ""
	var filters []func(stored) bool
	for name, values := range q {
		v := strings.Join(values, ",")
		switch name {
		case "patient", "subject":
			filters = append(filters, func(r stored) bool { return s.refMatches(r, v) })
		case "code":
			filters = append(filters, func(r stored) bool { return tokenMatches(r.fields.Code, v) || tokenMatches(r.fields.MedicationCC, v) })
		case "clinical-status":
			filters = append(filters, func(r stored) bool { return tokenMatches(r.fields.ClinicalStatus, v) })
		case "status":
			filters = append(filters, func(r stored) bool { return inList(r.fields.Status, v) })
		case "_count":
			if count, err = strconv.Atoi(v); err != nil || count < 0 {
				return nil, false, fmt.Errorf("query %s: _count %q is not a count", typ, v)
			}
		case "_sort":
			sortBy = strings.TrimPrefix(v, "-")
			sortDesc = strings.HasPrefix(v, "-")
			// "effective-time" is MedicationAdministration's date (FHIR R4
			// search parameters); both sort by the resource's effective time.
			if sortBy != "date" && sortBy != "effective-time" {
				return nil, false, fmt.Errorf("query %s: _sort %q is not supported", typ, v)
			}
		default:
			return nil, false, fmt.Errorf("query %s: search parameter %q is not supported", typ, name)
		}
	}
next:
	for _, r := range s.resources {
		if r.res.Type != typ {
			continue
		}
		for _, f := range filters {
			if !f(r) {
				continue next
			}
		}
		out = append(out, r)
	}
	if sortBy != "" {
		sort.SliceStable(out, func(i, j int) bool {
			a, b := dateKey(out[i].fields.date()), dateKey(out[j].fields.date())
			if sortDesc {
				return a.After(b)
			}
			return a.Before(b)
		})
	}
	if count >= 0 && count < len(out) {
		out = out[:count]
	}
	return out, false, nil
}

// date is the resource's search "date" as written.
func (f searchFields) date() string {
	switch {
	case f.EffDateTime != "":
		return f.EffDateTime
	case f.EffInstant != "":
		return f.EffInstant
	case f.EffPeriod != nil && f.EffPeriod.Start != "":
		return f.EffPeriod.Start
	case f.EffPeriod != nil:
		return f.EffPeriod.End
	case f.AuthoredOn != "":
		return f.AuthoredOn
	}
	return f.RecordedDate
}

// dateKey orders dates; unreadable ones sort as the zero time.
func dateKey(s string) time.Time {
	t, _, _ := fhirmap.ParseDateTime(s)
	return t
}

// refMatches applies a patient or subject search value ("id" or
// "Patient/id") to r.
func (s *BundleStore) refMatches(r stored, v string) bool {
	id := strings.TrimPrefix(v, "Patient/")
	f := r.fields
	return (f.Subject != nil && s.refs.RefersToPatient(f.Subject.Reference, r.res, id)) ||
		(f.Patient != nil && s.refs.RefersToPatient(f.Patient.Reference, r.res, id))
}

// tokenMatches applies a token search value list ("system|code,code").
func tokenMatches(cf *codeField, list string) bool {
	if cf == nil {
		return false
	}
	for _, tok := range strings.Split(list, ",") {
		system, code, hasSystem := strings.Cut(tok, "|")
		if !hasSystem {
			code, system = system, ""
		}
		for _, c := range cf.Coding {
			if c.Code == code && (!hasSystem || c.System == system) {
				return true
			}
		}
	}
	return false
}

func inList(v, list string) bool {
	for _, s := range strings.Split(list, ",") {
		if s == v {
			return true
		}
	}
	return false
}

func searchset(rs []stored, next string) json.RawMessage {
	type entry struct {
		Resource json.RawMessage `json:"resource"`
	}
	type link struct {
		Relation string `json:"relation"`
		URL      string `json:"url"`
	}
	b := struct {
		ResourceType string  `json:"resourceType"`
		Type         string  `json:"type"`
		Total        *int    `json:"total,omitempty"`
		Link         []link  `json:"link,omitempty"`
		Entry        []entry `json:"entry,omitempty"`
	}{ResourceType: "Bundle", Type: "searchset"}
	if next != "" {
		b.Link = []link{{Relation: "next", URL: next}}
	} else {
		n := len(rs)
		b.Total = &n
	}
	for _, r := range rs {
		b.Entry = append(b.Entry, entry{Resource: r.res.Raw})
	}
	out, _ := json.Marshal(b) // strings and raw JSON already validated: cannot fail
	return out
}

// ServeHTTP serves GET reads and searches under any base path: the last one
// or two path segments are taken as Type or Type/id. Pages are linked by a
// "_page" parameter of its own.
func (s *BundleStore) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	if s.Token != "" && r.Header.Get("Authorization") != "Bearer "+s.Token {
		http.Error(w, "unauthorized", http.StatusUnauthorized)
		return
	}
	if r.Method != http.MethodGet {
		http.Error(w, "method not allowed", http.StatusMethodNotAllowed)
		return
	}
	segs := strings.Split(strings.Trim(r.URL.Path, "/"), "/")
	q := r.URL.Query()
	page, _ := strconv.Atoi(q.Get("_page"))
	q.Del("_page")
	ref := segs[len(segs)-1]
	if len(segs) >= 2 && q.Encode() == "" && isResourceType(segs[len(segs)-2]) {
		ref = segs[len(segs)-2] + "/" + segs[len(segs)-1]
	}
	matches, read, err := s.match(ref + "?" + q.Encode())
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadRequest)
		return
	}
	w.Header().Set("Content-Type", "application/fhir+json")
	if read {
		if len(matches) == 0 {
			http.Error(w, "not found", http.StatusNotFound)
			return
		}
		_, _ = w.Write(matches[0].res.Raw)
		return
	}
	next := ""
	if s.PageSize > 0 {
		start := page * s.PageSize
		if start > len(matches) {
			start = len(matches)
		}
		end := start + s.PageSize
		if end < len(matches) {
			q.Set("_page", strconv.Itoa(page+1))
			next = "http://" + r.Host + r.URL.Path + "?" + q.Encode()
		} else {
			end = len(matches)
		}
		matches = matches[start:end]
	}
	_, _ = w.Write(searchset(matches, next))
}

func isResourceType(s string) bool {
	return s != "" && s[0] >= 'A' && s[0] <= 'Z'
}
