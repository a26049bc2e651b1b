package hooks

import (
	"strings"

	"github.com/halite-cds/halite/fhirmap"
	"github.com/halite-cds/halite/rules"
)

// Hook names halite serves (CDS Hooks Library STU1).
const (
	HookPatientView = "patient-view"
	HookOrderSelect = "order-select"
	HookOrderSign   = "order-sign"
)

// PrefetchKey is one prefetch template. Required keys must be obtained
// (prefetched, or fetched from fhirServer) or the call is answered 412.
type PrefetchKey struct {
	Key      string
	Template string
	Required bool
	// What says, for cards and reports, what the key holds.
	What string
}

// Service is one CDS service: its id, the hooks it serves, what it checks
// and the data it needs.
type Service struct {
	ID                string
	Hooks             []string
	Title             string
	Description       string
	UsageRequirements string
	Check             rules.Check
	Prefetch          []PrefetchKey
}

// asks reports whether key is one of the service's prefetch keys.
func (s Service) asks(key string) bool {
	for _, k := range s.Prefetch {
		if k.Key == key {
			return true
		}
	}
	return false
}

// Serves reports whether s is registered for hook.
func (s Service) Serves(hook string) bool {
	for _, h := range s.Hooks {
		if h == hook {
			return true
		}
	}
	return false
}

// Registry is the fixed set of services, in discovery order.
type Registry struct {
	services []Service
	codes    *fhirmap.Codes
}

// NewRegistry returns halite's services reading results by codes (nil: the
// built-in LOINC table); their prefetch queries ask for every such code.
//
// rs gives the desmopressin codes the givenDoses template asks for; a nil
// rs (tests of other keys) leaves the template without them.
func NewRegistry(codes *fhirmap.Codes, rs *rules.Ruleset) *Registry {
	if codes == nil {
		codes = fhirmap.BuiltinCodes()
	}
	var doseTokens []string
	if rs != nil {
		doseTokens = rs.DesmopressinTokens()
	}
	k := prefetchKeys(codes, doseTokens)
	return &Registry{codes: codes, services: []Service{
		{
			ID:    "sodium-infusion-check",
			Hooks: []string{HookOrderSelect, HookOrderSign},
			Title: "Sodium correction check for fluid and sodium-moving orders",
			Description: "Reviews draft orders that move serum sodium (IV fluids of any tonicity, hypertonic saline, " +
				"vasopressin-receptor antagonists, desmopressin) against the correction already achieved and the " +
				"rate limits in force, and estimates the change the order would cause. Advisory only.",
			UsageRequirements: "Needs the patient's serum sodium results with their times; body weight, age and sex " +
				"for projections; active MedicationRequests, so that infusions already running are counted with the " +
				"drafts. Draft orders must be MedicationRequests with coded or described products; draft NutritionOrders " +
				"that restrict fluid are checked against the urine-to-plasma electrolyte ratio and the volume status.",
			Check:    rules.InfusionCheck,
			Prefetch: []PrefetchKey{k.patient, k.sodium, k.chemistry, k.urine, k.bodySize, k.conditions, k.medications, k.administrations, k.procedures},
		},
		{
			ID:    "sodium-drug-risk",
			Hooks: []string{HookOrderSelect, HookOrderSign},
			Title: "Hyponatremia and nephrogenic DI risk of new medication orders",
			Description: "Checks draft medication orders whose ingredients raise the risk of hyponatremia (SIADH and " +
				"related mechanisms) or of nephrogenic diabetes insipidus, judged against this patient's sodium, age and " +
				"active medications. Advisory only.",
			UsageRequirements: "Needs the patient's recent serum sodium and active MedicationRequests; serum and urine " +
				"osmolality for the concentrating-defect pattern; medications coded with RxNorm or ATC are matched most reliably.",
			Check:    rules.DrugRisk,
			Prefetch: []PrefetchKey{k.patient, k.sodium, k.chemistry, k.urine, k.medications},
		},
		{
			ID:    "sodium-chart-review",
			Hooks: []string{HookPatientView},
			Title: "Sodium trajectory review",
			Description: "On opening the chart, reviews the sodium trajectory, the correction already achieved, " +
				"laboratory patterns that may merit a work-up and active drugs that affect sodium. Shows a card only " +
				"when there is something to act on. Advisory only.",
			UsageRequirements: "Needs serial serum sodium results with their times; related chemistry, urine studies, " +
				"body size, active medications and conditions improve the review.",
			Check: rules.ChartReview,
			Prefetch: []PrefetchKey{k.patient, k.sodium, k.chemistry, k.urine, k.bodySize,
				k.medications, k.conditions, k.procedures, k.givenDoses},
		},
	}}
}

