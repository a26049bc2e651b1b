// Package deid de-identifies captured CDS Hooks requests for regression
// tests. It keeps only what halite reads — per resource type, the members
// its mapping uses — and of those removes free text, renames every id and
// reference consistently, shifts every date by one offset per patient and
// caps ages at 90; the access token and the FHIR server's address go. A
// Session keeps the renaming and the offsets consistent across the calls of
// one capture. This is pseudonymisation for test data, not an anonymity
// guarantee: review a capture before it leaves the machine.
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

// keptMembers lists, per resource type, the members kept: those halite's
// FHIR mapping reads (fhirmap). A resource of another type keeps only its
// type and renamed id.
var keptMembers = map[string][]string{
	"Bundle":                   {"type", "entry"},
	"Patient":                  {"birthDate", "gender"},
	"Observation":              {"status", "code", "category", "subject", "effectiveDateTime", "effectivePeriod", "effectiveInstant", "issued", "valueQuantity"},
	"MedicationRequest":        {"status", "intent", "medicationCodeableConcept", "medicationReference", "subject", "authoredOn", "dosageInstruction", "priorPrescription", "dispenseRequest", "contained"},
	"Medication":               {"code", "form", "ingredient"},
	"MedicationAdministration": {"status", "medicationCodeableConcept", "medicationReference", "subject", "effectiveDateTime", "effectivePeriod", "request", "dosage", "contained"},
	"Condition":                {"clinicalStatus", "verificationStatus", "code", "subject", "onsetDateTime", "onsetPeriod", "recordedDate"},
	"Procedure":                {"status", "code", "subject", "performedDateTime", "performedPeriod"},
	"NutritionOrder":           {"status", "intent", "patient", "dateTime", "oralDiet"},
	"OperationOutcome":         {"issue"},
}

// droppedNested are removed wherever they occur inside kept members: free
// text and anything that can carry it (extensions, element ids, notes,
// instructions, an issue's diagnostics and details).
var droppedNested = map[string]bool{
	"extension": true, "modifierExtension": true, "id": true, "note": true, "patientInstruction": true,
	"additionalInstruction": true, "instruction": true, "diagnostics": true, "details": true, "search": true, "request": true, "response": true,
}

// conceptKeys are the members that hold a CodeableConcept, whose text (the
// concept's label: a product's or a test's name) is kept; every other text
// is free text and goes.
var conceptKeys = map[string]bool{
	"code": true, "medicationCodeableConcept": true, "itemCodeableConcept": true, "route": true, "type": true, "category": true,
	"clinicalStatus": true, "verificationStatus": true, "modifier": true, "form": true, "method": true, "asNeededCodeableConcept": true,
}

// dateKeys are the members whose year-only values are dates.
var dateKeys = map[string]bool{
	"birthDate": true, "start": true, "end": true, "issued": true, "authoredOn": true, "dateTime": true, "recordedDate": true,
	"effectiveDateTime": true, "effectiveInstant": true, "onsetDateTime": true, "performedDateTime": true, "event": true,
}

