package fhirmap

import (
	"fmt"
	"time"
)

// ParseDateTime reads a FHIR dateTime or instant. It accepts the partial forms
// FHIR allows (YYYY, YYYY-MM, YYYY-MM-DD) and reports whether the value
// carried a time of day; a time of day without a zone is invalid in FHIR R4.
func ParseDateTime(s string) (t time.Time, hasTime bool, err error) {
	for _, layout := range []string{time.RFC3339Nano, time.RFC3339} {
		if t, err := time.Parse(layout, s); err == nil {
			return t, true, nil
		}
	}
	for _, layout := range []string{"2006-01-02", "2006-01", "2006"} {
		if t, err := time.Parse(layout, s); err == nil {
			return t, false, nil
		}
	}
	return time.Time{}, false, fmt.Errorf("%q is not a FHIR dateTime", s)
}

// parseDate reads a full FHIR date (YYYY-MM-DD). Partial dates are reported
// as such so that an age is never computed from a guessed day.
func parseDate(s string) (time.Time, error) {
	t, err := time.Parse("2006-01-02", s)
	if err != nil {
		if _, hasTime, perr := ParseDateTime(s); perr == nil {
			if hasTime {
				return time.Time{}, fmt.Errorf("%q is a dateTime, not a date", s)
			}
			return time.Time{}, fmt.Errorf("%q is a partial date", s)
		}
		return time.Time{}, fmt.Errorf("%q is not a FHIR date", s)
	}
	return t, nil
}
