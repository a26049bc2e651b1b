package rules

import (
	"errors"
	"fmt"
	"math"
	"time"
)

// InfusionAssessment is the arithmetic for one sodium-moving order: the
// correction already achieved, the limits in force, and the projected
// change with the rate that fits. Pointers are nil when an input is
// missing; Missing says which, in words a card can use. It holds no
// wording or indicator: that is card policy.
type InfusionAssessment struct {
	Order       MedicationOrder
	Composition *Composition
	Latest      *Measurement // the latest sodium, if within the policy age
	Trend       SodiumTrend
	Risk        []RiskFactor
	// RiskUnchecked names the risk features halite had no data for.
	RiskUnchecked []string
	// Infant is set under one year of age, where the TBW fraction used may
	// be too low.
	Infant bool
	// Hypernatremia is set when the latest sodium is above the policy
	// threshold: the fall limits apply instead of the rise limits.
	Hypernatremia bool
	// Limit24h and Limit48h are the limits in force (48 h: hyponatremia only).
	Limit24h, Limit48h float64
	// Achieved24h and Achieved48h are the rise from the nadir (hyponatremia)
	// or the fall from the peak (hypernatremia) already measured.
	Achieved24h, Achieved48h float64
	Weight                   *Measurement
	TBWLitres                *float64
	TBWMethod                string
	DeltaPerLitre            *float64 // of this order's infusate alone
	Volume24hLitres          *float64 // this order's
	VolumeBasis              string
	// Others are the other orders counted in the next 24 h beside this
	// one: the call's other draft orders and the infusions already running
	// (see Contributor); a fluid halite cannot identify is among them with
	// no Composition, named but not counted.
	Others []Contributor
	// ProjectedChange24h is the change from everything counted: this order
	// and Others, in one mass balance (CombinedChange); OrderChange24h is
	// this order's share of it and OthersChange24h what the others alone
	// would bring without this order (nil when there are none).
	ProjectedChange24h *float64
	OrderChange24h     *float64
	OthersChange24h    *float64
	ProjectedTotal24h  *float64 // achieved + projected, signed as the change
	// OthersReachLimit is set when the others alone already use what the
	// limits allow: no volume of this order fits.
	OthersReachLimit bool
	// Urine is the recent urine output and composition; with both,
	// ProjectedChange24hWithUrine counts the urine of the next 24 h at the
	// charted rate too, and EFWCLitres is its electrolyte-free water.
	Urine                       UrineLosses
	ProjectedChange24hWithUrine *float64
	EFWCLitres                  *float64
	// Vaptan names a vasopressin-receptor antagonist active or drafted
	// beside this order ("tolvaptan (MedicationRequest/x)"), if any.
	Vaptan string
	// Allowed is the change still allowed (≥ 0, unsigned) by the tightest
	// limit, Binding says which limit that is; both are set with a
	// projection.
	Allowed float64
	Binding LimitKind
	// OverLimit is set when the projected change exceeds Allowed in the
	// direction the limits restrict.
	OverLimit bool
	// MaxVolume24hLitres is the largest volume of this order in the next
	// 24 h inside the allowance, the others counted as ordered;
	// MaxRateMlPerHour gives it as a rate over InfusionHours for a
	// rate-based order. Both nil when no volume can exceed the limit, or
	// inputs are missing.
	MaxVolume24hLitres *float64
	MaxRateMlPerHour   *float64
	InfusionHours      float64
	// RunHours is how long the order gives fluid in the next 24 h (see
	// RunHours); 0 when the order does not say, and then the hourly fall
	// limit is not checked.
	RunHours     float64
	LimitReached bool // nothing more is allowed in the window
	// FreeWaterDeficitLitres is set for hypernatremia with a TBW:
	// TBW × (Na/140 − 1).
	FreeWaterDeficitLitres *float64
	Context                TonicityContext
	Missing                []string
}

// LimitKind names a limit that can bind a projection.
type LimitKind string

// The limits a projection is held against.
const (
	Bound24h    LimitKind = "24h"    // the 24-h rise or fall
	Bound48h    LimitKind = "48h"    // the 48-h rise (hyponatremia)
	BoundHourly LimitKind = "hourly" // the hourly fall (hypernatremia)
)

