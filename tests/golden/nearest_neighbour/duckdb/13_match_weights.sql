-- sqlmatch study 'annual_pass', step 13: match_weights (duckdb)
-- Matching weights for the effect on the treated (matched units only).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_nearest_neighbour_matches
-- writes: sqlmatch.annual_pass_match_weights
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

DROP TABLE IF EXISTS "sqlmatch".annual_pass_match_weights__building;

CREATE TABLE "sqlmatch".annual_pass_match_weights__building AS
/* Nearest-neighbour matching, weights for the effect on the treated (matched units only): a
   treated unit weighs 1; a control unit weighs the sum, over the treated units it serves, of
   1 / (number of controls matched to that treated unit), so control weights add up to the number
   of matched treated units. Stratum: the number of controls matched to the treated unit (1 to 1),
   so within a stratum every (treated unit, control) row carries the same weight. A control serving
   several treated units has one row per treated unit it serves, weighing 1 / (number of controls
   of that treated unit) there: one row per match makes the stratified estimator equal the
   matching estimator. */
WITH per_treated AS (
  SELECT
    m.treated_key,
    COUNT(*) AS n_matches,
    COUNT(*) AS stratum
  FROM "sqlmatch".annual_pass_nearest_neighbour_matches AS m
  GROUP BY
    m.treated_key
)
SELECT
  p.treated_key AS unit_key,
  1 AS treated,
  p.stratum,
  CAST(1.0 AS DOUBLE) AS weight
FROM per_treated AS p
UNION ALL
SELECT
  m.control_key AS unit_key,
  0 AS treated,
  p.stratum,
  CAST(1.0 AS DOUBLE) / NULLIF(p.n_matches, 0) AS weight
FROM "sqlmatch".annual_pass_nearest_neighbour_matches AS m
INNER JOIN per_treated AS p
  ON p.treated_key = m.treated_key;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_match_weights;

ALTER TABLE "sqlmatch".annual_pass_match_weights__building
RENAME TO annual_pass_match_weights;

COMMIT;
