-- sqlmatch study 'annual_pass', step 06: propensity_cells (postgres)
-- Units grouped by their values of the propensity features, with unit and treated counts (the data each Newton step sums over).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures
-- writes: sqlmatch.annual_pass_score_cells
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_score_cells__building;

CREATE TABLE "sqlmatch".annual_pass_score_cells__building AS
/* Propensity model, the data it is fitted on: the units grouped by their values of the model's
   features (pre_trips, pre_minutes, age_band), with the number of units and of treated units per group.
   Units with equal feature values add identical terms to the score vector, the information
   matrix and the log-likelihood, so each Newton step sums over these groups instead of over the
   units: the same fit, and a step reads one row per distinct combination of values (few when the
   features are counts and categories; as many as the units when a feature is continuous). */
SELECT
  m.pre_trips,
  m.pre_minutes,
  m.age_band,
  COUNT(*) AS cell__units,
  SUM(m.treated) AS cell__treated
FROM "sqlmatch".annual_pass_measures AS m
GROUP BY
  m.pre_trips,
  m.pre_minutes,
  m.age_band;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_score_cells;

ALTER TABLE "sqlmatch".annual_pass_score_cells__building
RENAME TO annual_pass_score_cells;

COMMIT;
