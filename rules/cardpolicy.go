package rules

import (
	"encoding/json"
	"fmt"
	"slices"
)

// MarshalJSON writes the CDS Hooks indicator code.
func (i Indicator) MarshalJSON() ([]byte, error) {
	if i < Info || i > Critical {
		return nil, fmt.Errorf("indicator %d is not info, warning or critical", int(i))
	}
	return json.Marshal(i.String())
}

// UnmarshalJSON reads "info", "warning" or "critical".
func (i *Indicator) UnmarshalJSON(data []byte) error {
	var s string
	if err := json.Unmarshal(data, &s); err != nil {
		return fmt.Errorf("indicator: %w", err)
	}
	var err error
	*i, err = ParseIndicator(s)
	return err
}

// ParseIndicator reads the CDS Hooks indicator code s.
func ParseIndicator(s string) (Indicator, error) {
	for _, c := range []Indicator{Info, Warning, Critical} {
		if c.String() == s {
			return c, nil
		}
	}
	return 0, fmt.Errorf("indicator %q is not info, warning or critical", s)
}

// CardRule is the card policy of one rule: the indicator its card carries
// (HighRisk at high osmotic-demyelination risk, where the rule makes the
// distinction) and the interval of the sodium re-check it suggests.
type CardRule struct {
	Indicator    Indicator `json:"indicator"`
	HighRisk     Indicator `json:"highRiskIndicator,omitempty"`
	RecheckHours float64   `json:"recheckHours"`
}

// CardPolicy is the indicator table and the thresholds that pick a rule.
type CardPolicy struct {
	// HypertonicNaKAtLeast is the infusate Na + K (mmol/L) from which an
	// order is hypertonic saline and always answered with a card.
	HypertonicNaKAtLeast float64 `json:"hypertonicNaKAtLeast"`
	// NotHypotonic says when the sodium a hypertonic order is for is not a
	// hypotonic hyponatremia, which hypertonic saline treats.
	NotHypotonic NotHypotonicPolicy `json:"notHypotonic"`
	// Relowering: after a rise beyond the limit, an order that lowers
	// sodium is the usual management; its card warns only when the
	// projection passes the target by more than BelowTargetTolerance.
	Relowering struct {
		BelowTargetTolerance float64 `json:"belowTargetTolerance"`
		Source               string  `json:"source"`
	} `json:"relowering"`
	Rules  map[string]CardRule `json:"rules"`
	Source string              `json:"source"`
}

// NotHypotonicPolicy: an effective osmolality of at least
// EffectiveOsmolalityAtLeast (mOsm/kg), or a glucose-corrected sodium (Katz)
// of at least CorrectedSodiumAtLeast (mmol/L), is not hypotonic.
type NotHypotonicPolicy struct {
	EffectiveOsmolalityAtLeast float64 `json:"effectiveOsmolalityAtLeast"`
	CorrectedSodiumAtLeast     float64 `json:"correctedSodiumAtLeast"`
	Source                     string  `json:"source"`
}

// WaterDrug is a drug acting on renal water handling (a vasopressin V2
// receptor antagonist or agonist) whose effect on sodium no formula
// predicts, recognised by RxNorm ingredient or product code, ATC code or
// name.
type WaterDrug struct {
	Name string `json:"name"`
	// RaisesSodium is true for a receptor antagonist (aquaresis), false for
	// an agonist (antidiuresis), which lowers sodium.
	RaisesSodium bool `json:"raisesSodium"`
	// Antidiuretic marks desmopressin: the dose a water deprivation test
	// ends with and the drug the course after neurosurgery watches.
	Antidiuretic bool     `json:"antidiuretic"`
	RxNorm       []string `json:"rxnorm"`
	ATC          []string `json:"atc"`
	Names        []string `json:"names"`
	Source       string   `json:"source"`
}

