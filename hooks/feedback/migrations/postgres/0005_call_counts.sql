-- Every hook call answered, counted by hour (UTC, YYYY-MM-DDTHH), service,
-- hook, caller and ruleset revision: the denominator of the burden report.
-- No patient data.
CREATE TABLE call_counts (
  hour       TEXT NOT NULL,
  service    TEXT NOT NULL,
  hook       TEXT NOT NULL,
  issuer     TEXT NOT NULL,
  tenant     TEXT NOT NULL,
  ruleset    TEXT NOT NULL,
  calls      BIGINT NOT NULL,
  with_cards BIGINT NOT NULL,
  cards      BIGINT NOT NULL,
  suppressed BIGINT NOT NULL,
  PRIMARY KEY (hour, service, hook, issuer, tenant, ruleset)
);
