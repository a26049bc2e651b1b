package rules

// Indicator is a finding's urgency, in increasing order.
type Indicator int

// Indicators, ordered so that a larger value is more urgent.
const (
	Info Indicator = iota + 1
	Warning
	Critical
)

// String returns the CDS Hooks indicator code.
func (i Indicator) String() string {
	switch i {
	case Info:
		return "info"
	case Warning:
		return "warning"
	case Critical:
		return "critical"
	default:
		return "none"
	}
}

// Finding is one actionable result of a rule, before it is worded as a card.
type Finding struct {
	Rule      string // stable rule id, e.g. "hyponatremia-overcorrection"
	Indicator Indicator
	Summary   string // one sentence with its number, < 140 characters
	Detail    string // markdown: figures, inputs with dates, method, limits
	// Figures are the machine-readable numbers, named in camelCase with unit
	// suffixes where needed (e.g. "riseFromNadir24h", "tbwLitres").
	Figures map[string]float64
	// Attributes are machine-readable values that are not numbers (the
	// drug-risk check's ingredient, evidence, match, multipliers).
	Attributes map[string]any
	// Order is the draft order the finding is about ("MedicationRequest/id"),
	// empty for a finding about the chart or about several draft orders (a
	// drug-risk or water-balance drug finding covers every selected draft
	// of its drug, and its detail names each); advice that acts on a draft
	// (a new rate, removing it) comes only with an Order.
	Order string
	// Draft keys that draft order by its identity and content (DraftKey),
	// empty without an Order: a card shown at selection is matched at
	// signing only to the same draft, unedited.
	Draft string
	// Product keys the drug or fluid the finding is about
	// ("rxnorm:313002", "drug:tolvaptan"), empty for a finding about the
	// chart; a repeat of the same rule for the same product is what
	// suppression matches.
	Product string
	// Links are the confirmed addresses of the sources the detail cites.
	Links []SourceLink
	// Advice lists the changes the card may suggest, in the order offered;
	// hooks builds them as FHIR resources. The prescriber chooses.
	Advice []Advice
}

// AdviceKind is a change a card may suggest.
type AdviceKind string

// Kinds of advice.
const (
	// AdviseRate: the draft order at a lower rate, with a sodium re-check.
	AdviseRate AdviceKind = "rate"
	// AdviseRecheck: a serum sodium re-check.
	AdviseRecheck AdviceKind = "recheck"
	// AdviseWithdraw: remove the draft order.
	AdviseWithdraw AdviceKind = "withdraw"
	// AdviseUrineStudies: a urine osmolality and a urine sodium.
	AdviseUrineStudies AdviceKind = "urine-studies"
)

// Advice is one suggestion before it becomes FHIR resources.
type Advice struct {
	Kind  AdviceKind
	Label string // what the clinician reads on the button, < 80 characters
	// RateMlPerHour is the new rate (AdviseRate).
	RateMlPerHour float64
	// RecheckHours is when to re-check sodium, from the evaluation time
	// (AdviseRate and AdviseRecheck); 0 is now.
	RecheckHours float64
	// FollowUpHours, when set, adds a second sodium check at that time.
	FollowUpHours float64
	Recommended   bool
}

// Check names what a service evaluates; each check runs its own rule families.
type Check string

// The checks halite runs, one per CDS service.
const (
	InfusionCheck Check = "infusion-check" // orders that move serum sodium
	DrugRisk      Check = "drug-risk"      // drugs that raise hyponatremia or nephrogenic-DI risk
	ChartReview   Check = "chart-review"   // the sodium trajectory at chart opening
)

// Evaluate runs the rule families of check c over f and returns the
// actionable findings. No finding means nothing is actionable, which is
// answered as an empty card list.
// Card text carries no reviewers' curation notes and is written in the
// display zone and units (forPeople).
func (r *Ruleset) Evaluate(c Check, f Facts) []Finding {
	var out []Finding
	switch c {
	case InfusionCheck:
		out = append(append(r.infusionFindings(f), r.waterDrugFindings(f)...), r.restrictionFindings(f)...)
	case DrugRisk:
		out = r.drugRiskFindings(f)
	case ChartReview:
		out = r.chartFindings(f)
	}
	for i := range out {
		out[i].Summary, out[i].Detail = r.forPeople(out[i].Summary), r.forPeople(out[i].Detail)
		out[i].Links = r.linksFor(out[i].Detail)
		for j := range out[i].Advice {
			out[i].Advice[j].Label = r.forPeople(out[i].Advice[j].Label)
		}
	}
	return out
}

// forPeople is card text as people read it: no curation notes
// (clinicianText), times in the display zone, concentrations in the
// display units.
func (r *Ruleset) forPeople(s string) string {
	return r.displayUnits(r.localTimes(clinicianText(s)))
}
