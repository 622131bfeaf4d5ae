-- sqlmatch study 'annual_pass', step 12: nearest_neighbour_matches (duckdb)
-- The 1 nearest control(s) of each treated unit within the caliper, with replacement (the controls just below and above each treated unit in score order).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_nearest_neighbour_units, sqlmatch.annual_pass_nearest_neighbour_caliper
-- writes: sqlmatch.annual_pass_nearest_neighbour_matches
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_matches__building;

CREATE TABLE "sqlmatch".annual_pass_nearest_neighbour_matches__building AS
/* Nearest-neighbour matching with replacement, 1:1: for each treated unit, its 1 nearest
   control unit within the caliper on the logit score, in its exact block, by the gap in the logit propensity score.
   Candidates: the 1 control just below and the 1 just above each treated unit in
   its block's score order (the nearest 1 are always among them; no join of all pairs).
   Ties in distance (compared at 10 decimal places) go to the control nearer in score order,
   then to the lower control key.
   A control unit may serve several treated units. One row per (treated unit, control unit) match. */
WITH candidates AS (
  SELECT
    t.unit_key AS treated_key,
    c.unit_key AS control_key,
    ABS(t.score - c.score) AS distance,
    ABS(t.score_position - c.score_position) AS tiebreak,
    CASE WHEN o.step <= 0 THEN -1 ELSE 1 END AS side,
    CASE WHEN o.step = 0 OR o.step = 1 THEN 1 ELSE 0 END AS at_edge
  FROM "sqlmatch".annual_pass_nearest_neighbour_units AS t
  CROSS JOIN (
    SELECT
      0 AS step
    UNION ALL
    SELECT
      1 AS step
  ) AS o
  INNER JOIN "sqlmatch".annual_pass_nearest_neighbour_units AS c
    ON c.treated = 0
    AND c.controls_through = t.controls_through + o.step
    AND c.age_band = t.age_band
  CROSS JOIN "sqlmatch".annual_pass_nearest_neighbour_caliper AS k
  WHERE
    t.treated = 1 AND ABS(t.score - c.score) <= k.width
), ranked AS (
  SELECT
    c.treated_key,
    c.control_key,
    c.distance,
    ROW_NUMBER() OVER (
      PARTITION BY c.treated_key
      ORDER BY CAST(c.distance AS DECIMAL(38, 10)), c.tiebreak, c.control_key
    ) AS match_rank
  FROM candidates AS c
)
SELECT
  r.treated_key,
  r.control_key,
  r.distance,
  r.match_rank
FROM ranked AS r
WHERE
  r.match_rank <= 1;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_matches;

ALTER TABLE "sqlmatch".annual_pass_nearest_neighbour_matches__building
RENAME TO annual_pass_nearest_neighbour_matches;

COMMIT;
