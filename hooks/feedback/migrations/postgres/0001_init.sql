-- halite card log and feedback, PostgreSQL. Migrations are forward-only.
CREATE TABLE card_log (
  card_uuid     TEXT PRIMARY KEY,
  service       TEXT NOT NULL,
  rule          TEXT NOT NULL,
  indicator     TEXT NOT NULL,
  ruleset       TEXT NOT NULL,
  tenant        TEXT NOT NULL DEFAULT '',
  patient_hash  TEXT NOT NULL,
  created_at    TEXT NOT NULL,            -- RFC 3339, UTC
  figures       TEXT NOT NULL DEFAULT '{}',
  suggestions   TEXT NOT NULL DEFAULT '[]' -- JSON array of suggestion uuids
);
CREATE INDEX card_log_created ON card_log (created_at);
CREATE TABLE feedback (
  card_uuid      TEXT NOT NULL REFERENCES card_log (card_uuid) ON DELETE CASCADE,
  outcome        TEXT NOT NULL CHECK (outcome IN ('accepted', 'overridden')),
  outcome_at     TEXT NOT NULL,
  accepted       TEXT NOT NULL DEFAULT '[]',
  reason_system  TEXT NOT NULL DEFAULT '',
  reason_code    TEXT NOT NULL DEFAULT '',
  user_comment   TEXT NOT NULL DEFAULT '',
  received_at    TEXT NOT NULL,
  PRIMARY KEY (card_uuid, outcome, outcome_at)
);
