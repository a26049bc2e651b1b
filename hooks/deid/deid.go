// Package deid de-identifies captured CDS Hooks requests for regression
// tests: it removes names, identifiers, contact details and free text,
// renames every id and reference consistently, shifts every date by one
// offset per patient, and drops the access token. A Session keeps the
// renaming and the offsets consistent across the calls of one capture.
package deid

import (
	"crypto/hmac"
	"crypto/rand"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"regexp"
	"strings"
	"time"
)

// Removed are the members removed wherever they occur: a person's names,
// identifiers, contact details and photo, free-text notes (FHIR R4
// HumanName, Identifier, ContactPoint, Address, Attachment, Annotation), a
// patient's instructions, the people and organisations in a record
// (performer, requester, …), links (a next link's URL names the patient)
// and extensions (which can hold anything). Besides these, a resource's
// narrative (its text) and a display that is not a code's are removed.
// What halite reads stays: codes, values and units, statuses, times
// (shifted), coded concepts' text (a product's or a test's name), dosage
// text.
var Removed = map[string]bool{
	"name": true, "identifier": true, "telecom": true, "address": true, "photo": true, "contact": true,
	"note": true, "comment": true, "patientInstruction": true, "communication": true,
	"generalPractitioner": true, "managingOrganization": true, "link": true, "performer": true, "requester": true,
	"recorder": true, "asserter": true, "author": true, "orderer": true, "extension": true, "modifierExtension": true,
}

// renamedContext are the context members whose value is a reference or
// an id, renamed like the resources' ids.
var renamedContext = map[string]bool{"userId": true, "patientId": true, "encounterId": true}

var (
	dateTimePattern  = regexp.MustCompile(`^(\d{4}-\d{2}-\d{2})(T\d{2}:\d{2}(:\d{2}(\.\d+)?)?(Z|[+-]\d{2}:\d{2}))?$`)
	referencePattern = regexp.MustCompile(`^(?:(.*/))?([A-Z][A-Za-z]+)/([A-Za-z0-9\-.]{1,64})(/_history/.*)?$`)
)

// Session de-identifies the calls of one capture: ids are renamed by a
// keyed hash, and each patient's dates are shifted by an offset drawn from
// the same key, so the same patient keeps the same pseudonym and offset
// across calls. The key never leaves memory.
type Session struct {
	key []byte
}

// NewSession starts a session with a fresh random key.
func NewSession() (*Session, error) {
	key := make([]byte, 32)
	if _, err := rand.Read(key); err != nil {
		return nil, fmt.Errorf("deid: %w", err)
	}
	return &Session{key: key}, nil
}

func (s *Session) mac(parts ...string) []byte {
	m := hmac.New(sha256.New, s.key)
	m.Write([]byte(strings.Join(parts, "\x00")))
	return m.Sum(nil)
}

// pseudonym is the renamed id of typ/id.
func (s *Session) pseudonym(typ, id string) string {
	return "d" + hex.EncodeToString(s.mac("id", typ, id))[:20]
}

// Offset is the shift applied to the dates of the patient with id: 30 to
// 395 days back, whole days, so times of day and weekdays stay comparable
// across one patient's data.
func (s *Session) Offset(patientID string) time.Duration {
	n := binary.BigEndian.Uint32(s.mac("offset", patientID))
	return -time.Duration(30+n%366) * 24 * time.Hour
}

// Request de-identifies one captured request body and returns it, with the
// time the call should be replayed at (at shifted by the patient's offset).
func (s *Session) Request(body []byte, at time.Time) ([]byte, time.Time, error) {
	var req map[string]any
	if err := json.Unmarshal(body, &req); err != nil {
		return nil, time.Time{}, fmt.Errorf("deid: the request is not a JSON object: %w", err)
	}
	patient := ""
	if ctx, ok := req["context"].(map[string]any); ok {
		patient, _ = ctx["patientId"].(string)
	}
	w := walker{s: s, shift: s.Offset(patient)}
	delete(req, "fhirAuthorization") // the access token is never kept
	if _, ok := req["fhirServer"]; ok {
		req["fhirServer"] = "https://fhir.example.invalid/fhir"
	}
	req["hookInstance"] = w.hookInstance()
	if ctx, ok := req["context"].(map[string]any); ok {
		for k, v := range ctx {
			str, isString := v.(string)
			switch {
			case renamedContext[k] && isString && k == "patientId":
				ctx[k] = s.pseudonym("Patient", str)
			case renamedContext[k] && isString && k == "encounterId":
				ctx[k] = s.pseudonym("Encounter", str)
			case renamedContext[k] && isString:
				ctx[k] = w.reference(str)
			case k == "selections":
				if sel, ok := v.([]any); ok {
					for i, x := range sel {
						if ref, ok := x.(string); ok {
							sel[i] = w.reference(ref)
						}
					}
				}
			default:
				ctx[k] = w.value(k, v)
			}
		}
	}
	if p, ok := req["prefetch"]; ok {
		req["prefetch"] = w.value("prefetch", p)
	}
	out, err := json.MarshalIndent(req, "", "  ")
	if err != nil {
		return nil, time.Time{}, fmt.Errorf("deid: %w", err)
	}
	return append(out, '\n'), at.Add(w.shift).UTC().Truncate(time.Second), nil
}

