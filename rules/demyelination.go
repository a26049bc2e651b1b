package rules

import (
	"fmt"
	"strings"
	"time"
)

// RiskFactor is one high osmotic-demyelination risk feature found, with the
// evidence ("sodium 104 mmol/L at …", "Condition/c1 ICD-10-CM F10.20").
type RiskFactor struct {
	Factor   string
	Evidence string
}

// DemyelinationRisk lists the high-risk features present at at: a sodium at
// or below the policy threshold, or a potassium below its threshold, within
// the policy window; or an active Condition coded as a listed factor. Any
// one makes the risk high. A feature halite cannot read (no potassium, an
// uncoded condition) is not found; UncheckedRisk names the missing labs so
// the card can say so.
func DemyelinationRisk(p DemyelinationRiskPolicy, f Facts, at time.Time) []RiskFactor {
	var out []RiskFactor
	from := at.Add(-time.Duration(p.WindowHours) * time.Hour)
	inWindow := func(m Measurement) bool { return !m.At.Before(from) && !m.At.After(at) }
	for _, m := range f.Labs[Sodium] {
		if inWindow(m) && m.Value <= p.SodiumAtOrBelow {
			out = append(out, RiskFactor{"sodium at or below " + fmt.Sprint(p.SodiumAtOrBelow) + " mmol/L",
				fmt.Sprintf("sodium %s mmol/L at %s", show(Sodium, m.Value), stamp(m.At))})
			break
		}
	}
	for _, m := range f.Labs[Potassium] {
		if inWindow(m) && m.Value < p.PotassiumBelow {
			out = append(out, RiskFactor{"hypokalemia",
				fmt.Sprintf("potassium %s mmol/L at %s", show(Potassium, m.Value), stamp(m.At))})
			break
		}
	}
	seen := map[string]bool{}
	for _, c := range f.Conditions {
		for _, cd := range c.Codings {
			for _, list := range p.Conditions {
				if cd.System != list.System || seen[list.Factor] || !list.matches(cd.Code) {
					continue
				}
				seen[list.Factor] = true
				out = append(out, RiskFactor{list.Factor, c.Reference + " " + cd.System + " " + cd.Code})
			}
		}
	}
	return out
}

// UncheckedRisk names what DemyelinationRisk could not check (no recent
// potassium, a prefetch that failed or was partial), so a card can say the
// high-risk limit was not ruled out.
func UncheckedRisk(p DemyelinationRiskPolicy, f Facts, at time.Time) []string {
	var out []string
	from := at.Add(-time.Duration(p.WindowHours) * time.Hour)
	haveK := false
	for _, m := range f.Labs[Potassium] {
		if !m.At.Before(from) && !m.At.After(at) {
			haveK = true
		}
	}
	if !haveK {
		out = append(out, fmt.Sprintf("no potassium result in the last %d h", p.WindowHours))
	}
	for _, g := range f.Gaps {
		out = append(out, "data not obtained ("+g.Source+": "+g.Reason+")")
	}
	return out
}

// complete reports whether c names its factor, system, codes and source.
func (c ConditionCodes) complete() bool {
	return c.Factor != "" && c.System != "" && c.Source != "" && len(c.Codes)+len(c.Prefixes) > 0
}

func (c ConditionCodes) matches(code string) bool {
	for _, x := range c.Codes {
		if code == x {
			return true
		}
	}
	for _, p := range c.Prefixes {
		if strings.HasPrefix(code, p) {
			return true
		}
	}
	return false
}
