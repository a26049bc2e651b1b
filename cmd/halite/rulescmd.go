package main

import (
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"sort"
	"strings"
	"text/tabwriter"

	"github.com/halite-cds/halite/rules"
)

// rulesCmd prints the ruleset in force: its revision, the thresholds and
// card policy, and the drug knowledge base, as text or (--json) as data.
func rulesCmd(args []string, stdout, stderr io.Writer) error {
	fs := newFlags("rules", "rules [--policy-override FILE] [--json]", stderr)
	policy := fs.String("policy-override", "", "apply a site policy override `file` first")
	asJSON := fs.Bool("json", false, "print the effective policy and knowledge base as JSON")
	rest, err := parseFlags(fs, args)
	if err != nil {
		return err
	}
	if len(rest) > 0 {
		return errors.New("rules takes no arguments")
	}
	rs, err := loadRuleset(*policy)
	if err != nil {
		return err
	}
	if *asJSON {
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(map[string]any{"ruleset": rs.Revision(), "policy": rs.Policy(),
			"drugs": map[string]any{"note": rs.DrugNote(), "classes": rs.DrugClasses(), "ingredients": rs.Drugs()}})
	}
	p := rs.Policy()
	tw := tabwriter.NewWriter(stdout, 0, 4, 2, ' ', 0)
	fmt.Fprintf(tw, "ruleset %s\n\n== limits\n", rs.Revision())
	l := p.Limits
	for _, x := range []struct {
		name string
		lim  rules.Limit
	}{{"hyponatremia rise per 24 h", l.HyponatremiaRise24h}, {"hyponatremia rise per 48 h", l.HyponatremiaRise48h},
		{"hyponatremia rise per 24 h, high risk", l.HyponatremiaRise24hHighRisk}, {"hypernatremia fall per 24 h", l.HypernatremiaFall24h},
		{"hypernatremia fall per hour", l.HypernatremiaFallPerHour}} {
		fmt.Fprintf(tw, "%s\t%g %s\t%s\n", x.name, x.lim.Value, x.lim.Unit, x.lim.Source)
	}
	fmt.Fprintf(tw, "\n== card policy: infusion check and chart review (hypertonic from Na + K %g mmol/L)\n", p.Cards.HypertonicNaKAtLeast)
	ids := make([]string, 0, len(p.Cards.Rules))
	for id := range p.Cards.Rules {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	for _, id := range ids {
		r := p.Cards.Rules[id]
		ind := r.Indicator.String()
		if r.HighRisk != 0 {
			ind += " (high risk: " + r.HighRisk.String() + ")"
		}
		fmt.Fprintf(tw, "%s\t%s\tre-check %g h\n", id, ind, r.RecheckHours)
	}
	cr := p.ChartReview
	fmt.Fprintf(tw, "\n== chart-review thresholds\n")
	fmt.Fprintf(tw, "sodium counts as recent for\t%g h\n", cr.SodiumMaxAgeHours)
	fmt.Fprintf(tw, "nearing a limit\twithin %g mmol/L\n", cr.NearLimitWithin)
	fmt.Fprintf(tw, "profound or falling\tbelow %g, or a fall of %g in 48 h\n", cr.ProfoundBelow, cr.FallIn48hAtLeast)
	fmt.Fprintf(tw, "SIADH lab pattern\teffective osmolality < %g, urine osmolality > %g, urine sodium > %g (%s)\n",
		cr.SIADH.EffectiveOsmolalityBelow, cr.SIADH.UrineOsmolalityAbove, cr.SIADH.UrineSodiumAbove, cr.SIADH.Source)
	fmt.Fprintf(tw, "restriction bands\t%s\n", cr.Restriction.Scheme)
	for _, b := range cr.Restriction.Bands {
		fmt.Fprintf(tw, "  ratio below %g\t%s\n", b.RatioBelow, b.Text)
	}
	fmt.Fprintf(tw, "concentrating defect\tsodium > %g or serum osmolality > %g with urine osmolality < %g\n",
		cr.ConcentratingDefect.SodiumAbove, cr.ConcentratingDefect.SerumOsmolalityAbove, cr.ConcentratingDefect.UrineOsmolalityBelow)
	ns := p.Neurosurgery
	fmt.Fprintf(tw, "\n== after neurosurgery\n")
	for _, c := range ns.Procedures {
		fmt.Fprintf(tw, "%s\t%s %s (%s)\n", c.Factor, c.System, strings.Join(append(append([]string{}, c.Codes...), c.Prefixes...), ", "), c.Source)
	}
	fmt.Fprintf(tw, "desmopressin flagged\twithin %g days, sodium below %g or a fall of %g in 24 h\n", ns.WindowDays, ns.SodiumBelow, ns.FallIn24hAtLeast)
	fmt.Fprintf(tw, "source\t%s\n", ns.Source)
	fmt.Fprintf(tw, "course\tpolyuric phase to day %g, retention to day %g (%s)\n", ns.Course.PolyuricUntilDay, ns.Course.RetentionUntilDay, ns.Course.Source)
	cd := cr.ConcentratingDefect
	fmt.Fprintf(tw, "polyuria\tadult above %g mL/day, child above %g mL/m²/day (%s); after neurosurgery above %g mL/h for %g h (%s)\n",
		cd.PolyuriaAdultMlPerDay, cd.PolyuriaChildMlPerM2PerDay, cd.PolyuriaSource, cd.PostoperativeMlPerHourAbove, cd.PostoperativeHours, cd.PostoperativeSource)
	bi := p.BrainInjury
	fmt.Fprintf(tw, "\n== brain-injury context (SIADH against salt wasting)\n")
	for _, c := range bi.Conditions {
		fmt.Fprintf(tw, "%s\t%s %s (%s)\n", c.Factor, c.System, strings.Join(append(append([]string{}, c.Codes...), c.Prefixes...), ", "), c.Source)
	}
	fmt.Fprintf(tw, "weight against sodium\t%g kg over %g h (%s)\n", bi.WeightChangeAtLeastKg, bi.WeightWindowHours, bi.WeightSource)
	fmt.Fprintf(tw, "fractional excretion of urate\tnormal %g-%g %%, serum within %g h of the urine (%s)\n", bi.FEUrateNormalAbove,
		bi.FEUrateNormalBelow, bi.UrinePairHours, bi.FEUrateSource)
	fmt.Fprintf(tw, "thyroid and adrenal results\twithin %g days (%s)\n", bi.EndocrineMaxAgeDays, bi.EndocrineSource)
	wd := p.WaterDeprivation
	fmt.Fprintf(tw, "\n== water deprivation test\n")
	fmt.Fprintf(tw, "a test is\tdesmopressin given in the last %g days after %d or more urine osmolalities in the %g h before it\n",
		wd.ShowDays, wd.MinUrineResultsBefore, wd.DeprivationHours)
	fmt.Fprintf(tw, "response\tthe highest urine osmolality within %g h of the dose\n", wd.AfterDoseHours)
	fmt.Fprintf(tw, "adequate dehydration\tserum osmolality above %g or sodium above %g, or urine above %g x serum (%s)\n", wd.AdequateSerumOsmolalityAbove,
		wd.AdequateSodiumAbove, wd.ConcentratedRatio, wd.AdequateSource)
	fmt.Fprintf(tw, "ranges of the rise\tunder %g %%, %g-%g %%, above %g %% (%s)\n", wd.NoResponseRiseBelow, wd.PartialCentralRiseAtLeast,
		wd.CentralRiseAbove, wd.CentralRiseAbove, wd.CriteriaSource)
	fmt.Fprintf(tw, "copeptin\tabove %g pmol/L at sodium %g or more (%s); unstimulated above %g (%s)\n", wd.Copeptin.PrimaryPolydipsiaAbove,
		wd.Copeptin.StimulatedSodiumAtLeast, wd.Copeptin.StimulatedSource, wd.Copeptin.BaselineNephrogenicAbove, wd.Copeptin.BaselineSource)
	sp := p.Suppression
	fmt.Fprintf(tw, "\n== repeats held back (suppression)\n")
	fmt.Fprintf(tw, "selection, then signing	within %g min, unchanged (%g + %g × value) and no higher indicator\n",
		sp.SelectToSignMinutes, sp.Unchanged.Absolute, sp.Unchanged.Relative)
	fmt.Fprintf(tw, "after an override with a reason	%g h unless worse\n", sp.OverrideHours)
	fmt.Fprintf(tw, "between chart openings	%g h unless worse\n", sp.ChartIntervalHours)
	fmt.Fprintf(tw, "critical findings	%s\n", map[bool]string{false: "never held back", true: "held back too (suppressCritical)"}[sp.SuppressCritical])
	watched := make([]string, 0, len(sp.Watch))
	for id := range sp.Watch {
		watched = append(watched, id)
	}
	sort.Strings(watched)
	for _, id := range watched {
		w := sp.Watch[id]
		always := ""
		if w.AlwaysWhen != "" {
			always = "; always shown when " + w.AlwaysWhen + " is set"
		}
		fmt.Fprintf(tw, "  %s	worse when %s is %g or more %s%s\n", id, w.Figure, w.Margin, w.Worse, always)
	}
	fmt.Fprintf(tw, "source\t%s\n", sp.Source)
	d := p.DrugRisk
	fmt.Fprintf(tw, "\n== drug-risk thresholds\n")
	for _, b := range d.Bands {
		weaker := ""
		if b.WeakerEvidence != 0 {
			weaker = " (" + b.WeakerEvidence.String() + " unless the evidence is strong)"
		}
		fmt.Fprintf(tw, "sodium below %g\t%s%s\n", b.Below, b.Indicator, weaker)
	}
	fmt.Fprintf(tw, "renewal one step lower from\t%g mmol/L\n", d.RenewalStepDownFrom)
	fmt.Fprintf(tw, "sodium counts as recent for\t%g days\n", d.SodiumMaxAgeHours/24)
	fmt.Fprintf(tw, "risk multipliers\tage >= %d; another risk drug; a thiazide; a fall >= %g mmol/L in %d days\n",
		d.ElderlyFromAge, d.FallAtLeast, d.FallWindowHours/24)
	fmt.Fprintf(tw, "nephrogenic DI\tsodium > %g, or serum osmolality > %g with urine osmolality < %g\n",
		d.HypernatremiaAbove, d.SerumOsmolalityAbove, d.UrineOsmolalityBelow)
	fmt.Fprintf(tw, "source\t%s\n", d.Source)
	fmt.Fprintf(tw, "\n== drug knowledge base (%d ingredients)\n", len(rs.Drugs()))
	byClass := map[string][]rules.DrugIngredient{}
	for _, ing := range rs.Drugs() {
		byClass[ing.Class] = append(byClass[ing.Class], ing)
	}
	for _, c := range rs.DrugClasses() {
		if len(byClass[c.ID]) == 0 {
			continue
		}
		fmt.Fprintf(tw, "-- %s\n", c.Name)
		for _, ing := range byClass[c.ID] {
			var eff []string
			for _, e := range ing.Effects {
				s := e.Effect
				if e.Mechanism != "" {
					s += " (" + e.Mechanism + ")"
				}
				eff = append(eff, s+", "+e.Evidence)
			}
			fmt.Fprintf(tw, "%s\tRxNorm %s\tATC %s\t%s\t%s\n", ing.Name, strings.Join(ing.RxNorm, " "),
				strings.Join(ing.ATC, " "), strings.Join(eff, "; "), ing.Effects[0].Citation)
		}
	}
	fmt.Fprintf(tw, "\n%s\n", rs.DrugNote())
	return tw.Flush()
}
