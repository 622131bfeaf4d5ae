-- sqlmatch study 'annual_pass', step 10: nearest_neighbour_units (duckdb)
-- Units with a score: exact block, score bin.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_scores, sqlmatch.annual_pass_nearest_neighbour_caliper
-- writes: sqlmatch.annual_pass_nearest_neighbour_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_units__building;

CREATE TABLE "sqlmatch".annual_pass_nearest_neighbour_units__building AS
/* Nearest-neighbour matching, the units that can be matched: every unit with a propensity score,
   its exact block (age_band; a missing level is a level of its own) and its score
   bin, CAST(FLOOR((score - lowest score) / width) AS INTEGER) with the caliper's width, so a control within the
   caliper of a treated unit is always in the treated unit's bin or an adjacent one.
   unit_seq (Mahalanobis distances only) numbers the units by key; it feeds a multiplicative hash that breaks ties in the
   Mahalanobis distances, so that treated units at the same distance do not all take the same control
   (the one with the lowest key), while the result stays the same on every engine.
   The window keys are never NULL (the WHERE below); NULLS FIRST is spelled out so that every dialect
   prints the same order (sqlglot cannot print a NULLS LAST running sum for BigQuery).
   score_compared: the score at 10 decimal places, in which score distances are taken, so that
   distances equal in exact arithmetic are equal on every engine (ties).
   control_group (matching with replacement on the score): for a control, the index of its score
   (score_compared) among the distinct scores of its block's controls, so controls tied in score share it;
   for a treated unit, the number of distinct control scores at or below its own. The k nearest controls
   of a treated unit and every control tied with the k-th lie in the k groups just below and the k just
   above it (an equality join on the group index).
   How: the controls are grouped by (block, score_compared), one row per distinct control score (a hash
   aggregate); those rows and the treated units, and only those, are put in score order (treated after
   controls at the same score, then the key: MIN(unit_key) for a group, unique either way), and a running
   count of the group rows gives each its index and each treated unit the number of distinct control scores
   at or below its own; each control then takes its group's index by an equality join. So the one sort
   covers the treated units and the distinct control scores, not every unit. The grouped search reads
   nothing else of the score order (no score_position, no controls_through here).
*/
WITH scored AS (
  SELECT
    s.unit_key,
    s.treated,
    COALESCE(s.age_band, '(missing)') AS age_band,
    s.score,
    CAST(s.score AS DECIMAL(24, 10)) AS score_compared,
    CAST(FLOOR((
      s.score - k.score_min
    ) / NULLIF(k.width, 0.0)) AS INT) AS score_bin
  FROM "sqlmatch".annual_pass_scores AS s
  CROSS JOIN "sqlmatch".annual_pass_nearest_neighbour_caliper AS k
  WHERE
    NOT s.score IS NULL AND k.width > 0.0
), marks AS (
  SELECT
    t.unit_key,
    t.treated,
    t.age_band,
    t.score,
    t.score_compared,
    t.score_bin
  FROM scored AS t
  WHERE
    t.treated = 1
  UNION ALL
  SELECT
    MIN(c.unit_key) AS unit_key,
    0 AS treated,
    c.age_band,
    MIN(c.score) AS score,
    c.score_compared,
    MIN(c.score_bin) AS score_bin
  FROM scored AS c
  WHERE
    c.treated = 0
  GROUP BY
    c.age_band,
    c.score_compared
), ranked AS (
  SELECT
    m.unit_key,
    m.treated,
    m.age_band,
    m.score,
    m.score_compared,
    m.score_bin,
    CAST(SUM(CASE WHEN m.treated = 0 THEN 1 ELSE 0 END) OVER (
      PARTITION BY m.age_band
      ORDER BY m.score_compared NULLS FIRST, m.treated NULLS FIRST, m.unit_key NULLS FIRST
      ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW
    ) AS BIGINT) AS control_group
  FROM marks AS m
)
SELECT
  r.unit_key,
  r.treated,
  r.age_band,
  r.score,
  r.score_compared,
  r.score_bin,
  r.control_group
FROM ranked AS r
WHERE
  r.treated = 1
UNION ALL
SELECT
  c.unit_key,
  c.treated,
  c.age_band,
  c.score,
  c.score_compared,
  c.score_bin,
  r.control_group
FROM scored AS c
INNER JOIN ranked AS r
  ON r.treated = 0 AND r.score_compared = c.score_compared AND r.age_band = c.age_band
WHERE
  c.treated = 0;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_units;

ALTER TABLE "sqlmatch".annual_pass_nearest_neighbour_units__building
RENAME TO annual_pass_nearest_neighbour_units;

COMMIT;
