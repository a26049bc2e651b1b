package main

import (
	"context"
	"crypto/hmac"
	"crypto/rand"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/halite-cds/halite/hooks"
	"github.com/halite-cds/halite/hooks/feedback"
	"github.com/halite-cds/halite/rules"
)

// StoreConfig is where the card log and feedback are kept.
type StoreConfig struct {
	// DSN is "sqlite:PATH" (the default, one node) or a postgres:// URL
	// (several replicas; they then share the JWT replay cache too).
	DSN string `yaml:"dsn"`
	// HashKeyFile holds the secret that keys patient hashes (at least 32
	// bytes). Without it, in development mode, a random key is made per
	// process and hashes do not join across restarts.
	HashKeyFile string   `yaml:"hash_key_file"`
	Retention   Duration `yaml:"retention"`
	PurgeEvery  Duration `yaml:"purge_interval"`
	// SQLiteSynchronous is "full" (every commit synced before the card
	// leaves) or "normal" (commits survive a crash of halite, not of the
	// machine); see feedback.Options.
	SQLiteSynchronous string `yaml:"sqlite_synchronous"`
	// QueueSize bounds the records waiting for the store's writer; a call
	// that finds it full is answered 503 at once.
	QueueSize int `yaml:"queue_size"`
}

func defaultStoreConfig() StoreConfig {
	return StoreConfig{DSN: "sqlite:halite-data/halite.db", Retention: Duration(400 * 24 * time.Hour), PurgeEvery: Duration(time.Hour),
		SQLiteSynchronous: feedback.SyncFull, QueueSize: 1024}
}

func (s StoreConfig) postgres() bool {
	return strings.HasPrefix(s.DSN, "postgres://") || strings.HasPrefix(s.DSN, "postgresql://")
}

func (s StoreConfig) validate(dev bool) error {
	if !s.postgres() && (!strings.HasPrefix(s.DSN, "sqlite:") || strings.TrimPrefix(s.DSN, "sqlite:") == "") {
		return errors.New("config: store.dsn: must be sqlite:PATH or a postgres:// URL")
	}
	switch {
	case s.SQLiteSynchronous != feedback.SyncFull && s.SQLiteSynchronous != feedback.SyncNormal:
		return fmt.Errorf("config: store.sqlite_synchronous: %q is not %q or %q", s.SQLiteSynchronous, feedback.SyncFull, feedback.SyncNormal)
	case s.postgres() && s.SQLiteSynchronous != feedback.SyncFull:
		return errors.New("config: store.sqlite_synchronous: applies to a sqlite: store only; PostgreSQL commits are synced by the server")
	}
	if s.QueueSize < 1 || s.QueueSize > 1<<20 {
		return errors.New("config: store.queue_size: must be between 1 and 1048576")
	}
	if s.Retention <= 0 || s.PurgeEvery <= 0 {
		return errors.New("config: store.retention and store.purge_interval must be positive")
	}
	if s.HashKeyFile == "" && !dev {
		return errors.New("config: store.hash_key_file: required outside development mode (it keys patient hashes)")
	}
	return nil
}

// openStore opens the configured store and the patient hasher. A reader
// (halite report, beside a serving process) leaves WAL checkpoints to the
// server.
func openStore(c StoreConfig, log *slog.Logger, reader bool) (*feedback.DB, func(string) string, error) {
	var key []byte
	if c.HashKeyFile != "" {
		k, err := os.ReadFile(c.HashKeyFile)
		if err != nil {
			return nil, nil, fmt.Errorf("config: store.hash_key_file: %w", err)
		}
		if len(k) < 32 {
			return nil, nil, errors.New("config: store.hash_key_file: the key must be at least 32 bytes")
		}
		key = k
	} else {
		key = make([]byte, 32)
		if _, err := rand.Read(key); err != nil {
			return nil, nil, fmt.Errorf("store: %w", err)
		}
		log.Warn("store: no hash_key_file; patient hashes use a random per-process key and will not join across restarts")
	}
	var st *feedback.DB
	var err error
	if c.postgres() {
		st, err = feedback.OpenPostgres(c.DSN, feedback.Options{QueueSize: c.QueueSize})
	} else {
		path := strings.TrimPrefix(c.DSN, "sqlite:")
		if err := os.MkdirAll(filepath.Dir(path), 0o700); err != nil {
			return nil, nil, fmt.Errorf("store: %w", err)
		}
		st, err = feedback.OpenSQLite(path, feedback.Options{SQLiteSynchronous: c.SQLiteSynchronous, Log: log, NoCheckpointer: reader, QueueSize: c.QueueSize})
	}
	if err != nil {
		return nil, nil, err
	}
	hash := func(ref string) string {
		m := hmac.New(sha256.New, key)
		m.Write([]byte(ref))
		return hex.EncodeToString(m.Sum(nil))
	}
	return st, hash, nil
}

