package main

import (
	"testing"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/fhirclient"
)

// TestFHIRClientCodesHaveACause: every code the FHIR client gives a failed
// fetch is in the hooks cause table, so no fetch failure is blamed by
// default.
func TestFHIRClientCodesHaveACause(t *testing.T) {
	for _, code := range fhirclient.Codes() {
		if hooks.CodeCause(code) == "" {
			t.Errorf("fhirclient code %q has no cause in hooks' table", code)
		}
	}
}
