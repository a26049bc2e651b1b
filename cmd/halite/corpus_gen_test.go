package main

import (
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"time"
)

// The synthetic corpus: invented FHIR R4 transaction Bundles shaped like the
// R4 output of open-source synthetic-patient generators (urn:uuid fullUrls,
// request entries, Encounter and Provenance, conditional references to
// organisations), one patient each. Nothing here describes a real person.

// corpusPatient is one generated bundle and what the generator put in it.
type corpusPatient struct {
	index int
	// seeded: a sodium of 124-128 mmol/L in the last hours and a draft
	// order for a new SSRI (ingredient names drug) that the patient does not take.
	seeded       bool
	drug         string
	latestSodium float64
	// obs maps each Observation's relative reference to the analyte name
	// eval prints ("sodium", "glucose", "urea", "creatinine", "body-weight").
	obs  map[string]string
	dups int // Observations repeated at the same time with the same value
	// conflicts counts results given a second, different value at the same
	// time: a blood-gas sodium 7 mmol/L above the laboratory's (the
	// laboratory's counts), or on seeded patients a second laboratory
	// sodium 7 above (a tie: the lower, farther from 140, stands).
	conflicts int
	// named counts the resources that name the patient (subject); active
	// the active MedicationRequests.
	named, active int
	data          []byte
}

const (
	corpusBase  = "http://example.org/fhir/"
	rxnormSys   = "http://www.nlm.nih.gov/research/umls/rxnorm"
	loincSys    = "http://loinc.org"
	ucumSys     = "http://unitsofmeasure.org"
	corpusOrgID = "http://example.org/fhir/sid/synthetic-org"
)

type corpusDrug struct{ code, name, text string }

var (
	corpusRiskDrugs = []corpusDrug{
		{"36437", "sertraline", "sertraline 50 mg oral once daily"},
		{"2556", "citalopram", "citalopram 10 mg oral once daily"},
	}
	// Oral drugs with no sodium effect in halite's knowledge base.
	corpusPlainDrugs = []corpusDrug{
		{"83367", "atorvastatin", "atorvastatin 20 mg oral once daily"},
		{"6809", "metformin", "metformin 500 mg oral twice daily"},
		{"29046", "lisinopril", "lisinopril 10 mg oral once daily"},
		{"17767", "amlodipine", "amlodipine 5 mg oral once daily"},
	}
	corpusGiven  = []string{"Demo", "Test", "Sample", "Synth"}
	corpusFamily = []string{"Alder", "Birch", "Cedar", "Hazel", "Larch", "Maple", "Rowan", "Sumac", "Willow", "Yew"}
)

type corpusGen struct {
	rng     *rand.Rand
	at      time.Time
	entries []map[string]any
	urns    []string
}

func (g *corpusGen) uuid() string {
	var b [16]byte
	for i := range b {
		b[i] = byte(g.rng.UintN(256))
	}
	b[6] = b[6]&0x0f | 0x40
	b[8] = b[8]&0x3f | 0x80
	return fmt.Sprintf("%x-%x-%x-%x-%x", b[0:4], b[4:6], b[6:8], b[8:10], b[10:16])
}

func (g *corpusGen) add(id string, res map[string]any) {
	urn := "urn:uuid:" + id
	g.urns = append(g.urns, urn)
	g.entries = append(g.entries, map[string]any{
		"fullUrl":  urn,
		"resource": res,
		"request":  map[string]any{"method": "POST", "url": res["resourceType"]},
	})
}

func (g *corpusGen) when(hoursAgo float64) string {
	return g.at.Add(-time.Duration(hoursAgo * float64(time.Hour))).Format(time.RFC3339)
}