type keySet struct {
	patient, sodium, chemistry, urine, bodySize, medications, administrations, conditions, procedures, givenDoses PrefetchKey
}

// prefetchKeys builds the templates. They use only the restricted query
// syntax of CDS Hooks 2.0 §Prefetch query restrictions: instance reads, a
// resource reference, token parameters by equality (comma = OR), _sort and
// _count.
func prefetchKeys(codes *fhirmap.Codes, doseTokens []string) keySet {
	doses := "MedicationAdministration?patient={{context.patientId}}&status=completed"
	if len(doseTokens) > 0 {
		doses += "&code=" + strings.Join(doseTokens, ",")
	}
	obs := func(analytes ...rules.Analyte) string {
		return "Observation?patient={{context.patientId}}&code=" + strings.Join(codes.SearchTokens(analytes...), ",") + "&_sort=-date&_count=200"
	}
	return keySet{
		patient: PrefetchKey{Key: "patient", Template: "Patient/{{context.patientId}}", Required: true,
			What: "the patient's age and sex"},
		sodium: PrefetchKey{Key: "sodium", Template: obs(rules.Sodium), Required: true,
			What: "serum and blood sodium results"},
		chemistry: PrefetchKey{Key: "chemistry",
			Template: obs(rules.Potassium, rules.Glucose, rules.Urea, rules.Creatinine, rules.SerumOsmolality, rules.Urate, rules.Haematocrit,
				rules.TSH, rules.Cortisol, rules.Copeptin),
			What: "potassium, glucose, urea, creatinine, serum osmolality, uric acid, haematocrit, TSH and cortisol " +
				"(and copeptin where the site maps its code)"},
		urine: PrefetchKey{Key: "urine", Template: obs(rules.UrineOsmolality, rules.UrineSodium, rules.UrinePotassium, rules.UrineVolume,
			rules.UrineUrate, rules.UrineCreatinine, rules.UrineSpecificGravity),
			What: "urine osmolality, sodium, potassium, uric acid, creatinine and specific gravity, and urine output"},
		bodySize: PrefetchKey{Key: "bodySize", Template: obs(rules.BodyWeight, rules.BodyHeight),
			What: "body weight and height"},
		medications: PrefetchKey{Key: "medications",
			Template: "MedicationRequest?patient={{context.patientId}}&status=active",
			What:     "active medication orders"},
		administrations: PrefetchKey{Key: "administrations",
			Template: "MedicationAdministration?patient={{context.patientId}}&status=in-progress",
			What:     "infusions in progress"},
		givenDoses: PrefetchKey{Key: "givenDoses",
			Template: doses + "&_sort=-effective-time&_count=50",
			What:     "desmopressin doses given (completed administrations coded as desmopressin), for a water deprivation test"},
		procedures: PrefetchKey{Key: "procedures",
			Template: "Procedure?patient={{context.patientId}}&status=completed",
			What:     "completed procedures (pituitary surgery, craniotomy)"},
		conditions: PrefetchKey{Key: "conditions",
			Template: "Condition?patient={{context.patientId}}&clinical-status=active",
			What:     "active conditions"},
	}
}

// Codes returns the result codes the services read.
func (r *Registry) Codes() *fhirmap.Codes { return r.codes }

// Lookup returns the service with id.
func (r *Registry) Lookup(id string) (Service, bool) {
	for _, s := range r.services {
		if s.ID == id {
			return s, true
		}
	}
	return Service{}, false
}

// Services returns the services in discovery order.
func (r *Registry) Services() []Service { return r.services }

// ForHook returns the services that serve hook.
func (r *Registry) ForHook(hook string) []Service {
	var out []Service
	for _, s := range r.services {
		if s.Serves(hook) {
			out = append(out, s)
		}
	}
	return out
}

// Discovery returns the discovery document: one entry per service and hook.
func (r *Registry) Discovery() Discovery {
	d := Discovery{Services: []ServiceDescription{}}
	for _, s := range r.services {
		prefetch := map[string]string{}
		for _, k := range s.Prefetch {
			prefetch[k.Key] = k.Template
		}
		for _, h := range s.Hooks {
			d.Services = append(d.Services, ServiceDescription{
				Hook: h, Title: s.Title, Description: s.Description, ID: s.ID,
				Prefetch: prefetch, UsageRequirements: s.UsageRequirements,
			})
		}
	}
	return d
}
