package fhirmap

import (
	"encoding/json"
	"errors"
	"fmt"
	"regexp"
	"strings"
)

// References resolves references among the resources of one call or Bundle
// as FHIR R4 defines it (Bundle, "Resolving references in Bundles"):
// relative Type/id, absolute [base]/Type/id (optionally /_history/n),
// urn:uuid: and urn:oid: fullUrls, and #id within the referring resource.
type References struct {
	byURL map[string]Resource // by fullUrl, without a version
	byRef map[string]Resource // by Type/id
	bases map[string]bool     // fhirServer and the bases of RESTful fullUrls
}

// Target is what a reference resolves to.
type Target struct {
	Type, ID string
	// Resource is the resource referred to when the data holds it (Raw is
	// then set): an entry, or a resource contained in the referrer.
	Resource  Resource
	Contained bool
}

// Ref is the target's relative reference, "Type/id".
func (t Target) Ref() string { return t.Type + "/" + t.ID }

// Held reports whether the data holds the target, not just its identity.
func (t Target) Held() bool { return t.Resource.Raw != nil }

// ErrUnresolved means a reference could not be resolved; the wrapped text
// says why, without the reference itself (it may identify a patient).
var ErrUnresolved = errors.New("reference not resolved")

var (
	typePattern = regexp.MustCompile(`^[A-Z][A-Za-z]{1,63}$`)
	idPattern   = regexp.MustCompile(`^[A-Za-z0-9\-.]{1,64}$`)
)

// NewReferences indexes rs, each with its fullUrl where known; server is
// the call's fhirServer ("" when none), the base of references not in rs.
func NewReferences(server string, rs []Resource) *References {
	x := &References{byURL: map[string]Resource{}, byRef: map[string]Resource{}, bases: map[string]bool{}}
	if server != "" {
		x.bases[strings.TrimRight(server, "/")] = true
	}
	for _, r := range rs {
		if u := versionless(r.FullURL); u != "" {
			if _, dup := x.byURL[u]; !dup {
				x.byURL[u] = r
			}
			if base, _, _, ok := restful(u); ok {
				x.bases[base] = true
			}
		}
		if r.ID != "" {
			if _, dup := x.byRef[r.Ref()]; !dup {
				x.byRef[r.Ref()] = r
			}
		}
	}
	return x
}

// Resolve resolves ref, written in resource from (whose FullURL, when
// absolute and RESTful, is the base of a relative ref). A reference outside
// the data resolves to its identity when it is relative or on a known base.
func (x *References) Resolve(ref string, from Resource) (Target, error) {
	switch {
	case ref == "":
		return Target{}, fmt.Errorf("%w: the reference is empty", ErrUnresolved)
	case strings.HasPrefix(ref, "#"):
		return contained(ref[1:], from)
	case strings.HasPrefix(ref, "urn:uuid:") || strings.HasPrefix(ref, "urn:oid:"):
		if r, ok := x.byURL[ref]; ok {
			return entryTarget(r), nil
		}
		return Target{}, fmt.Errorf("%w: no entry has this urn as its fullUrl", ErrUnresolved)
	case strings.Contains(ref, "://"):
		u := versionless(ref)
		if r, ok := x.byURL[u]; ok {
			return entryTarget(r), nil
		}
		base, typ, id, ok := restful(u)
		if !ok {
			return Target{}, fmt.Errorf("%w: the absolute reference is not [base]/Type/id", ErrUnresolved)
		}
		if len(x.bases) > 0 && !x.bases[base] {
			return Target{}, fmt.Errorf("%w: the absolute reference is to a server other than the data's", ErrUnresolved)
		}
		if r, ok := x.byRef[typ+"/"+id]; ok && versionless(r.FullURL) == "" {
			return entryTarget(r), nil
		}
		return Target{Type: typ, ID: id}, nil
	}
	typ, id, ok := relative(ref)
	if !ok {
		return Target{}, fmt.Errorf("%w: the reference is not Type/id, an absolute URL, a urn or #id", ErrUnresolved)
	}
	if base, _, _, ok := restful(versionless(from.FullURL)); ok {
		if r, ok := x.byURL[base+"/"+typ+"/"+id]; ok {
			return entryTarget(r), nil
		}
	}
	if r, ok := x.byRef[typ+"/"+id]; ok {
		return entryTarget(r), nil
	}
	return Target{Type: typ, ID: id}, nil
}

