package fhirmap

import (
	"errors"
	"strings"
	"testing"
)

func TestParseBundle(t *testing.T) {
	tests := []struct {
		name        string
		raw         string
		wantErr     string // substring; "" means success
		wantType    string
		wantNext    string
		wantEntries []string // fullUrl of each kept entry
	}{
		{"searchset with next link", `{"resourceType":"Bundle","type":"searchset",
		  "link":[{"relation":"self","url":"http://example.org/fhir/Observation?patient=p1"},{"relation":"next","url":"http://example.org/fhir/Observation?patient=p1&page=2"}],
		  "entry":[{"fullUrl":"http://example.org/fhir/Observation/a","resource":{"resourceType":"Observation","id":"a"}}]}`,
			"", "searchset", "http://example.org/fhir/Observation?patient=p1&page=2", []string{"http://example.org/fhir/Observation/a"}},
		{"collection, no link", `{"resourceType":"Bundle","type":"collection","entry":[{"fullUrl":"u1","resource":{"resourceType":"Patient","id":"p1"}}]}`,
			"", "collection", "", []string{"u1"}},
		{"missing type stays empty", `{"resourceType":"Bundle","entry":[]}`, "", "", "", nil},
		{"entries without resource skipped", `{"resourceType":"Bundle","type":"searchset","entry":[
		  {"fullUrl":"u1"},{"fullUrl":"u2","resource":null},{"fullUrl":"u3","resource":{"resourceType":"Observation","id":"c"}},
		  {"search":{"mode":"outcome"}}]}`,
			"", "searchset", "", []string{"u3"}},
		{"only self link", `{"resourceType":"Bundle","type":"searchset","link":[{"relation":"self","url":"s"}]}`, "", "searchset", "", nil},
		{"not a Bundle", `{"resourceType":"Observation","id":"a"}`, `resourceType is "Observation", want "Bundle"`, "", "", nil},
		{"no resourceType", `{"type":"searchset"}`, `resourceType is "", want "Bundle"`, "", "", nil},
		{"null", `null`, `resourceType is ""`, "", "", nil},
		{"not JSON", `<Bundle/>`, "read bundle: ", "", "", nil},
		{"array", `[]`, "read bundle: ", "", "", nil},
		{"entry not an array", `{"resourceType":"Bundle","entry":{}}`, "read bundle: ", "", "", nil},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			b, err := ParseBundle([]byte(tt.raw))
			if tt.wantErr != "" {
				if err == nil || !strings.Contains(err.Error(), tt.wantErr) {
					t.Fatalf("ParseBundle error %v, want one containing %q", err, tt.wantErr)
				}
				if b != nil {
					t.Errorf("bundle %+v with error, want nil", b)
				}
				return
			}
			if err != nil {
				t.Fatalf("ParseBundle: %v", err)
			}
			if b.Type != tt.wantType || b.Next != tt.wantNext {
				t.Errorf("type %q next %q, want %q %q", b.Type, b.Next, tt.wantType, tt.wantNext)
			}
			var got []string
			for _, e := range b.Entries {
				got = append(got, e.FullURL)
				if _, err := ReadResource(e.Resource); err != nil {
					t.Errorf("entry %s: %v", e.FullURL, err)
				}
			}
			if strings.Join(got, " ") != strings.Join(tt.wantEntries, " ") {
				t.Errorf("entries %v, want %v", got, tt.wantEntries)
			}
		})
	}
}

func TestReadResource(t *testing.T) {
	tests := []struct {
		raw      string
		wantType string
		wantRef  string
		wantErr  bool
	}{
		{`{"resourceType":"Observation","id":"a"}`, "Observation", "Observation/a", false},
		{`{"resourceType":"Medication"}`, "Medication", "Medication/", false},
		{`{"id":"a"}`, "", "", true},
		{`42`, "", "", true},
		{`{}`, "", "", true},
	}
	for _, tt := range tests {
		r, err := ReadResource([]byte(tt.raw))
		if tt.wantErr {
			if !errors.Is(err, ErrNotResource) {
				t.Errorf("ReadResource(%s) error %v, want ErrNotResource", tt.raw, err)
			}
			continue
		}
		if err != nil || r.Type != tt.wantType || r.Ref() != tt.wantRef {
			t.Errorf("ReadResource(%s) = %+v, %v; want type %s ref %s", tt.raw, r, err, tt.wantType, tt.wantRef)
		}
	}
}
