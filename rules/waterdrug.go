package rules

import (
	"fmt"
	"slices"
	"strings"
	"unicode"
	"unicode/utf8"
)

// Code systems halite matches drugs by.
const (
	SystemRxNorm = "http://www.nlm.nih.gov/research/umls/rxnorm"
	SystemATC    = "http://www.whocc.no/atc"
)

// RuleWaterDrugNoSodium answers a water-balance drug order with no recent
// sodium to judge it against.
const RuleWaterDrugNoSodium = "water-balance-drug-no-recent-sodium"

// match finds the water-balance drug an order is for, by RxNorm
// code, ATC code, ingredient code, or (last) name on word boundaries, and
// says how it matched.
func (w WaterDrugPolicy) match(m Medication) (WaterDrug, string, bool) {
	codings := append([]Coding(nil), m.Codings...)
	texts := []string{m.Text}
	for _, ing := range m.Ingredients {
		codings = append(codings, ing.Codings...)
		texts = append(texts, ing.Text)
	}
	for _, c := range codings {
		for _, d := range w.Drugs {
			switch {
			case c.System == SystemRxNorm && slices.Contains(d.RxNorm, c.Code):
				return d, "RxNorm " + c.Code, true
			case c.System == SystemATC && slices.Contains(d.ATC, c.Code):
				return d, "ATC " + c.Code, true
			}
		}
	}
	for _, c := range codings {
		texts = append(texts, c.Display)
	}
	for _, t := range texts {
		for _, d := range w.Drugs {
			for _, n := range d.Names {
				if wordIn(strings.ToLower(t), n) {
					return d, fmt.Sprintf("name %q", n), true
				}
			}
		}
	}
	return WaterDrug{}, "", false
}

// wordIn reports whether word occurs in text on word boundaries, so that a
// name inside another word does not match.
func wordIn(text, word string) bool {
	word = strings.ToLower(word)
	if word == "" {
		return false
	}
	for from := 0; ; {
		i := strings.Index(text[from:], word)
		if i < 0 {
			return false
		}
		start, end := from+i, from+i+len(word)
		before, _ := utf8.DecodeLastRuneInString(text[:start])
		after, _ := utf8.DecodeRuneInString(text[end:])
		if (start == 0 || !isWordRune(before)) && (end == len(text) || !isWordRune(after)) {
			return true
		}
		from = start + 1
	}
}

func isWordRune(r rune) bool { return unicode.IsLetter(r) || unicode.IsDigit(r) }

