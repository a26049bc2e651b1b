package fhirmap

import (
	"fmt"
	"strings"

	"github.com/halite-cds/halite/rules"
)

// Categories of the reasons a resource is not used, for counts that may be
// logged: they name no resource and no value.
const (
	DropNotThisPatient = "not-this-patient"
	DropTypeNotRead    = "type-not-read"
	DropCodeNotRead    = "code-not-read"
	DropNotActive      = "not-active"
	DropUnreferenced   = "unreferenced"
	DropStatus         = "status"
	DropDuplicate      = "duplicate"
	DropInvalid        = "invalid"
	DropTime           = "time"
	DropValue          = "value"
)

// dropCategories maps the start of a rejection reason to its category; the
// first match counts, and a reason matching none is DropValue.
var dropCategories = []struct{ prefix, category string }{
	{"subject is not the patient", DropNotThisPatient},
	{"Patient is not the patient", DropNotThisPatient},
	{"resource type not read", DropTypeNotRead},
	{"draft order type not read", DropTypeNotRead},
	{"clinicalStatus", DropNotActive},
	{"verificationStatus", DropNotActive},
	{"no order read references it", DropUnreferenced},
	{"duplicate of", DropDuplicate},
	{"status", DropStatus},
	{"invalid resource", DropInvalid},
	{"not a readable", DropInvalid},
	{ErrNotResource.Error(), DropInvalid},
	{"effective time", DropTime},
	{"no effective time", DropTime},
}

// DropCounts counts the resources f does not use by reason category: its
// rejections (one whose Source is a count, "12 × Encounter", counts that
// many) and the Observations noted as having no code halite reads.
func DropCounts(f rules.Facts) map[string]int {
	out := map[string]int{}
	for _, n := range f.Notes {
		var c int
		if _, err := fmt.Sscanf(n, "%d × Observation", &c); err == nil && strings.HasSuffix(n, noteUnreadCode) {
			out[DropCodeNotRead] += c
		}
	}
	for _, r := range f.Rejected {
		n := 1
		var typ string
		if c, err := fmt.Sscanf(r.Source, "%d × %s", &n, &typ); err != nil || c != 2 {
			n = 1
		}
		out[dropCategory(r.Reason)] += n
	}
	return out
}

func dropCategory(reason string) string {
	for _, c := range dropCategories {
		if strings.HasPrefix(reason, c.prefix) {
			return c.category
		}
	}
	return DropValue
}
