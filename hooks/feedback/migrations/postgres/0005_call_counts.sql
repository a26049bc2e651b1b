-- Every hook call to a service, counted by quarter hour (UTC,
-- YYYY-MM-DDTHH:MM, the minute 00, 15, 30 or 45, so days in any time zone
-- are whole), service, hook, caller and ruleset revision: the denominator
-- of the burden report. No patient data.
CREATE TABLE call_counts (
  period     TEXT NOT NULL,
  service    TEXT NOT NULL,
  hook       TEXT NOT NULL,
  issuer     TEXT NOT NULL,
  tenant     TEXT NOT NULL,
  ruleset    TEXT NOT NULL,
  calls      BIGINT NOT NULL,
  with_cards BIGINT NOT NULL,
  failed     BIGINT NOT NULL,
  PRIMARY KEY (period, service, hook, issuer, tenant, ruleset)
);