// AssessInfusion works out the assessment of order o on facts f.
func (r *Ruleset) AssessInfusion(f Facts, o MedicationOrder) InfusionAssessment {
	return r.assess(f, o, r.candidates(f))
}

// assess is AssessInfusion with the call's balance pool worked out.
func (r *Ruleset) assess(f Facts, o MedicationOrder, pool balancePool) InfusionAssessment {
	p := r.policy
	a := InfusionAssessment{Order: o, Trend: AnalyseSodium(f.Labs[Sodium], f.At)}
	if c, ok := r.InfusateComposition(o.Medication); ok {
		a.Composition = &c
	} else {
		a.Missing = append(a.Missing, "the infusate's sodium and potassium content")
	}
	if l, ok := latestWithin(f.Labs[Sodium], f.At, p.Projection.SodiumMaxAgeHours); ok {
		a.Latest = &l
	} else {
		a.Missing = append(a.Missing, fmt.Sprintf("a serum sodium from the last %g h", p.Projection.SodiumMaxAgeHours))
	}
	a.Risk = DemyelinationRisk(p.DemyelinationRisk, f, f.At)
	a.RiskUnchecked = UncheckedRisk(p.DemyelinationRisk, f, f.At)
	if age, ok := f.Patient.AgeYears(f.At); ok && age < 1 {
		a.Infant = true
	}
	a.Hypernatremia = a.Latest != nil && a.Latest.Value > p.Projection.HypernatremiaAbove
	a.setLimits(p.Limits)

	if w, ok := latestWithin(f.Labs[BodyWeight], f.At, p.Projection.WeightMaxAgeHours); ok {
		a.Weight = &w
		if tbw, method, err := totalBodyWater(p.TBW, f, w.Value); err == nil && tbw > 0 {
			a.TBWLitres, a.TBWMethod = &tbw, method
		} else if err == nil {
			a.Missing = append(a.Missing, "a plausible total body water (the formula gave none for this weight)")
		} else {
			a.Missing = append(a.Missing, err.Error())
		}
	} else {
		a.Missing = append(a.Missing, fmt.Sprintf("a body weight from the last %s days", orderHours.of(p.Projection.WeightMaxAgeHours/24)))
	}
	a.Others = pool.besides(o)
	a.Vaptan = r.vaptanBeside(f, o)
	a.Urine = ReadUrineLosses(p.UrineLosses, f)
	if v, basis, ok := Volume24h(o, f.At); ok {
		a.Volume24hLitres, a.VolumeBasis = &v, basis
	} else {
		a.Missing = append(a.Missing, "the volume the order gives in 24 h (rate, or dose in mL)")
	}
	if h, ok := InfusionHours(o, f.At); ok {
		a.InfusionHours = h
	}
	if h, ok := RunHours(o, f.At); ok {
		a.RunHours = h
	}
	a.project(p.Limits)
	if a.Hypernatremia && a.TBWLitres != nil {
		d := FreeWaterDeficit(*a.TBWLitres, a.Latest.Value, 140)
		a.FreeWaterDeficitLitres = &d
	}
	if a.Latest != nil {
		a.Context = Tonicity(f, *a.Latest, p.Projection.SodiumMaxAgeHours)
	}
	return a
}

func (a *InfusionAssessment) setLimits(l Limits) {
	if a.Hypernatremia {
		a.Limit24h = l.HypernatremiaFall24h.Value
		if w := a.Trend.Window24h; w != nil {
			a.Achieved24h = w.FallFromPeak
		}
		return
	}
	a.Limit24h, a.Limit48h = l.HyponatremiaRise24h.Value, l.HyponatremiaRise48h.Value
	if len(a.Risk) > 0 {
		a.Limit24h = l.HyponatremiaRise24hHighRisk.Value
	}
	if w := a.Trend.Window24h; w != nil {
		a.Achieved24h = w.RiseFromNadir
	}
	if w := a.Trend.Window48h; w != nil {
		a.Achieved48h = w.RiseFromNadir
	}
}

