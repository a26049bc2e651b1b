package rules

import (
	"strings"
	"testing"
)

// Links go only to confirmed PubMed, PubMed Central or DOI addresses
// (issue 20); the embedded table passes, a malformed one is refused.
func TestSourceLinks(t *testing.T) {
	rs := loadRuleset(t)
	if len(rs.links) == 0 {
		t.Fatal("no links loaded")
	}
	for _, bad := range []string{
		`{"note":"","links":[{"match":"x","label":"x","verified":"v","url":"https://example.org/paper"}]}`,
		`{"note":"","links":[{"match":"x","label":"x","verified":"v","url":"https://pubmed.ncbi.nlm.nih.gov/12ab/"}]}`,
		`{"note":"","links":[{"match":"x","label":"x","url":"https://pubmed.ncbi.nlm.nih.gov/4763428/"}]}`,
	} {
		if _, err := parseLinks([]byte(bad)); err == nil {
			t.Errorf("accepted %s", bad)
		}
	}
	// A detail citing Katz (N Engl J Med 1973) gets its PubMed address.
	got := rs.linksFor("Glucose-corrected sodium: 131.0 mmol/L (Katz, 1.6 per 100 mg/dL; N Engl J Med 1973)")
	if len(got) != 1 || got[0].URL != "https://pubmed.ncbi.nlm.nih.gov/4763428/" || !strings.Contains(got[0].Label, "Katz") {
		t.Errorf("links %+v", got)
	}
}
