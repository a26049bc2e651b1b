-- Feedback is matched to the caller (issuer and tenant) that was shown the
-- card; the replay sweep deletes by expiry.
ALTER TABLE card_log ADD COLUMN issuer TEXT NOT NULL DEFAULT '';
CREATE INDEX jwt_replay_until ON jwt_replay (until);
