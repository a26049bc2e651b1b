-- Suppression: a card's moment (select, sign, chart), the keyed hashes of
-- its product and draft order, and, for a finding held back, the reason
-- (such a row was never returned and takes no feedback). Prior cards are
-- looked up by patient hash and time.
ALTER TABLE card_log ADD COLUMN moment TEXT NOT NULL DEFAULT '';
ALTER TABLE card_log ADD COLUMN subject TEXT NOT NULL DEFAULT '';
ALTER TABLE card_log ADD COLUMN draft TEXT NOT NULL DEFAULT '';
ALTER TABLE card_log ADD COLUMN suppressed TEXT NOT NULL DEFAULT '';
CREATE INDEX card_log_patient ON card_log (patient_hash, created_at);