// RefersToPatient reports whether ref, written in from, is the Patient
// with id patientID (contained Patients never are).
func (x *References) RefersToPatient(ref string, from Resource, patientID string) bool {
	t, err := x.Resolve(ref, from)
	return err == nil && !t.Contained && t.Type == "Patient" && patientID != "" && t.ID == patientID
}

func entryTarget(r Resource) Target { return Target{Type: r.Type, ID: r.ID, Resource: r} }

// contained finds resource #id among from's contained resources; "#" alone
// is from itself.
func contained(id string, from Resource) (Target, error) {
	if id == "" && from.Type != "" {
		return entryTarget(from), nil
	}
	var c struct {
		Contained []json.RawMessage `json:"contained"`
	}
	if len(from.Raw) > 0 && DecodeJSON(from.Raw, &c) == nil {
		for _, raw := range c.Contained {
			if r, err := ReadResource(raw); err == nil && r.ID == id {
				return Target{Type: r.Type, ID: id, Resource: r, Contained: true}, nil
			}
		}
	}
	return Target{}, fmt.Errorf("%w: no contained resource has this id", ErrUnresolved)
}

// relative splits "Type/id" or "Type/id/_history/n".
func relative(ref string) (typ, id string, ok bool) {
	parts := strings.Split(ref, "/")
	if len(parts) == 4 && parts[2] == "_history" && parts[3] != "" {
		parts = parts[:2]
	}
	if len(parts) != 2 || !typePattern.MatchString(parts[0]) || !idPattern.MatchString(parts[1]) {
		return "", "", false
	}
	return parts[0], parts[1], true
}

// versionless is an absolute http(s) URL without "/_history/n" and a
// trailing slash; other fullUrls (urns) are kept as they are.
func versionless(u string) string {
	if !strings.Contains(u, "://") {
		return u
	}
	if i := strings.LastIndex(u, "/_history/"); i >= 0 && !strings.Contains(u[i+len("/_history/"):], "/") {
		u = u[:i]
	}
	return strings.TrimRight(u, "/")
}

// restful splits an absolute URL [base]/Type/id.
func restful(u string) (base, typ, id string, ok bool) {
	if !strings.Contains(u, "://") || strings.ContainsAny(u, "?#") {
		return "", "", "", false
	}
	i := strings.LastIndex(u, "/")
	j := strings.LastIndex(u[:max(i, 0)], "/")
	if j < 0 || !strings.Contains(u[:j], "://") {
		return "", "", "", false
	}
	typ, id = u[j+1:i], u[i+1:]
	if !typePattern.MatchString(typ) || !idPattern.MatchString(id) {
		return "", "", "", false
	}
	return u[:j], typ, id, true
}

// ReadEntry reads the resource of a Bundle entry with its fullUrl. A
// resource without an id in an entry whose fullUrl is urn:uuid:U or
// urn:oid:U is known by U, as a server processing the Bundle as a
// transaction would give it an id; so "Patient/U" names it.
func ReadEntry(e BundleEntry) (Resource, error) {
	r, err := ReadResource(e.Resource)
	if err != nil {
		return r, err
	}
	r.FullURL = e.FullURL
	if r.ID == "" {
		r.ID = urnID(e.FullURL)
	}
	return r, nil
}

// urnID is the id a urn:uuid or urn:oid fullUrl gives, or "".
func urnID(fullURL string) string {
	for _, p := range []string{"urn:uuid:", "urn:oid:"} {
		if id, ok := strings.CutPrefix(fullURL, p); ok && idPattern.MatchString(id) {
			return id
		}
	}
	return ""
}
