-- sqlmatch study 'annual_pass', step 13: match_weights (postgres)
-- Matching weights for the effect on the treated (matched units only; tied controls share).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_nearest_neighbour_matches, sqlmatch.annual_pass_nearest_neighbour_units
-- writes: sqlmatch.annual_pass_match_weights
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_match_weights__building;

CREATE TABLE "sqlmatch".annual_pass_match_weights__building AS
/* Nearest-neighbour matching, weights for the effect on the treated (matched units only): a
   treated unit weighs 1; a control unit weighs the sum, over the treated units it serves, of its
   share of that treated unit's match (1 / slots, or its part of the slots left over when it is tied
   with others at the last distance taken), so control weights add up to the number of matched
   treated units (the K_M(i) / M of Abadie & Imbens 2006, with ties). Stratum: the treated unit's number of
   slots (1 to 1: fewer when fewer controls lie within the caliper). One row per unit and
   stratum: a control serving treated units of two strata has a row in each; within a stratum
   the rows' weights may differ (tied controls), so the outcome sums per stratum are weighted. */
WITH per_treated AS (
  SELECT
    m.treated_key,
    MAX(m.slots) AS stratum
  FROM "sqlmatch".annual_pass_nearest_neighbour_matches AS m
  GROUP BY
    m.treated_key
)
SELECT
  p.treated_key AS unit_key,
  1 AS treated,
  p.stratum,
  CAST(1.0 AS DOUBLE PRECISION) AS weight
FROM per_treated AS p
UNION ALL
SELECT
  u.unit_key,
  0 AS treated,
  g.stratum,
  g.weight
FROM (
  SELECT
    m.age_band,
    m.control_group,
    m.slots AS stratum,
    SUM(m.share) AS weight
  FROM "sqlmatch".annual_pass_nearest_neighbour_matches AS m
  GROUP BY
    m.age_band,
    m.control_group,
    m.slots
) AS g
INNER JOIN "sqlmatch".annual_pass_nearest_neighbour_units AS u
  ON u.treated = 0 AND u.control_group = g.control_group AND u.age_band = g.age_band;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_match_weights;

ALTER TABLE "sqlmatch".annual_pass_match_weights__building
RENAME TO annual_pass_match_weights;

COMMIT;