// WaterDrugPolicy sets when an order for a WaterDrug is flagged: sodium
// below SodiumBelow; for a drug that raises sodium also high demyelination
// risk, or a rise of at least RiseAlready24h in the trailing 24 h.
type WaterDrugPolicy struct {
	SodiumBelow    float64 `json:"sodiumBelow"`
	RiseAlready24h float64 `json:"riseAlready24h"`
	Source         string  `json:"source"`
	// CombinationSource says, for a card, why a vaptan beside hypertonic
	// saline is flagged.
	CombinationSource string      `json:"combinationSource"`
	Drugs             []WaterDrug `json:"drugs"`
}

// cardRules are the rule ids the card policy must cover (infusion check
// and chart review; the drug-risk check has its own severity table).
var cardRules = [...]string{RuleLimitExceeded, RuleRelowering, RuleAquaresis, RuleDesalination, RuleHypertonicNotHypotonic, RuleHypertonicWithVaptan, RuleProjectedOver, RuleNoProjection, RuleHypertonicOrder, RuleWaterDrug,
	RuleWaterDrugNoSodium, RuleDesmopressinAfterNeurosurgery, RuleOvercorrected, RuleNearingLimit, RuleHyperTooFast, RuleProfoundOrFalling, RuleNotHypotonic,
	RuleSIADHPattern, RuleUrineStudiesMissing, RuleDiluteUrine, RuleConcentratingDefect, RuleWaterDeprivationTest,
	RuleRestrictionCaution, RuleRestrictionReview}

func (c CardPolicy) validate() error {
	if c.HypertonicNaKAtLeast <= 154 || c.Source == "" {
		return fmt.Errorf("cards needs hypertonicNaKAtLeast above 0.9%% saline's 154 mmol/L and a source")
	}
	if n := c.NotHypotonic; n.EffectiveOsmolalityAtLeast <= 0 || n.CorrectedSodiumAtLeast <= 0 || n.Source == "" {
		return fmt.Errorf("cards.notHypotonic needs positive thresholds and a source")
	}
	if rl := c.Relowering; rl.BelowTargetTolerance < 0 || rl.Source == "" {
		return fmt.Errorf("cards.relowering needs a non-negative belowTargetTolerance and a source")
	}
	for _, id := range cardRules {
		r, ok := c.Rules[id]
		if !ok {
			return fmt.Errorf("cards.rules.%s is missing", id)
		}
		if r.Indicator == 0 || r.RecheckHours <= 0 || r.RecheckHours > 72 {
			return fmt.Errorf("cards.rules.%s needs an indicator and recheckHours between 0 and 72", id)
		}
		if r.HighRisk != 0 && id != RuleProjectedOver {
			return fmt.Errorf("cards.rules.%s: highRiskIndicator applies to %s only", id, RuleProjectedOver)
		}
	}
	for id := range c.Rules {
		if !slices.Contains(cardRules[:], id) {
			return fmt.Errorf("cards.rules.%s is not a rule halite has", id)
		}
	}
	return nil
}

func (w WaterDrugPolicy) validate() error {
	if w.SodiumBelow <= 0 || w.RiseAlready24h <= 0 || w.Source == "" || w.CombinationSource == "" {
		return fmt.Errorf("waterDrugs needs positive thresholds, a source and a combinationSource")
	}
	for i, d := range w.Drugs {
		if d.Name == "" || d.Source == "" || len(d.RxNorm)+len(d.ATC)+len(d.Names) == 0 {
			return fmt.Errorf("waterDrugs.drugs[%d] needs a name, codes or names, and a source", i)
		}
	}
	return nil
}

// cardRule returns the policy of rule id, which validation guarantees.
func (r *Ruleset) cardRule(id string) CardRule { return r.policy.Cards.Rules[id] }

// SodiumBand gives the indicator of a hyponatremia-risk drug card when the
// latest sodium is below Below; WeakerEvidence (if set) applies to drugs
// whose evidence is not strong.
type SodiumBand struct {
	Below          float64   `json:"below"`
	Indicator      Indicator `json:"indicator"`
	WeakerEvidence Indicator `json:"weakerEvidenceIndicator,omitempty"`
}