// project fills the projection when every input is there. The allowance
// is the tightest of the limits in force: for hyponatremia the 24-h and
// 48-h rises; for hypernatremia the 24-h fall and the hourly fall over the
// hours the order runs (when it says).
func (a *InfusionAssessment) project(l Limits) {
	if a.Composition == nil || a.Latest == nil || a.TBWLitres == nil {
		return
	}
	naK, na, tbw := a.Composition.NaK(), a.Latest.Value, *a.TBWLitres
	d := DeltaPerLitre(naK, na, tbw)
	a.DeltaPerLitre = &d
	a.Allowed, a.Binding = a.Limit24h-a.Achieved24h, Bound24h
	sign := 1.0
	if a.Hypernatremia {
		sign = -1
		if perHour := l.HypernatremiaFallPerHour.Value; a.RunHours > 0 && perHour*a.RunHours < a.Allowed {
			a.Allowed, a.Binding = perHour*a.RunHours, BoundHourly
		}
	} else if a.Limit48h > 0 && a.Limit48h-a.Achieved48h < a.Allowed {
		a.Allowed, a.Binding = a.Limit48h-a.Achieved48h, Bound48h
	}
	if a.Allowed <= 0 {
		a.LimitReached, a.Allowed = true, 0
	}
	var others Infused
	for i, c := range a.Others {
		if c.Composition != nil && c.Volume24hLitres != nil {
			others = others.Add(*c.Volume24hLitres, c.Composition.NaK(), na)
		}
		a.Others[i].Change24h = nil // set below, with the whole balance
	}
	if len(a.Others) > 0 {
		oc := CombinedChange(others, tbw)
		a.OthersChange24h = &oc
		a.OthersReachLimit = sign*oc >= a.Allowed-1e-9 && !a.LimitReached
	}
	if a.Volume24hLitres != nil {
		all := others.Add(*a.Volume24hLitres, naK, na)
		c := CombinedChange(all, tbw)
		own := *a.Volume24hLitres * (naK - na) / (tbw + all.Litres)
		total := sign*a.Achieved24h + c
		a.ProjectedChange24h, a.OrderChange24h, a.ProjectedTotal24h = &c, &own, &total
		for i, o := range a.Others {
			if o.Composition != nil && o.Volume24hLitres != nil {
				share := *o.Volume24hLitres * (o.Composition.NaK() - na) / (tbw + all.Litres)
				a.Others[i].Change24h = &share
			}
		}
		// A change the limits do not restrict (a fall in hyponatremia, a
		// rise in hypernatremia) is never over them.
		a.OverLimit = sign*c > 0 && sign*c > a.Allowed+1e-9
		if vu, ok := a.Urine.Litres24h(); ok {
			if nak, ok := a.Urine.NaK(); ok {
				if withU := withUrine(all, vu, nak, na); sane(withU, tbw) {
					cu := CombinedChange(withU, tbw)
					efwc := ElectrolyteFreeWaterClearance(vu, nak, na)
					a.ProjectedChange24hWithUrine, a.EFWCLitres = &cu, &efwc
				}
			}
		}
	}
	if v := MaxVolumeGiven(sign*a.Allowed, naK, na, tbw, others); sign*d > 0 && !math.IsInf(v, 1) {
		a.MaxVolume24hLitres = &v
		if a.InfusionHours > 0 {
			rate := v * 1000 / a.InfusionHours
			a.MaxRateMlPerHour = &rate
		}
	}
}

// Contributor is another order counted in the sodium balance of the next
// 24 h beside the one assessed.
type Contributor struct {
	Order MedicationOrder
	// Running: an active order already on the chart; else a draft of this
	// call.
	Running bool
	// Composition is nil for a fluid halite cannot identify: it is named on
	// the card and not counted.
	Composition     *Composition
	Volume24hLitres *float64 // nil when the order does not say
	VolumeBasis     string
	Change24h       *float64 // its share of the combined change
}

// balancePool is every order that may count in the balance of the next
// 24 h, worked out once per call: the draft orders with a known infusate or
// a volume, and the running orders (see candidates).
type balancePool []Contributor