// waterDrugFindings flags the selected draft orders for a vasopressin
// receptor antagonist or agonist when the latest sodium is below the
// policy threshold, the demyelination risk is high, or sodium has already
// risen by the policy amount in 24 h; and says so when there is no recent
// sodium to judge them against. No formula predicts these drugs, so no
// projection is given. There is one finding per drug per call, covering
// every selected draft of it (the judgement depends on the drug and the
// patient only); it carries the order as Order when it covers one.
func (r *Ruleset) waterDrugFindings(f Facts) []Finding {
	p := r.policy
	type ordered struct {
		o   MedicationOrder
		how string // how the drug was recognised
	}
	var drugs []WaterDrug // in the order first drafted
	selected := map[string][]ordered{}
	for _, o := range f.DraftOrders {
		if !o.Selected {
			continue
		}
		if drug, how, ok := p.WaterDrugs.match(o.Medication); ok {
			if selected[drug.Name] == nil {
				drugs = append(drugs, drug)
			}
			selected[drug.Name] = append(selected[drug.Name], ordered{o, how})
		}
	}
	var out []Finding
	// The patient's side is the same for every order: work it out once.
	trend := AnalyseSodium(f.Labs[Sodium], f.At)
	risk := DemyelinationRisk(p.DemyelinationRisk, f, f.At)
	unchecked := UncheckedRisk(p.DemyelinationRisk, f, f.At)
	latest, haveNa := latestWithin(f.Labs[Sodium], f.At, p.Projection.SodiumMaxAgeHours)
	for _, drug := range drugs {
		var reasons []string
		fig := map[string]float64{"odsHighRisk": 0}
		if len(risk) > 0 {
			fig["odsHighRisk"] = 1
			if drug.RaisesSodium {
				reasons = append(reasons, "high osmotic-demyelination risk")
			}
		}
		if w := trend.Window24h; w != nil {
			fig["riseFromNadir24h"], fig["fallFromPeak24h"] = Round(w.RiseFromNadir, 1), Round(w.FallFromPeak, 1)
			if drug.RaisesSodium && w.RiseFromNadir >= p.WaterDrugs.RiseAlready24h {
				reasons = append(reasons, fmt.Sprintf("a rise of %s mmol/L already in 24 h", naChange.of(w.RiseFromNadir)))
			}
		}
		if h := r.hypertonicBeside(f); drug.RaisesSodium && h != "" {
			reasons = append(reasons, "hypertonic saline "+h)
		}
		if haveNa {
			fig["sodiumLatest"] = latest.Value
			switch {
			case latest.Value < p.WaterDrugs.SodiumBelow:
				reasons = append([]string{fmt.Sprintf("sodium %s mmol/L", show(Sodium, latest.Value))}, reasons...)
			case drug.RaisesSodium && latest.Value > p.Projection.HypernatremiaAbove:
				reasons = append([]string{fmt.Sprintf("sodium %s mmol/L, above %g", show(Sodium, latest.Value), p.Projection.HypernatremiaAbove)}, reasons...)
			}
		}
		// After a rise beyond the limit, an agonist (desmopressin) is the
		// re-lowering the guidelines describe: its card gives the target.
		var target float64
		relowering := false
		if haveNa && !drug.RaisesSodium {
			l := InfusionAssessment{Trend: trend, Risk: risk, Latest: &latest,
				Hypernatremia: latest.Value > p.Projection.HypernatremiaAbove}
			l.setLimits(p.Limits)
			if target, relowering = l.reloweringTarget(); relowering {
				fig["limit24h"] = l.Limit24h
			}
		}
		if !drug.RaisesSodium && !relowering {
			if ctx, ok := r.recentNeurosurgery(f); ok {
				if why, nfig, ok := r.retentionSigns(f); ok {
					var what []string
					for _, d := range selected[drug.Name] {
						what = append(what, fmt.Sprintf("%s (%s, being ordered)", d.o.Reference, orderText(d.o)))
					}
					fd := r.neurosurgeryFinding(f, strings.Join(what, "; "), ctx, why, nfig)
					if ds := selected[drug.Name]; len(ds) == 1 {
						fd.Order, fd.Draft = ds[0].o.Reference, DraftKey(ds[0].o)
						fd.Advice = append(fd.Advice, Advice{Kind: AdviseWithdraw, Label: "Remove this draft order"})
					}
					out = append(out, fd)
					continue
				}
			}
		}
		id, orders, them := RuleWaterDrug, "order", "it"
		if len(selected[drug.Name]) > 1 {
			orders, them = "orders", "them"
		}
		var summary string
		switch {
		case relowering:
			id = RuleRelowering
			fig["relowerTargetSodium"] = Round(target, 1)
			summary = fmt.Sprintf("%s %s to re-lower sodium after a rise beyond the limit: target %s mmol/L; no formula predicts the fall",
				capitalise(drug.Name), orders, naChange.of(target))
		case len(reasons) > 0 && !drug.RaisesSodium:
			summary = fmt.Sprintf("%s %s with %s: it can lower sodium further, by an amount no formula predicts", capitalise(drug.Name), orders, strings.Join(reasons, ", "))
		case len(reasons) > 0:
			summary = fmt.Sprintf("%s %s with %s: no formula predicts the sodium change", capitalise(drug.Name), orders, strings.Join(reasons, ", "))
		case !haveNa:
			id = RuleWaterDrugNoSodium
			summary = fmt.Sprintf("%s %s: no serum sodium from the last %g h to judge %s against", capitalise(drug.Name), orders,
				p.Projection.SodiumMaxAgeHours, them)
		default:
			continue
		}
		rule := r.cardRule(id)
		var b strings.Builder
		b.WriteString("**Figures**\n\n")
		for _, d := range selected[drug.Name] {
			fmt.Fprintf(&b, "- Order: %s (%s), recognised as %s by %s (%s)\n", d.o.Reference, orderText(d.o), drug.Name, d.how, drug.Source)
		}
		if haveNa {
			fmt.Fprintf(&b, "- Latest sodium: %s mmol/L (%s%s, %s)\n", show(Sodium, latest.Value), measuredBy(latest), stamp(latest.At), latest.Source)
			b.WriteString(sameTimeLine(latest))
		} else {
			fmt.Fprintf(&b, "- No serum sodium from the last %g h\n", p.Projection.SodiumMaxAgeHours)
		}
		if w := trend.Window24h; w != nil {
			fmt.Fprintf(&b, "- Rise in the last 24 h: %s mmol/L from the nadir of %s (%s)\n", naChange.of(w.RiseFromNadir),
				show(Sodium, w.Nadir.Value), stamp(w.Nadir.At))
		}
		for _, rf := range risk {
			fmt.Fprintf(&b, "- Demyelination risk factor: %s (%s)\n", rf.Factor, rf.Evidence)
		}
		for _, u := range unchecked {
			fmt.Fprintf(&b, "- Not checked for demyelination risk: %s\n", u)
		}
		if drug.RaisesSodium {
			fmt.Fprintf(&b, "- Flagged because it raises sodium: when sodium is below %g mmol/L, the demyelination risk is high, "+
				"or sodium has risen %g mmol/L in 24 h (%s)\n", p.WaterDrugs.SodiumBelow, p.WaterDrugs.RiseAlready24h, p.WaterDrugs.Source)
		} else {
			fmt.Fprintf(&b, "- Flagged because it lowers sodium (antidiuresis): when sodium is below %g mmol/L; water intake "+
				"decides how far sodium falls (%s)\n", p.WaterDrugs.SodiumBelow, p.WaterDrugs.Source)
		}
		if id == RuleRelowering {
			fmt.Fprintf(&b, "- Re-lowering: bringing sodium back to %s mmol/L (the nadir plus the limit) is the management the "+
				"guidelines describe (%s)\n", naChange.of(target), p.Cards.Relowering.Source)
		}
		if others := r.otherHyponatremiaDrugs(f, drug); len(others) > 0 && !drug.RaisesSodium {
			fmt.Fprintf(&b, "- Other orders that can lower sodium: %s\n", strings.Join(others, "; "))
		}
		fmt.Fprintf(&b, "- Policy re-check interval for this card: %g h\n", rule.RecheckHours)
		b.WriteString("\n**Method**: no formula predicts the change these drugs cause (a vasopressin antagonist's aquaresis " +
			"or an agonist's antidiuresis depends on intake, urine output and other therapy); measured sodium is the guide.")
		indicator := rule.Indicator
		if haveNa && !drug.RaisesSodium && id == RuleWaterDrug {
			// A drug that lowers sodium is as urgent as the drug-risk bands
			// say for this sodium and its evidence; that check stays silent
			// on it (one order, one card).
			if e, ok := r.hyponatremiaEvidence(selected[drug.Name][0].o.Medication); ok {
				if band, ok := r.sodiumBand(latest.Value, e == EvidenceStrong); ok && band > indicator {
					indicator = band
				}
			}
		}
		fd := Finding{Rule: id, Indicator: indicator, Summary: shorten(summary, 139), Detail: b.String(),
			Figures: fig, Product: "drug:" + strings.ToLower(drug.Name), Advice: []Advice{recheckAdvice(rule.RecheckHours)}}
		if ds := selected[drug.Name]; len(ds) == 1 {
			fd.Order, fd.Draft = ds[0].o.Reference, DraftKey(ds[0].o)
		}
		out = append(out, fd)
	}
	return out
}