// purgeLoop deletes records older than the retention period, every
// interval, until ctx ends.
func purgeLoop(ctx context.Context, st feedback.Store, c StoreConfig, log *slog.Logger) {
	t := time.NewTicker(time.Duration(c.PurgeEvery))
	defer t.Stop()
	for {
		if n, err := st.Purge(ctx, time.Now().Add(-time.Duration(c.Retention))); err != nil && ctx.Err() == nil {
			log.Warn("store purge failed", "error", err.Error())
		} else if n > 0 {
			log.Info("store purged", "cards", n)
		}
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}

// recorder presents a feedback.Store as the hooks Recorder.
type recorder struct{ st feedback.Store }

// storeUnavailable is a store failure as the 503 it is answered with,
// with the store's reason (queue full, timeout, busy) when it has one.
func storeUnavailable(err error, message string) error {
	reason := hooks.ReasonStoreFault
	if kind, ok := feedback.UnavailableKind(err); ok {
		switch kind {
		case hooks.ReasonStoreBusy, hooks.ReasonStoreTimeout, hooks.ReasonStoreQueueFull:
			reason = kind
		}
	}
	return &hooks.Error{Kind: hooks.KindUnavailable, Reason: reason, Message: message, Err: err}
}

func (r recorder) LogCards(ctx context.Context, cards []hooks.LoggedCard) error {
	recs := make([]feedback.CardRecord, len(cards))
	for i, c := range cards {
		recs[i] = feedback.CardRecord{UUID: c.UUID, Service: c.Service, Rule: c.Rule, Indicator: c.Indicator, Ruleset: c.Ruleset,
			Issuer: c.Issuer, Tenant: c.Tenant, PatientHash: c.PatientHash, At: c.At, Figures: c.Figures, Suggestions: c.Suggestions,
			Moment: string(c.Moment), Subject: c.Subject, Draft: c.Draft, Suppressed: c.Suppressed}
	}
	if err := r.st.LogCards(ctx, recs); err != nil {
		return storeUnavailable(err, "the card log could not be written")
	}
	return nil
}

func (r recorder) CountCall(c hooks.CallCount) {
	r.st.CountCall(feedback.CallRecord{At: c.At, Service: c.Service, Hook: c.Hook, Issuer: c.Issuer, Tenant: c.Tenant,
		Ruleset: c.Ruleset, Cards: c.Cards, Failed: c.Failed})
}

func (r recorder) PriorCards(ctx context.Context, q hooks.PriorQuery) ([]rules.ShownCard, error) {
	prior, err := r.st.PriorCards(ctx, feedback.PriorQuery{Service: q.Service, Issuer: q.Issuer, Tenant: q.Tenant,
		PatientHash: q.PatientHash, Since: q.Since, Until: q.Until})
	if err != nil {
		return nil, storeUnavailable(err, "the card log could not be read") // with its reason, for the store-failure counter
	}
	out := make([]rules.ShownCard, 0, len(prior))
	for _, p := range prior {
		ind, err := rules.ParseIndicator(p.Indicator)
		if err != nil {
			return nil, fmt.Errorf("prior cards: %w", err)
		}
		out = append(out, rules.ShownCard{Rule: p.Rule, Moment: rules.Moment(p.Moment), Subject: p.Subject, Draft: p.Draft,
			Indicator: ind, Figures: p.Figures, At: p.At, OverriddenAt: p.OverriddenAt})
	}
	return out, nil
}

func (r recorder) RecordOutcomes(ctx context.Context, entries []hooks.CardOutcome) error {
	recs := make([]feedback.FeedbackRecord, len(entries))
	for i, o := range entries {
		recs[i] = feedback.FeedbackRecord{Card: o.Card, Service: o.Service, Outcome: o.Outcome, Issuer: o.Issuer, Tenant: o.Tenant,
			AcceptedSuggestions: o.AcceptedSuggestions, ReasonSystem: o.ReasonSystem, ReasonCode: o.ReasonCode,
			UserComment: o.UserComment, OutcomeAt: o.OutcomeAt}
	}
	err := r.st.RecordFeedback(ctx, recs)
	var ee *feedback.EntryError
	switch {
	case err == nil:
		return nil
	case errors.As(err, &ee) && errors.Is(err, feedback.ErrUnknownCard):
		return &hooks.OutcomeError{Index: ee.Index, Err: hooks.ErrUnknownCard}
	case errors.As(err, &ee) && errors.Is(err, feedback.ErrUnknownSuggestion):
		return &hooks.OutcomeError{Index: ee.Index, Err: hooks.ErrUnknownSuggestion}
	}
	return storeUnavailable(err, "feedback could not be stored")
}