// DrugRiskPolicy is the severity table of the drug-risk check.
type DrugRiskPolicy struct {
	SodiumMaxAgeHours float64      `json:"sodiumMaxAgeHours"`
	Bands             []SodiumBand `json:"bands"` // ascending by Below
	// RenewalStepDownFrom: a renewal is one step lower than a new start
	// when the sodium is at or above this value.
	RenewalStepDownFrom   float64 `json:"renewalStepDownFrom"`
	ElderlyFromAge        int     `json:"elderlyFromAge"`
	FallWindowHours       int     `json:"fallWindowHours"`
	FallAtLeast           float64 `json:"fallAtLeast"`
	HypernatremiaAbove    float64 `json:"hypernatremiaAbove"`
	SerumOsmolalityAbove  float64 `json:"serumOsmolalityAbove"`
	UrineOsmolalityBelow  float64 `json:"urineOsmolalityBelow"`
	LabPairHours          float64 `json:"labPairHours"`
	LowSodiumRecheckHours float64 `json:"lowSodiumRecheckHours"`
	NewStartFollowUpHours float64 `json:"newStartFollowUpHours"`
	Source                string  `json:"source"`
	// Clinician-facing citations of the thresholds each kind of card
	// applies (Source keeps the reviewers' full account).
	HyponatremiaCitation  string `json:"hyponatremiaCitation"`
	NephrogenicDICitation string `json:"nephrogenicDiCitation"`
}

func (d DrugRiskPolicy) validate() error {
	if d.SodiumMaxAgeHours <= 0 || d.Source == "" || d.HyponatremiaCitation == "" || d.NephrogenicDICitation == "" || len(d.Bands) == 0 {
		return fmt.Errorf("drugRisk needs sodiumMaxAgeHours, bands and a source")
	}
	for i, b := range d.Bands {
		if b.Indicator == 0 || (i > 0 && b.Below <= d.Bands[i-1].Below) {
			return fmt.Errorf("drugRisk.bands[%d] needs an indicator and a threshold above the previous band", i)
		}
	}
	for name, v := range map[string]float64{"renewalStepDownFrom": d.RenewalStepDownFrom, "fallAtLeast": d.FallAtLeast,
		"hypernatremiaAbove": d.HypernatremiaAbove, "serumOsmolalityAbove": d.SerumOsmolalityAbove,
		"urineOsmolalityBelow": d.UrineOsmolalityBelow, "labPairHours": d.LabPairHours,
		"lowSodiumRecheckHours": d.LowSodiumRecheckHours, "newStartFollowUpHours": d.NewStartFollowUpHours,
		"elderlyFromAge": float64(d.ElderlyFromAge), "fallWindowHours": float64(d.FallWindowHours)} {
		if v <= 0 {
			return fmt.Errorf("drugRisk.%s must be positive", name)
		}
	}
	return nil
}

// RestrictionBand is one band of the urine-to-plasma electrolyte ratio.
type RestrictionBand struct {
	RatioBelow   float64 `json:"ratioBelow"`
	Text         string  `json:"text"`
	MlPerDayUpTo float64 `json:"mlPerDayUpTo"` // the adult volume the band suggests
}

