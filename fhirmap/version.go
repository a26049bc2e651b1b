package fhirmap

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
)

// ErrNotR4 means content is recognisably of an earlier FHIR version
// (DSTU2 or STU3), which halite does not read.
var ErrNotR4 = errors.New("FHIR R4 expected")

// earlierTypes are resource types of DSTU2 and STU3 that FHIR R4 no longer
// has, with what R4 has instead. Sources: STU3 medicationrequest.diff
// (MedicationRequest "old-name" MedicationOrder); the R4 ServiceRequest
// page's note (ReferralRequest and ProcedureRequest merged into
// ServiceRequest; STU3 had merged DiagnosticRequest into ProcedureRequest);
// DiagnosticOrder as DSTU2's name for that request is from memory.
var earlierTypes = map[string]string{
	"MedicationOrder":  "a DSTU2 MedicationOrder (R4: MedicationRequest)",
	"DiagnosticOrder":  "a DSTU2 DiagnosticOrder (R4: ServiceRequest)",
	"ProcedureRequest": "an STU3 ProcedureRequest (R4: ServiceRequest)",
	"ReferralRequest":  "an STU3 ReferralRequest (R4: ServiceRequest)",
}

// CheckR4 reports a resource that is recognisably DSTU2 or STU3: a type R4
// no longer has, or an STU3 MedicationRequest, whose requester is an
// object with an agent (STU3 medicationrequest.diff: requester.agent; R4
// made requester a plain Reference). The error wraps ErrNotR4 and says
// what was found. Anything else passes: halite judges it as R4.
func CheckR4(r Resource) error {
	if what, ok := earlierTypes[r.Type]; ok {
		return fmt.Errorf("%w: this is %s", ErrNotR4, what)
	}
	if r.Type == "MedicationRequest" {
		var mr struct {
			Requester struct {
				Agent json.RawMessage `json:"agent"`
			} `json:"requester"`
		}
		if DecodeJSON(r.Raw, &mr) == nil && len(mr.Requester.Agent) > 0 {
			return fmt.Errorf("%w: this MedicationRequest has requester.agent, an STU3 element", ErrNotR4)
		}
	}
	return nil
}

// utf8BOM is the byte-order mark some tools write at the start of UTF-8
// files; JSON (RFC 8259 §8.1) may be read ignoring it.
var utf8BOM = []byte{0xEF, 0xBB, 0xBF}

// ReadDocument prepares a whole JSON document from outside (a request
// body, a bundle file) for decoding: a leading UTF-8 byte-order mark is
// dropped, and a document that is not a JSON object is refused with a
// plain description of what it is.
func ReadDocument(data []byte) ([]byte, error) {
	data = bytes.TrimPrefix(data, utf8BOM)
	trimmed := bytes.TrimLeft(data, " \t\r\n")
	if len(trimmed) == 0 {
		return nil, errors.New("the document is empty")
	}
	switch trimmed[0] {
	case '{':
		return data, nil
	case '[':
		return nil, errors.New("the document is a JSON array; a JSON object is expected")
	case '"':
		return nil, errors.New("the document is a JSON string; a JSON object is expected")
	case '<':
		return nil, errors.New("the document looks like XML; halite reads FHIR JSON")
	}
	return nil, errors.New("the document is not a JSON object")
}
