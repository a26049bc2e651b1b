package fhirmap

import (
	"testing"
	"time"
)

func TestParseDateTime(t *testing.T) {
	// Forms from the FHIR R4 dateTime/instant definitions (from memory: YYYY,
	// YYYY-MM, YYYY-MM-DD, or a full time with a zone).
	tests := []struct {
		in       string
		want     time.Time
		wantTime bool
		wantErr  bool
	}{
		{"2026-11-20T08:00:00Z", time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC), true, false},
		{"2026-11-20T13:30:00+05:30", time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC), true, false},
		{"2026-11-20T03:00:00-05:00", time.Date(2026, 11, 20, 8, 0, 0, 0, time.UTC), true, false},
		{"2026-11-20T08:00:00.123Z", time.Date(2026, 11, 20, 8, 0, 0, 123e6, time.UTC), true, false},
		{"2026-11-20", time.Date(2026, 11, 20, 0, 0, 0, 0, time.UTC), false, false},
		{"2026-11", time.Date(2026, 11, 1, 0, 0, 0, 0, time.UTC), false, false},
		{"2026", time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC), false, false},
		{"2026-11-20T08:00:00", time.Time{}, false, true}, // a time without a zone is invalid in FHIR R4
		{"2026-11-20T08:00Z", time.Time{}, false, true},   // seconds are required
		{"2026-02-30", time.Time{}, false, true},
		{"20261120", time.Time{}, false, true},
		{"", time.Time{}, false, true},
	}
	for _, tt := range tests {
		t.Run(tt.in, func(t *testing.T) {
			got, hasTime, err := ParseDateTime(tt.in)
			if (err != nil) != tt.wantErr {
				t.Fatalf("err %v, wantErr %v", err, tt.wantErr)
			}
			if !got.Equal(tt.want) || hasTime != tt.wantTime {
				t.Errorf("ParseDateTime(%q) = %v, %v; want %v, %v", tt.in, got, hasTime, tt.want, tt.wantTime)
			}
		})
	}
}

func TestParseDate(t *testing.T) {
	tests := []struct {
		in      string
		want    time.Time
		wantErr string
	}{
		{"1980-11-20", time.Date(1980, 11, 20, 0, 0, 0, 0, time.UTC), ""},
		{"1980", time.Time{}, `"1980" is a partial date`},
		{"1980-11", time.Time{}, `"1980-11" is a partial date`},
		{"1980-13-01", time.Time{}, `"1980-13-01" is not a FHIR date`},
		{"yesterday", time.Time{}, `"yesterday" is not a FHIR date`},
	}
	for _, tt := range tests {
		got, err := parseDate(tt.in)
		switch {
		case tt.wantErr == "" && (err != nil || !got.Equal(tt.want)):
			t.Errorf("parseDate(%q) = %v, %v; want %v", tt.in, got, err, tt.want)
		case tt.wantErr != "" && (err == nil || err.Error() != tt.wantErr):
			t.Errorf("parseDate(%q) error %v, want %q", tt.in, err, tt.wantErr)
		}
	}
}