// hypertonicBeside names a hypertonic sodium fluid active, running or
// drafted ("active (MedicationRequest/x)"), or "" when there is none.
func (r *Ruleset) hypertonicBeside(f Facts) string {
	for _, o := range f.everyOrder() {
		if c, ok := r.InfusateComposition(o.Medication); ok && c.NaK() >= r.policy.Cards.HypertonicNaKAtLeast {
			status := "active"
			switch {
			case o.Draft:
				status = "drafted"
			case o.Status == "in-progress":
				status = "running"
			}
			return fmt.Sprintf("%s (%s)", status, o.Reference)
		}
	}
	return ""
}

// hyponatremiaEvidence is the knowledge base's evidence that m can lower
// sodium; ok is false when no entry says so.
func (r *Ruleset) hyponatremiaEvidence(m Medication) (string, bool) {
	for _, dm := range r.MatchDrug(m) {
		if e, ok := dm.Ingredient.Effect(EffectHyponatremia); ok && !dm.Ingredient.IntendedToRaiseSodium {
			return e.Evidence, true
		}
	}
	return "", false
}

// otherHyponatremiaDrugs names the active and drafted orders, other than
// for drug, whose ingredients can lower sodium, with their references.
func (r *Ruleset) otherHyponatremiaDrugs(f Facts, drug WaterDrug) []string {
	var out []string
	seen := map[string]bool{}
	for _, o := range append(append([]MedicationOrder(nil), f.Medications...), f.DraftOrders...) {
		if d, _, ok := r.policy.WaterDrugs.match(o.Medication); ok && d.Name == drug.Name {
			continue
		}
		for _, m := range r.MatchDrug(o.Medication) {
			if _, ok := m.Ingredient.Effect(EffectHyponatremia); ok && !m.Ingredient.IntendedToRaiseSodium && !seen[o.Reference] {
				seen[o.Reference] = true
				status := "active"
				if o.Draft {
					status = "draft"
				}
				out = append(out, fmt.Sprintf("%s (%s, %s)", m.Ingredient.Name, status, o.Reference))
			}
		}
	}
	return out
}

func capitalise(s string) string {
	if s == "" {
		return s
	}
	return strings.ToUpper(s[:1]) + s[1:]
}