// ChartReviewPolicy holds the thresholds of the chart review.
type ChartReviewPolicy struct {
	SodiumMaxAgeHours  float64 `json:"sodiumMaxAgeHours"`
	HyponatremiaBelow  float64 `json:"hyponatremiaBelow"`
	NearLimitWithin    float64 `json:"nearLimitWithin"`
	ProfoundBelow      float64 `json:"profoundBelow"`
	FallIn48hAtLeast   float64 `json:"fallIn48hAtLeast"`
	HourlyFallMinHours float64 `json:"hourlyFallMinHours"`
	LabPairHours       float64 `json:"labPairHours"`
	SIADH              struct {
		EffectiveOsmolalityBelow float64 `json:"effectiveOsmolalityBelow"`
		UrineOsmolalityAbove     float64 `json:"urineOsmolalityAbove"`
		UrineSodiumAbove         float64 `json:"urineSodiumAbove"`
		Source                   string  `json:"source"`
	} `json:"siadh"`
	// VolumeStatus: the results that bear on SIADH against salt wasting,
	// shown on the SIADH pattern card: a uric acid below UrateBelow
	// (µmol/L) is a supplemental SIADH criterion; a haematocrit rising by
	// HaematocritRiseAtLeast (percentage points) within the look-back
	// leans towards volume depletion.
	VolumeStatus struct {
		UrateBelow             float64 `json:"urateBelow"`
		UrateSource            string  `json:"urateSource"`
		HaematocritRiseAtLeast float64 `json:"haematocritRiseAtLeast"`
		HaematocritSource      string  `json:"haematocritSource"`
	} `json:"volumeStatus"`
	// DiluteUrine: hypotonic hyponatremia with urine osmolality below
	// UrineOsmolalityBelow is urine diluted as far as it goes (vasopressin
	// suppressed): water taken in beyond what can be excreted.
	DiluteUrine struct {
		UrineOsmolalityBelow float64 `json:"urineOsmolalityBelow"`
		Source               string  `json:"source"`
	} `json:"diluteUrine"`
	ConcentratingDefect struct {
		SerumOsmolalityAbove float64 `json:"serumOsmolalityAbove"`
		SodiumAbove          float64 `json:"sodiumAbove"`
		UrineOsmolalityBelow float64 `json:"urineOsmolalityBelow"`
		Evaluation           string  `json:"evaluation"`
		// EvaluationWhenHigh replaces it when the sodium or osmolality is
		// already high: the stimulus of a deprivation test is there.
		EvaluationWhenHigh string `json:"evaluationWhenHigh"`
		Source             string `json:"source"`
		// PolyuriaAdultMlPerDay: an adult's urine output above it (at the
		// recent charted rate) is polyuria.
		PolyuriaAdultMlPerDay float64 `json:"polyuriaAdultMlPerDay"`
		PolyuriaSource        string  `json:"polyuriaSource"`
		// A child's polyuria is per body-surface area.
		PolyuriaChildMlPerM2PerDay float64 `json:"polyuriaChildMlPerM2PerDay"`
		// After neurosurgery: output above PostoperativeMlPerHourAbove in
		// every charted period of the last PostoperativeHours.
		PostoperativeMlPerHourAbove float64 `json:"postoperativeMlPerHourAbove"`
		PostoperativeHours          float64 `json:"postoperativeHours"`
		PostoperativeSource         string  `json:"postoperativeSource"`
		// Without a urine osmolality, a specific gravity below this is
		// dilute urine.
		SpecificGravityBelow float64 `json:"specificGravityBelow"`
		// A sodium that rose this much in 24 h counts as rising, when the
		// urine is dilute and the output is polyuria.
		SodiumRiseIn24hAtLeast float64 `json:"sodiumRiseIn24hAtLeast"`
	} `json:"concentratingDefect"`
	Restriction struct {
		Scheme           string            `json:"scheme"`
		Bands            []RestrictionBand `json:"bands"` // ascending by RatioBelow
		AdultBSA         float64           `json:"adultBSA"`
		PaediatricSource string            `json:"paediatricSource"`
		// PaediatricInsensibleMlPerM2: a child's band below this volume is
		// flagged as tighter than insensible losses.
		PaediatricInsensibleMlPerM2 float64 `json:"paediatricInsensibleMlPerM2"`
		PaediatricInsensibleSource  string  `json:"paediatricInsensibleSource"`
		// HypovolaemiaBUNCreatinineAbove: a blood urea nitrogen to
		// creatinine ratio (mg/dL to mg/dL) above it leans hypovolaemic, and
		// no restriction volume is given.
		HypovolaemiaBUNCreatinineAbove float64 `json:"hypovolaemiaBunCreatinineAbove"`
		WithheldSource                 string  `json:"withheldSource"`
	} `json:"restriction"`
	HeightMaxAgeHours float64 `json:"heightMaxAgeHours"`
	Source            string  `json:"source"`
}

