-- sqlmatch study 'annual_pass', step 12: nearest_neighbour_matches (postgres)
-- The 1 nearest control(s) of each treated unit within the caliper, with replacement (the controls just below and above each treated unit in score order).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_nearest_neighbour_units, sqlmatch.annual_pass_nearest_neighbour_caliper
-- writes: sqlmatch.annual_pass_nearest_neighbour_matches
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_matches__building;

CREATE TABLE "sqlmatch".annual_pass_nearest_neighbour_matches__building AS
/* Nearest-neighbour matching with replacement, 1:1: for each treated unit, its 1 nearest
   control unit within the caliper on the logit score, in its exact block, by the gap in the logit propensity score,
   and every control as near as the last of them (distances compared at 10 decimal places): the match set
   includes all ties (Abadie & Imbens 2006, J_M(i)). Weights: with slots = 1 (fewer when fewer controls
   lie within the caliper), a control nearer than the last distance taken weighs 1 / slots, and the
   controls at that last distance share the slots left over equally, so each treated unit's weights
   add up to 1 and no tiebreak (key, hash, order) decides which tied control counts.
   Candidates: the 1 group of controls with one score just below and the 1 just above each
   treated unit in its block's score order (nearest_neighbour_units.control_group; no join of all
   pairs). One row per (treated unit, group of tied controls) in the match set, with share = the weight
   of each control of the group.
   A control unit may serve several treated units. */
WITH candidates AS (
  SELECT
    t.unit_key AS treated_key,
    g.age_band,
    g.control_group,
    g.n_controls,
    ABS(t.score_compared - g.score_compared) AS distance
  FROM "sqlmatch".annual_pass_nearest_neighbour_units AS t
  CROSS JOIN (
    SELECT
      0 AS step
    UNION ALL
    SELECT
      1 AS step
  ) AS o
  INNER JOIN (
    SELECT
      u.age_band,
      u.control_group,
      MIN(u.score_compared) AS score_compared,
      COUNT(*) AS n_controls
    FROM "sqlmatch".annual_pass_nearest_neighbour_units AS u
    WHERE
      u.treated = 0
    GROUP BY
      u.age_band,
      u.control_group
  ) AS g
    ON g.control_group = t.control_group + o.step AND g.age_band = t.age_band
  CROSS JOIN "sqlmatch".annual_pass_nearest_neighbour_caliper AS k
  WHERE
    t.treated = 1 AND ABS(t.score_compared - g.score_compared) <= k.width
), levels AS (
  SELECT
    c.treated_key,
    c.distance,
    SUM(c.n_controls) AS n_at
  FROM candidates AS c
  WHERE
    NOT c.distance IS NULL
  GROUP BY
    c.treated_key,
    c.distance
), counted AS (
  SELECT
    l.treated_key,
    l.distance,
    l.n_at,
    SUM(l.n_at) OVER (PARTITION BY l.treated_key ORDER BY l.distance NULLS FIRST) AS n_within, /* distance is never NULL here; NULLS FIRST, the default of BigQuery and Spark, keeps one order on every dialect */
    SUM(l.n_at) OVER (PARTITION BY l.treated_key) AS n_candidates
  FROM levels AS l
), kept AS (
  SELECT
    n.treated_key,
    n.distance,
    n.n_at,
    n.n_within - n.n_at AS n_nearer,
    CASE WHEN n.n_candidates < 1 THEN n.n_candidates ELSE 1 END AS slots
  FROM counted AS n
)
SELECT
  c.treated_key,
  c.age_band,
  c.control_group,
  c.n_controls,
  c.distance,
  k.slots,
  CAST(CASE WHEN k.n_nearer + k.n_at <= k.slots THEN k.n_at ELSE k.slots - k.n_nearer END AS DOUBLE PRECISION) / NULLIF(k.slots * k.n_at, 0) AS share
FROM candidates AS c
INNER JOIN kept AS k
  ON k.treated_key = c.treated_key AND k.distance = c.distance
WHERE
  k.n_nearer < k.slots;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_matches;

ALTER TABLE "sqlmatch".annual_pass_nearest_neighbour_matches__building
RENAME TO annual_pass_nearest_neighbour_matches;

COMMIT;
