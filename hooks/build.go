package hooks

import (
	"encoding/json"
	"fmt"

	"github.com/google/uuid"
	"github.com/halite-cds/halite/fhirmap"
)

// orderTypes are the R4 request resources a draftOrders Bundle may carry.
var orderTypes = map[string]bool{
	"MedicationRequest": true, "ServiceRequest": true, "DeviceRequest": true,
	"NutritionOrder": true, "VisionPrescription": true,
}

// RequestOptions shape the request BuildRequest makes.
type RequestOptions struct {
	Hook   string
	UserID string // context.userId, "Practitioner/…"
	// EncounterID is context.encounterId; empty leaves it out.
	EncounterID string
	// Selections for order-select; empty selects every draft order.
	Selections []string
	// OmitPrefetch leaves prefetch out, so the service must fetch.
	OmitPrefetch bool
	// FHIRServer and AccessToken, when set, are sent as fhirServer and
	// fhirAuthorization.
	FHIRServer  string
	AccessToken string
}

// BuildRequest turns a patient Bundle into the request a CDS client would
// send to svc: the one Patient gives patientId, resources with status
// "draft" become context.draftOrders, and each prefetch template is run
// against the Bundle as BundleStore answers it. A Patient without an id
// whose entry's fullUrl is urn:uuid:U (or urn:oid:U) has patientId U, as a
// server processing the Bundle as a transaction would give it an id.
func BuildRequest(b *fhirmap.Bundle, svc Service, opt RequestOptions) (*Request, error) {
	if !svc.Serves(opt.Hook) {
		return nil, fmt.Errorf("build request: service %s does not serve hook %q", svc.ID, opt.Hook)
	}
	store := NewBundleStore(b)
	var patientID string
	var drafts []stored
	var draftRefs []string
	for _, r := range store.resources {
		switch {
		case r.res.Type == "Patient":
			if patientID != "" {
				return nil, fmt.Errorf("build request: the bundle holds more than one Patient")
			}
			patientID = r.res.ID
		case orderTypes[r.res.Type] && r.fields.Status == "draft":
			drafts = append(drafts, r)
			draftRefs = append(draftRefs, r.res.Ref())
		}
	}
	if patientID == "" {
		return nil, fmt.Errorf("build request: the bundle holds no Patient with an id or a urn:uuid fullUrl")
	}
	ctx := HookContext{UserID: opt.UserID, PatientID: patientID, EncounterID: opt.EncounterID}
	if opt.Hook != HookPatientView {
		if len(drafts) == 0 {
			return nil, fmt.Errorf("build request: %s needs draft orders, and the bundle holds no order with status \"draft\"", opt.Hook)
		}
		type entry struct {
			Resource json.RawMessage `json:"resource"`
		}
		bundle := struct {
			ResourceType string  `json:"resourceType"`
			Type         string  `json:"type"`
			Entry        []entry `json:"entry"`
		}{ResourceType: "Bundle", Type: "collection"}
		for _, d := range store.withMedications(drafts) {
			bundle.Entry = append(bundle.Entry, entry{Resource: d.res.Raw})
		}
		raw, err := json.Marshal(bundle)
		if err != nil {
			return nil, fmt.Errorf("build request: draftOrders: %w", err)
		}
		ctx.DraftOrders = raw
	}
	if opt.Hook == HookOrderSelect {
		ctx.Selections = opt.Selections
		if len(ctx.Selections) == 0 {
			ctx.Selections = draftRefs
		}
	}
	rawCtx, err := json.Marshal(ctx)
	if err != nil {
		return nil, fmt.Errorf("build request: context: %w", err)
	}
	req := &Request{Hook: opt.Hook, HookInstance: uuid.NewString(), Context: rawCtx}
	if opt.FHIRServer != "" {
		req.FHIRServer = opt.FHIRServer
		if opt.AccessToken != "" {
			expires := 300
			req.FHIRAuthorization = &FHIRAuthorization{AccessToken: opt.AccessToken, TokenType: "Bearer",
				ExpiresIn: &expires, Scope: "patient/*.read", Subject: "halite", Patient: patientID}
		}
	}
	if opt.OmitPrefetch {
		return req, nil
	}
	call := &Call{Context: ctx, ContextTokens: map[string]string{"userId": opt.UserID, "patientId": patientID}}
	req.Prefetch = map[string]json.RawMessage{}
	for _, k := range svc.Prefetch {
		query, ok := RenderTemplate(k.Template, call)
		if !ok {
			continue
		}
		v, err := store.Query(query)
		if err != nil {
			return nil, fmt.Errorf("build request: prefetch %s: %w", k.Key, err)
		}
		req.Prefetch[k.Key] = v
	}
	return req, nil
}

// PatientLinks counts the resources of b that name a patient (subject or
// patient): those that resolve to the Patient with id patientID, and the
// others.
func PatientLinks(b *fhirmap.Bundle, patientID string) (linked, other int) {
	s := NewBundleStore(b)
	for _, r := range s.resources {
		if r.res.Type == "Patient" || (r.fields.Subject == nil && r.fields.Patient == nil) {
			continue
		}
		if s.refMatches(r, patientID) {
			linked++
		} else {
			other++
		}
	}
	return linked, other
}