func (c ChartReviewPolicy) validate() error {
	for name, v := range map[string]float64{"sodiumMaxAgeHours": c.SodiumMaxAgeHours, "hyponatremiaBelow": c.HyponatremiaBelow,
		"nearLimitWithin": c.NearLimitWithin, "profoundBelow": c.ProfoundBelow, "fallIn48hAtLeast": c.FallIn48hAtLeast,
		"hourlyFallMinHours": c.HourlyFallMinHours, "labPairHours": c.LabPairHours, "heightMaxAgeHours": c.HeightMaxAgeHours,
		"siadh.effectiveOsmolalityBelow": c.SIADH.EffectiveOsmolalityBelow, "siadh.urineOsmolalityAbove": c.SIADH.UrineOsmolalityAbove,
		"siadh.urineSodiumAbove": c.SIADH.UrineSodiumAbove, "diluteUrine.urineOsmolalityBelow": c.DiluteUrine.UrineOsmolalityBelow,
		"volumeStatus.urateBelow": c.VolumeStatus.UrateBelow, "concentratingDefect.polyuriaAdultMlPerDay": c.ConcentratingDefect.PolyuriaAdultMlPerDay, "volumeStatus.haematocritRiseAtLeast": c.VolumeStatus.HaematocritRiseAtLeast,
		"concentratingDefect.urineOsmolalityBelow":        c.ConcentratingDefect.UrineOsmolalityBelow,
		"concentratingDefect.polyuriaChildMlPerM2PerDay":  c.ConcentratingDefect.PolyuriaChildMlPerM2PerDay,
		"concentratingDefect.postoperativeMlPerHourAbove": c.ConcentratingDefect.PostoperativeMlPerHourAbove,
		"concentratingDefect.postoperativeHours":          c.ConcentratingDefect.PostoperativeHours,
		"concentratingDefect.specificGravityBelow":        c.ConcentratingDefect.SpecificGravityBelow,
		"concentratingDefect.sodiumRiseIn24hAtLeast":      c.ConcentratingDefect.SodiumRiseIn24hAtLeast,
		"restriction.adultBSA":                            c.Restriction.AdultBSA, "restriction.paediatricInsensibleMlPerM2": c.Restriction.PaediatricInsensibleMlPerM2,
		"restriction.hypovolaemiaBunCreatinineAbove": c.Restriction.HypovolaemiaBUNCreatinineAbove} {
		if v <= 0 {
			return fmt.Errorf("chartReview.%s must be positive", name)
		}
	}
	if c.Source == "" || c.SIADH.Source == "" || c.DiluteUrine.Source == "" || c.VolumeStatus.UrateSource == "" || c.VolumeStatus.HaematocritSource == "" ||
		c.ConcentratingDefect.PolyuriaSource == "" || c.ConcentratingDefect.Source == "" || c.ConcentratingDefect.Evaluation == "" ||
		c.ConcentratingDefect.PostoperativeSource == "" || c.ConcentratingDefect.EvaluationWhenHigh == "" ||
		c.Restriction.Scheme == "" || c.Restriction.PaediatricSource == "" || c.Restriction.WithheldSource == "" || len(c.Restriction.Bands) == 0 {
		return fmt.Errorf("chartReview needs its sources, the evaluation text, the restriction scheme and bands")
	}
	for i, b := range c.Restriction.Bands {
		if b.Text == "" || b.MlPerDayUpTo <= 0 || (i > 0 && b.RatioBelow <= c.Restriction.Bands[i-1].RatioBelow) {
			return fmt.Errorf("chartReview.restriction.bands[%d] needs a text, a volume and a ratio above the previous band", i)
		}
	}
	return nil
}