// generateCorpus writes n bundles evaluated at at, deterministically for seed.
// Every 10th patient (index 0, 10, …) is seeded.
func generateCorpus(n int, seed uint64, at time.Time) ([]corpusPatient, error) {
	rng := rand.New(rand.NewPCG(seed, seed^0x9e3779b97f4a7c15))
	out := make([]corpusPatient, 0, n)
	for i := range n {
		p, err := generatePatient(rng, i, at)
		if err != nil {
			return nil, err
		}
		out = append(out, p)
	}
	return out, nil
}

func generatePatient(rng *rand.Rand, i int, at time.Time) (corpusPatient, error) {
	g := &corpusGen{rng: rng, at: at}
	p := corpusPatient{index: i, seeded: i%10 == 0, obs: map[string]string{}}
	ptID := g.uuid()
	ptURN := "urn:uuid:" + ptID
	// One patient in eight has no Patient.id (known only by its urn:uuid);
	// the others may be referred to as Patient/<id> or by absolute URL too.
	withID := i%8 != 3
	patientRef := func() map[string]any {
		p.named++
		if withID {
			switch r := g.rng.IntN(10); {
			case r == 0:
				return map[string]any{"reference": "Patient/" + ptID}
			case r == 1:
				return map[string]any{"reference": corpusBase + "Patient/" + ptID}
			}
		}
		return map[string]any{"reference": ptURN}
	}
	gender := []string{"female", "male"}[g.rng.IntN(2)]
	birth := at.AddDate(-(20 + g.rng.IntN(65)), -g.rng.IntN(12), -g.rng.IntN(28))
	patient := map[string]any{
		"resourceType": "Patient",
		"identifier": []any{map[string]any{
			"system": "http://example.org/fhir/sid/synthetic-mrn",
			"value":  fmt.Sprintf("SYN-%06d", i),
		}},
		"name": []any{map[string]any{
			"use":    "official",
			"family": corpusFamily[g.rng.IntN(len(corpusFamily))],
			"given":  []any{corpusGiven[g.rng.IntN(len(corpusGiven))]},
		}},
		"gender":    gender,
		"birthDate": birth.Format("2006-01-02"),
	}
	if withID {
		patient["id"] = ptID
	}
	g.add(ptID, patient)

	encID := g.uuid()
	encStart := 72 + g.rng.Float64()*24
	g.add(encID, map[string]any{
		"resourceType": "Encounter",
		"id":           encID,
		"status":       "in-progress",
		"class": map[string]any{
			"system": "http://terminology.hl7.org/CodeSystem/v3-ActCode", "code": "IMP",
		},
		"subject": patientRef(),
		"period":  map[string]any{"start": g.when(encStart)},
		"serviceProvider": map[string]any{
			"reference": "Organization?identifier=" + corpusOrgID + "|ORG-" + fmt.Sprint(i%5),
			"display":   "Example Synthetic Hospital",
		},
	})
	encRef := map[string]any{"reference": "urn:uuid:" + encID}

	obs := func(analyte, code, display, unit string, value, hoursAgo float64, category string) map[string]any {
		id := g.uuid()
		res := map[string]any{
			"resourceType": "Observation",
			"id":           id,
			"status":       "final",
			"category": []any{map[string]any{"coding": []any{map[string]any{
				"system": "http://terminology.hl7.org/CodeSystem/observation-category", "code": category,
			}}}},
			"code": map[string]any{
				"coding": []any{map[string]any{"system": loincSys, "code": code, "display": display}},
				"text":   display,
			},
			"subject":           patientRef(),
			"encounter":         encRef,
			"effectiveDateTime": g.when(hoursAgo),
			"issued":            g.when(hoursAgo - 0.5),
			"valueQuantity": map[string]any{
				"value": value, "unit": unit, "system": ucumSys, "code": unit,
			},
		}
		g.add(id, res)
		p.obs["Observation/"+id] = analyte
		return res
	}
	// repeat copies res under a new id, naming the patient again.
	repeat := func(res map[string]any) (string, map[string]any) {
		id := g.uuid()
		c := map[string]any{}
		for k, v := range res {
			c[k] = v
		}
		c["id"] = id
		c["subject"] = patientRef()
		return id, c
	}
	// duplicate repeats res under a new id with the same time and value.
	duplicate := func(res map[string]any, analyte string) {
		id, c := repeat(res)
		g.add(id, c)
		p.obs["Observation/"+id] = analyte
		p.dups++
	}
	// differing repeats a sodium res at the same time with value and code.
	differing := func(res map[string]any, code, display string, value float64) {
		id, c := repeat(res)
		c["code"] = map[string]any{
			"coding": []any{map[string]any{"system": loincSys, "code": code, "display": display}},
			"text":   display,
		}
		c["valueQuantity"] = map[string]any{"value": value, "unit": "mmol/L", "system": ucumSys, "code": "mmol/L"}
		g.add(id, c)
		p.obs["Observation/"+id] = "sodium"
		p.conflicts++
	}
	// noisy adds generator floating-point noise to one value in four.
	noisy := func(v float64) float64 {
		if g.rng.IntN(4) == 0 {
			return v + (g.rng.Float64()-0.5)*2e-5
		}
		return v
	}

	// Sodium: 3-6 results over the last ~3 days, oldest first.
	nNa := 3 + g.rng.IntN(4)
	var lastNa map[string]any
	for k := range nNa {
		hoursAgo := float64(nNa-k)*12 - 9 - g.rng.Float64()*2
		var v float64
		switch {
		case p.seeded && k == nNa-1:
			v = float64(124 + (i/10)%5)
		case p.seeded:
			v = float64(130 + g.rng.IntN(4))
		default:
			v = float64(138 + g.rng.IntN(3))
		}
		code, disp := "2951-2", "Sodium [Moles/volume] in Serum or Plasma"
		if g.rng.IntN(5) == 0 {
			code, disp = "2947-0", "Sodium [Moles/volume] in Blood"
		}
		lastNa = obs("sodium", code, disp, "mmol/L", noisy(v), hoursAgo, "laboratory")
		if k == nNa-1 {
			p.latestSodium = v
		}
	}
	if i%7 == 2 {
		duplicate(lastNa, "sodium")
	}
	switch {
	case i%8 == 0 && p.seeded:
		differing(lastNa, "2951-2", "Sodium [Moles/volume] in Serum or Plasma", p.latestSodium+7)
	case i%8 == 3:
		differing(lastNa, "39791-9", "Sodium [Moles/volume] in Venous blood", p.latestSodium+7)
	}
	for k := range 1 + g.rng.IntN(2) {
		res := obs("glucose", "2345-7", "Glucose [Mass/volume] in Serum or Plasma", "mg/dL",
			noisy(float64(80+g.rng.IntN(60))), float64(30-20*k)+g.rng.Float64(), "laboratory")
		if i%9 == 4 && k == 0 {
			duplicate(res, "glucose")
		}
	}
	obs("urea", "6299-2", "Urea nitrogen [Mass/volume] in Blood", "mg/dL",
		noisy(float64(9+g.rng.IntN(12))), 20+g.rng.Float64()*4, "laboratory")
	obs("creatinine", "38483-4", "Creatinine [Mass/volume] in Blood", "mg/dL",
		math.Round((0.6+g.rng.Float64()*0.6)*100)/100, 20+g.rng.Float64()*4, "laboratory")
	obs("body-weight", "29463-7", "Body weight", "kg",
		noisy(math.Round((50+g.rng.Float64()*45)*10)/10), 40+g.rng.Float64()*20, "vital-signs")

	// Active orders with no sodium effect, for some patients.
	if g.rng.IntN(3) == 0 {
		d := corpusPlainDrugs[g.rng.IntN(len(corpusPlainDrugs))]
		g.add(g.medRequest(d, "active", patientRef(), encRef, 24*(30+float64(g.rng.IntN(300)))))
		p.active++
	}
	// The draft order being signed.
	var draft corpusDrug
	switch {
	case p.seeded:
		draft = corpusRiskDrugs[(i/10)%len(corpusRiskDrugs)]
		p.drug = draft.name
	default:
		draft = corpusPlainDrugs[g.rng.IntN(len(corpusPlainDrugs))]
	}
	if !p.seeded && i%6 == 1 {
		g.add(g.salineDraft(patientRef(), encRef))
	} else {
		g.add(g.medRequest(draft, "draft", patientRef(), encRef, 0.25))
	}

	// Provenance of the whole record, as such generators write it last.
	targets := make([]any, 0, len(g.urns))
	for _, u := range g.urns {
		targets = append(targets, map[string]any{"reference": u})
	}
	provID := g.uuid()
	g.add(provID, map[string]any{
		"resourceType": "Provenance",
		"id":           provID,
		"target":       targets,
		"recorded":     g.when(0.2),
		"agent": []any{map[string]any{
			"type": map[string]any{"coding": []any{map[string]any{
				"system": "http://terminology.hl7.org/CodeSystem/provenance-participant-type", "code": "author",
			}}},
			"who": map[string]any{
				"reference": "Organization?identifier=" + corpusOrgID + "|ORG-" + fmt.Sprint(i%5),
				"display":   "Example Synthetic Hospital",
			},
		}},
	})

	data, err := json.MarshalIndent(map[string]any{
		"resourceType": "Bundle",
		"type":         "transaction",
		"entry":        g.entries,
	}, "", " ")
	if err != nil {
		return p, err
	}
	p.data = data
	return p, nil
}

