package rules

import (
	_ "embed"
	"fmt"
	"regexp"
	"strings"
)

//go:embed data/links.json
var embeddedLinks []byte

// SourceLink is the address of a source a card cites: a card whose detail
// contains Match gets it among its links.
type SourceLink struct {
	Match    string `json:"match"`
	Label    string `json:"label"`
	URL      string `json:"url"`
	Verified string `json:"verified"` // how the address was confirmed (for reviewers)
}

// sourceLinks are the confirmed addresses (data/links.json).
type sourceLinks struct {
	Note  string       `json:"note"`
	Links []SourceLink `json:"links"`
}

// LinkAddress is the form of an address halite links to: a PubMed or
// PubMed Central page, or a DOI.
var LinkAddress = regexp.MustCompile(`^(?:https://pubmed\.ncbi\.nlm\.nih\.gov/\d+/|https://pmc\.ncbi\.nlm\.nih\.gov/articles/PMC\d+/|https://doi\.org/10\.\d{4,9}/\S+)$`)

func parseLinks(data []byte) ([]SourceLink, error) {
	var l sourceLinks
	if err := decodeStrict(data, &l); err != nil {
		return nil, fmt.Errorf("load links: %w", err)
	}
	for i, s := range l.Links {
		if s.Match == "" || s.Label == "" || s.Verified == "" || !LinkAddress.MatchString(s.URL) {
			return nil, fmt.Errorf("load links: links[%d] needs a match, a label, how it was verified, and a PubMed, PubMed Central or DOI address", i)
		}
	}
	return l.Links, nil
}

// linksFor are the confirmed addresses of the sources detail cites.
func (r *Ruleset) linksFor(detail string) []SourceLink {
	var out []SourceLink
	for _, s := range r.links {
		if strings.Contains(detail, s.Match) {
			out = append(out, s)
		}
	}
	return out
}
