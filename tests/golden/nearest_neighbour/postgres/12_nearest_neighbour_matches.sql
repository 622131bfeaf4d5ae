-- sqlmatch study 'annual_pass', step 12: nearest_neighbour_matches (postgres)
-- The 1 nearest control(s) of each treated unit within the caliper, with replacement.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_nearest_neighbour_units, sqlmatch.annual_pass_nearest_neighbour_caliper
-- writes: sqlmatch.annual_pass_nearest_neighbour_matches

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_matches__building;

CREATE TABLE "sqlmatch".annual_pass_nearest_neighbour_matches__building AS
/* Nearest-neighbour matching with replacement, 1:1: for each treated unit, its 1 nearest
   control unit among the candidates (same exact block, adjacent score bins, within the
   caliper on the logit score), by the gap in the logit propensity score.
   Ties in distance (compared at 10 decimal places) go to the lower control key. A control unit
   may serve several treated units.
   One row per (treated unit, control unit) match. */
WITH candidates AS (
  SELECT
    t.unit_key AS treated_key,
    c.unit_key AS control_key,
    ABS(t.score - c.score) AS distance,
    (
      t.unit_seq * 2654435761 + c.unit_seq * 40503
    ) % 4294967296 AS tiebreak
  FROM "sqlmatch".annual_pass_nearest_neighbour_units AS t
  INNER JOIN "sqlmatch".annual_pass_nearest_neighbour_units AS c
    ON c.treated = 0
    AND c.age_band = t.age_band
    AND c.score_bin BETWEEN t.score_bin - 1 AND t.score_bin + 1
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

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_matches;

ALTER TABLE "sqlmatch".annual_pass_nearest_neighbour_matches__building
RENAME TO annual_pass_nearest_neighbour_matches;