var (
	fullDatePattern  = regexp.MustCompile(`^\d{4}-\d{2}-\d{2}(T.*)?$`)
	yearMonthPattern = regexp.MustCompile(`^\d{4}-\d{2}$`)
	yearPattern      = regexp.MustCompile(`^\d{4}$`)
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
// 395 days back, whole days, so times of day stay comparable across one
// patient's data.
func (s *Session) Offset(patientID string) time.Duration {
	n := binary.BigEndian.Uint32(s.mac("offset", patientID))
	return -time.Duration(30+n%366) * 24 * time.Hour
}

// Request de-identifies one captured request body and returns it, with the
// time the call should be replayed at (at shifted by the patient's offset).
// Only the members CDS Hooks defines for the request and the context
// members of the hooks halite serves are kept.
func (s *Session) Request(body []byte, at time.Time) ([]byte, time.Time, error) {
	var req map[string]any
	if err := json.Unmarshal(body, &req); err != nil || req == nil {
		return nil, time.Time{}, fmt.Errorf("deid: the request is not a JSON object")
	}
	ctx, _ := req["context"].(map[string]any)
	patient, _ := ctx["patientId"].(string)
	w := walker{s: s, shift: s.Offset(patient)}
	w.replay = at.Add(w.shift).UTC().Truncate(time.Second)
	out := map[string]any{"hookInstance": hookInstance()}
	if h, ok := req["hook"].(string); ok {
		out["hook"] = h
	}
	if _, ok := req["fhirServer"]; ok {
		out["fhirServer"] = "https://fhir.example.invalid/fhir" // kept only as a flag: the key's fetch path was there
	}
	if ctx != nil {
		clean := map[string]any{}
		for k, v := range ctx {
			str, isString := v.(string)
			switch {
			case k == "patientId" && isString:
				clean[k] = s.pseudonym("Patient", str)
			case k == "encounterId" && isString:
				clean[k] = s.pseudonym("Encounter", str)
			case k == "userId" && isString:
				clean[k] = w.reference(str)
			case k == "selections":
				if sel, ok := v.([]any); ok {
					for i, x := range sel {
						if ref, ok := x.(string); ok {
							sel[i] = w.reference(ref)
						}
					}
					clean[k] = sel
				}
			case k == "draftOrders":
				clean[k] = w.value(k, v)
			}
		}
		out["context"] = clean
	}
	if p, ok := req["prefetch"].(map[string]any); ok {
		for k, v := range p {
			p[k] = w.value("prefetch", v)
		}
		out["prefetch"] = p
	}
	data, err := json.MarshalIndent(out, "", "  ")
	if err != nil {
		return nil, time.Time{}, fmt.Errorf("deid: %w", err)
	}
	return append(data, '\n'), w.replay, nil
}

type walker struct {
	s      *Session
	shift  time.Duration
	replay time.Time
}

// hookInstance is a fresh random UUID (the original could join the capture
// to the EHR's logs).
func hookInstance() string {
	b := make([]byte, 16)
	_, _ = rand.Read(b)
	b[6], b[8] = (b[6]&0x0f)|0x40, (b[8]&0x3f)|0x80
	return fmt.Sprintf("%x-%x-%x-%x-%x", b[0:4], b[4:6], b[6:8], b[8:10], b[10:])
}

// value de-identifies v found under key.
func (w walker) value(key string, v any) any {
	switch t := v.(type) {
	case map[string]any:
		if typ, ok := t["resourceType"].(string); ok {
			return w.resource(typ, t, key == "contained")
		}
		return w.element(key, t)
	case []any:
		out := make([]any, 0, len(t))
		for _, x := range t {
			out = append(out, w.value(key, x))
		}
		return out
	case string:
		switch {
		case key == "reference" || key == "fullUrl":
			return w.reference(t)
		case fullDatePattern.MatchString(t), yearMonthPattern.MatchString(t), dateKeys[key] && yearPattern.MatchString(t):
			return w.date(t)
		}
	}
	return v
}

// resource keeps the members halite reads of a resource of type typ and
// renames its id (a contained one in the namespace its #id references use);
// a patient's birth date gives an age of at most 90 at the replay time.
func (w walker) resource(typ string, r map[string]any, contained bool) map[string]any {
	out := map[string]any{"resourceType": typ}
	if id, ok := r["id"].(string); ok {
		if contained {
			out["id"] = w.s.pseudonym("contained", id)
		} else {
			out["id"] = w.s.pseudonym(typ, id)
		}
	}
	for _, k := range keptMembers[typ] {
		if v, ok := r[k]; ok {
			out[k] = w.value(k, v)
		}
	}
	if b, ok := out["birthDate"].(string); ok {
		if t, err := time.Parse("2006-01-02", b); err == nil && t.Before(w.replay.AddDate(-90, 0, 0)) {
			out["birthDate"] = w.replay.AddDate(-90, 0, 0).Format("2006-01-02") // ages above 89 are given as 90
		}
	}
	return out
}

// element de-identifies a data type found under key: free text, element ids
// and extensions go; a display stays only on a code.
func (w walker) element(key string, o map[string]any) map[string]any {
	out := map[string]any{}
	for k, v := range o {
		switch {
		case droppedNested[k]:
		case k == "text" && !conceptKeys[key]:
		case k == "display" && !isCoding(o):
		default:
			out[k] = w.value(k, v)
		}
	}
	return out
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

// date shifts a FHIR date, dateTime or instant by the patient's offset,
// keeping its precision and zone; one that does not parse is replaced.
func (w walker) date(s string) string {
	for _, layout := range []string{time.RFC3339Nano, "2006-01-02T15:04Z07:00", "2006-01-02", "2006-01", "2006"} {
		if t, err := time.Parse(layout, s); err == nil {
			return t.Add(w.shift).Format(layout)
		}
	}
	return "1900-01-01"
}
