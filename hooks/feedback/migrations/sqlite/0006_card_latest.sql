-- The repeat lookup's own table: per patient (keyed hash), service, caller,
-- rule, product (keyed hash) and moment, the latest card shown and the latest
-- card overridden with a reason, kept up to date as cards and feedback are
-- written, so a lookup reads a handful of rows however many cards the
-- patient was shown. Cards logged before this migration are not in it (their
-- repeats are shown).
CREATE TABLE card_latest (
  patient_hash       TEXT NOT NULL,
  service            TEXT NOT NULL,
  issuer             TEXT NOT NULL,
  tenant             TEXT NOT NULL,
  rule               TEXT NOT NULL,
  subject            TEXT NOT NULL,
  moment             TEXT NOT NULL,
  draft              TEXT NOT NULL,
  indicator          TEXT NOT NULL,
  figures            TEXT NOT NULL,
  created_at         TEXT NOT NULL,
  override_at        TEXT NOT NULL DEFAULT '',
  override_draft     TEXT NOT NULL DEFAULT '',
  override_indicator TEXT NOT NULL DEFAULT '',
  override_figures   TEXT NOT NULL DEFAULT '{}',
  override_shown_at  TEXT NOT NULL DEFAULT '',
  PRIMARY KEY (patient_hash, service, issuer, tenant, rule, subject, moment)
);
-- The repeat lookup no longer reads card_log by patient.
DROP INDEX card_log_patient;
