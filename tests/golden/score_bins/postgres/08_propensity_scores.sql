-- sqlmatch study 'annual_pass', step 08: propensity_scores (postgres)
-- Propensity score (logit scale) of every unit in the study.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures
-- writes: sqlmatch.annual_pass_scores
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_scores__building;

CREATE TABLE "sqlmatch".annual_pass_scores__building AS
/* Propensity score of every unit in the study, on the logit scale (the linear predictor b'x;
   common practice: it spreads the units out where the probability scale crowds them near 0).
   Coefficients fitted on 2026-12-02 (6 Newton steps, data fingerprint 0123456789abcdef).
   Design columns: x0 = intercept; x1 = pre_trips; x2 = log(1 + pre_minutes); x3 = age_band = '25-34'; x4 = age_band = '35-49'; x5 = age_band = '50+'. */
WITH design AS (
  SELECT
    m.unit_key,
    m.treated,
    1.0 AS x0,
    m.pre_trips AS x1,
    LN(1.0 + GREATEST(m.pre_minutes, 0.0)) AS x2,
    CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END AS x3,
    CASE WHEN COALESCE(m.age_band, '(missing)') = '35-49' THEN 1.0 ELSE 0.0 END AS x4,
    CASE WHEN COALESCE(m.age_band, '(missing)') = '50+' THEN 1.0 ELSE 0.0 END AS x5
  FROM "sqlmatch".annual_pass_measures AS m
)
SELECT
  d.unit_key,
  d.treated,
  -2.5 * x0 + 0.125 * x1 + 0.0625 * x2 + 0.25 * x3 + -0.25 * x4 + 0.5 * x5 AS score
FROM design AS d;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_scores;

ALTER TABLE "sqlmatch".annual_pass_scores__building
RENAME TO annual_pass_scores;

COMMIT;