// candidates are the orders that may count: the call's draft orders with a
// known infusate, the in-progress administrations that run at a rate, and
// the active orders that run at a rate (infusions) or repeat a dose in mL,
// unless a draft replaces them (priorPrescription) or an administration
// carries them out (its rate is what runs now). A
// draft or infusion whose infusate is unknown is kept, without a
// composition, when it gives a volume: it is named, not silently left out.
func (r *Ruleset) candidates(f Facts) balancePool {
	replaced := map[string]bool{}
	for _, d := range f.DraftOrders {
		if d.Replaces != "" {
			replaced[d.Replaces] = true
		}
	}
	var out balancePool
	add := func(c MedicationOrder, running bool) {
		v, basis, hasVolume := Volume24h(c, f.At)
		repeats := c.RateMlPerHour != nil || (c.Frequency != nil && c.Period != nil)
		if running && (!repeats || !hasVolume) {
			return // a single dose, or no volume: not running in the balance
		}
		comp, known := r.InfusateComposition(c.Medication)
		if !known && !hasVolume {
			return // not a fluid
		}
		k := Contributor{Order: c, Running: running, VolumeBasis: basis}
		if known {
			k.Composition = &comp
		}
		if hasVolume {
			k.Volume24hLitres = &v
		}
		out = append(out, k)
	}
	for _, d := range f.DraftOrders {
		add(d, false)
	}
	for _, m := range f.Infusing {
		if m.ForRequest == "" || !replaced[m.ForRequest] {
			add(m, true)
		}
		if m.ForRequest != "" {
			replaced[m.ForRequest] = true
		}
	}
	for _, m := range f.Medications {
		if !replaced[m.Reference] {
			add(m, true)
		}
	}
	return out
}

// besides are the pool's orders counted beside o: all but o itself and the
// running order o replaces.
func (p balancePool) besides(o MedicationOrder) []Contributor {
	var out []Contributor
	for _, c := range p {
		if c.Order.Reference == o.Reference || c.Running && c.Order.Reference == o.Replaces {
			continue
		}
		out = append(out, c)
	}
	return out
}

// vaptanBeside names a vasopressin-receptor antagonist active or drafted
// other than o, with its reference; "" when there is none.
func (r *Ruleset) vaptanBeside(f Facts, o MedicationOrder) string {
	for _, m := range f.everyOrder() {
		if m.Reference == o.Reference {
			continue
		}
		if d, _, ok := r.policy.WaterDrugs.match(m.Medication); ok && d.RaisesSodium {
			return fmt.Sprintf("%s (%s)", d.Name, m.Reference)
		}
	}
	return ""
}

// totalBodyWater applies the policy's method, never assuming a sex or age.
func totalBodyWater(t TBWPolicy, f Facts, weight float64) (float64, string, error) {
	age, ok := f.Patient.AgeYears(f.At)
	if !ok {
		return 0, "", errors.New("the patient's age (birth date)")
	}
	if t.Method == "watson" && age >= t.AdultFromAge {
		if h, ok := latestWithin(f.Labs[BodyHeight], f.At, math.Inf(1)); ok {
			tbw, err := WatsonTBW(f.Patient.Sex, age, h.Value, weight)
			if err != nil {
				return 0, "", errors.New("the patient's sex (male or female)")
			}
			return tbw, "Watson", nil
		}
	}
	fr, err := TBWFraction(t, f.Patient.Sex, age)
	if err != nil {
		return 0, "", errors.New("the patient's sex (male or female)")
	}
	return fr * weight, fmt.Sprintf("Adrogué–Madias (%g × weight)", fr), nil
}

// latestWithin returns the latest measurement taken no more than maxAgeHours
// before at.
func latestWithin(s []Measurement, at time.Time, maxAgeHours float64) (Measurement, bool) {
	for i := len(s) - 1; i >= 0; i-- {
		if s[i].At.After(at) {
			continue
		}
		if at.Sub(s[i].At).Hours() <= maxAgeHours {
			return s[i], true
		}
		break
	}
	return Measurement{}, false
}