type walker struct {
	s     *Session
	shift time.Duration
}

// hookInstance is a fresh random UUID (the original could join the capture
// to the EHR's logs).
func (w walker) hookInstance() string {
	b := make([]byte, 16)
	_, _ = rand.Read(b)
	b[6], b[8] = (b[6]&0x0f)|0x40, (b[8]&0x3f)|0x80
	return fmt.Sprintf("%x-%x-%x-%x-%x", b[0:4], b[4:6], b[6:8], b[8:10], b[10:])
}

// value de-identifies v found under key.
func (w walker) value(key string, v any) any {
	switch t := v.(type) {
	case map[string]any:
		return w.object(t)
	case []any:
		for i := range t {
			// A contained resource is referenced as #id, with no type: its
			// id is renamed as the reference is.
			var containedID string
			if o, ok := t[i].(map[string]any); ok && key == "contained" {
				containedID, _ = o["id"].(string)
			}
			t[i] = w.value(key, t[i])
			if o, ok := t[i].(map[string]any); ok && containedID != "" {
				o["id"] = w.s.pseudonym("contained", containedID)
			}
		}
		return t
	case string:
		switch {
		case key == "reference" || key == "fullUrl":
			return w.reference(t)
		case dateTimePattern.MatchString(t):
			return w.date(t)
		}
	}
	return v
}

// object de-identifies a JSON object: a resource (with resourceType) gets
// its id renamed and its narrative removed.
func (w walker) object(o map[string]any) map[string]any {
	typ, isResource := o["resourceType"].(string)
	for k, v := range o {
		switch {
		case k == "text" && isResource:
			delete(o, k) // the narrative: free text
		case k == "display":
			if isCoding(o) {
				continue // a code's display is the code system's, not the patient's
			}
			delete(o, k)
		case Removed[k]:
			delete(o, k)
		case k == "id" && isResource:
			if id, ok := v.(string); ok {
				o[k] = w.s.pseudonym(typ, id)
			}
		case k == "id":
			delete(o, k) // an element id can carry anything
		default:
			o[k] = w.value(k, v)
		}
	}
	return o
}

// isCoding reports whether o is a Coding (system and code).
func isCoding(o map[string]any) bool {
	_, hasCode := o["code"]
	_, hasSystem := o["system"]
	return hasCode && hasSystem
}

// reference renames the id in a reference ([base/]Type/id, urn:uuid:…,
// #contained) consistently; anything else is replaced.
func (w walker) reference(ref string) string {
	switch {
	case strings.HasPrefix(ref, "#"):
		return "#" + w.s.pseudonym("contained", ref[1:])
	case strings.HasPrefix(ref, "urn:uuid:"), strings.HasPrefix(ref, "urn:oid:"):
		sum := w.s.mac("urn", ref)
		return fmt.Sprintf("urn:uuid:%x-%x-%x-%x-%x", sum[0:4], sum[4:6], sum[6:8], sum[8:10], sum[10:16])
	}
	if m := referencePattern.FindStringSubmatch(ref); m != nil {
		base := ""
		if m[1] != "" {
			base = "https://fhir.example.invalid/fhir/"
		}
		return base + m[2] + "/" + w.s.pseudonym(m[2], m[3])
	}
	return "Unknown/" + w.s.pseudonym("ref", ref)
}

// date shifts a FHIR date or dateTime by the patient's offset, keeping
// its precision and its zone offset.
func (w walker) date(s string) string {
	if len(s) == len("2006-01-02") {
		t, err := time.Parse("2006-01-02", s)
		if err != nil {
			return s
		}
		return t.Add(w.shift).Format("2006-01-02")
	}
	for _, layout := range []string{time.RFC3339Nano, "2006-01-02T15:04Z07:00"} {
		if t, err := time.Parse(layout, s); err == nil {
			return t.Add(w.shift).Format(layout)
		}
	}
	return "1900-01-01" // a date time.Parse cannot read (a leap second, an hour 24) is not kept
}
