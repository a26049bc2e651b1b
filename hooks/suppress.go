package hooks

import (
	"context"
	"time"

	"github.com/halite-cds/halite/rules"
	"go.opentelemetry.io/otel/attribute"
)

// Held is a finding held back as a repeat of a card already shown.
type Held struct {
	// ID is the card-log record's id (a UUIDv7, as a card's).
	ID          string
	Finding     rules.Finding
	Suppression rules.Suppression
	// Subject and Draft are the keyed hashes it was matched by.
	Subject, Draft string
}

// momentOf is the suppression moment of a hook.
func momentOf(hook string) rules.Moment {
	switch hook {
	case HookOrderSelect:
		return rules.MomentSelect
	case HookOrderSign:
		return rules.MomentSign
	}
	return rules.MomentChart
}

// findingKeys are the keyed hashes a finding is matched by: its product,
// and its draft order by identity and content (none for a finding about
// several drafts or a draft without an id: no selection-to-signing match).
func (e *Engine) findingKeys(f rules.Finding) (subject, draft string) {
	if f.Product != "" {
		subject = e.hash("product:" + f.Product)
	}
	if f.Draft != "" {
		draft = e.hash("draft:" + f.Draft)
	}
	return subject, draft
}

// priorLookupTimeout bounds the repeat lookup, so a slow card log costs
// the call at most this before the cards are shown without it.
const priorLookupTimeout = 300 * time.Millisecond

// suppress splits findings into those to show and those held back as
// repeats of cards the card log holds for this patient, service and
// caller. A failed lookup holds nothing back: the cards are shown.
func (e *Engine) suppress(ctx context.Context, service, hook, patientHash string, fs []rules.Finding, at time.Time) ([]rules.Finding, []Held) {
	if e.recorder == nil || len(fs) == 0 {
		return fs, nil
	}
	p := e.ruleset.Suppression()
	look := max(time.Duration(p.OverrideHours*float64(time.Hour)), time.Duration(p.ChartIntervalHours*float64(time.Hour)),
		time.Duration(p.SelectToSignMinutes*float64(time.Minute)))
	if look <= 0 { // a site that turned every suppression off
		return fs, nil
	}
	caller := CallerFrom(ctx)
	lctx, span := e.tel.start(ctx, "cardlog.prior")
	lctx, cancel := context.WithTimeout(lctx, priorLookupTimeout)
	defer cancel()
	prior, err := e.recorder.PriorCards(lctx, PriorQuery{Service: service, Issuer: caller.Issuer, Tenant: caller.Tenant,
		PatientHash: patientHash, Since: at.Add(-look), Until: at})
	if err != nil {
		fail(span, CauseStore, err)
		span.End()
		e.tel.storeFailure(ctx, StoreOpPriorCards, err)
		if e.log != nil {
			e.log.WarnContext(ctx, "card log lookup failed; no card held back", "service", service, "error", err.Error())
		}
		return fs, nil
	}
	span.SetAttributes(attribute.Int("halite.cards.prior", len(prior)))
	span.End()
	m := momentOf(hook)
	var shown []rules.Finding
	var held []Held
	for _, f := range fs {
		subject, draft := e.findingKeys(f)
		s, ok := p.Suppress(f, m, subject, draft, prior, at)
		var id string
		if ok {
			var err error
			if id, err = newRecordID(); err != nil {
				ok = false // without a record id it could not be counted: shown
			}
		}
		if !ok {
			shown = append(shown, f)
			continue
		}
		held = append(held, Held{ID: id, Finding: f, Suppression: s, Subject: subject, Draft: draft})
	}
	return shown, held
}