// medRequest returns the id and an oral MedicationRequest for d.
func (g *corpusGen) medRequest(d corpusDrug, status string, subject, enc map[string]any, hoursAgo float64) (string, map[string]any) {
	id := g.uuid()
	return id, map[string]any{
		"resourceType": "MedicationRequest",
		"id":           id,
		"status":       status,
		"intent":       "order",
		"medicationCodeableConcept": map[string]any{
			"coding": []any{map[string]any{"system": rxnormSys, "code": d.code, "display": d.name}},
			"text":   d.text,
		},
		"subject":    subject,
		"encounter":  enc,
		"authoredOn": g.when(hoursAgo),
		"dosageInstruction": []any{map[string]any{
			"sequence": 1,
			"text":     d.text,
			"timing":   map[string]any{"repeat": map[string]any{"frequency": 1, "period": 1, "periodUnit": "d"}},
			"route": map[string]any{"coding": []any{map[string]any{
				"system": "http://snomed.info/sct", "code": "26643006", "display": "Oral route",
			}}},
		}},
	}
}

// salineDraft returns the id and a draft 0.9% sodium chloride at 100 mL/h.
func (g *corpusGen) salineDraft(subject, enc map[string]any) (string, map[string]any) {
	id := g.uuid()
	return id, map[string]any{
		"resourceType": "MedicationRequest",
		"id":           id,
		"status":       "draft",
		"intent":       "order",
		"medicationCodeableConcept": map[string]any{
			"coding": []any{map[string]any{"system": rxnormSys, "code": "1807639"}},
			"text":   "sodium chloride 0.9% 1000 mL IV",
		},
		"subject":    subject,
		"encounter":  enc,
		"authoredOn": g.when(0.5),
		"dosageInstruction": []any{map[string]any{
			"sequence": 1,
			"text":     "sodium chloride 0.9% IV at 100 mL/h",
			"route": map[string]any{"coding": []any{map[string]any{
				"system": "http://snomed.info/sct", "code": "47625008", "display": "Intravenous route",
			}}},
			"doseAndRate": []any{map[string]any{"rateQuantity": map[string]any{
				"value": 100, "unit": "mL/h", "system": ucumSys, "code": "mL/h",
			}}},
		}},
	}
}
