-- sqlmatch study 'annual_pass', step 10: nearest_neighbour_units (spark)
-- Units with a score: exact block, score bin.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_scores, sqlmatch.annual_pass_nearest_neighbour_caliper
-- writes: sqlmatch.annual_pass_nearest_neighbour_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- swap: spark DDL is not written in a transaction here, so between the DROP of the old table and the RENAME the table is absent; a failure there leaves only the __building table: run this file again

SET spark.sql.session.timeZone = UTC;

DROP TABLE IF EXISTS `sqlmatch`.annual_pass_nearest_neighbour_units__building;

CREATE TABLE `sqlmatch`.annual_pass_nearest_neighbour_units__building AS
/* Nearest-neighbour matching, the units that can be matched: every unit with a propensity score,
   its exact block (age_band; a missing level is a level of its own) and its score
   bin, CAST(FLOOR((score - lowest score) / width) AS INTEGER) with the caliper's width, so a control within the
   caliper of a treated unit is always in the treated unit's bin or an adjacent one.
   unit_seq (Mahalanobis distances only) numbers the units by key; it feeds a multiplicative hash that breaks ties in the
   Mahalanobis distances, so that treated units at the same distance do not all take the same control
   (the one with the lowest key), while the result stays the same on every engine.
   score_position: the unit's place in its exact block in score order (ties: unit key), and
   controls_through the number of controls up to and including that place (a running count over the
   same window as score_position, so both share one sort). For a control it is
   the control's index in the block's score order; for a treated unit the number of controls below
   it, so its neighbouring controls in score order have the indices just below and just above it
   (the score distance finds them by an equality join on that index, never a join of all pairs).
   The window keys are never NULL (the WHERE below); NULLS FIRST is spelled out so that every dialect
   prints the same order (sqlglot cannot print a NULLS LAST running sum for BigQuery).
   score_compared: the score at 10 decimal places, in which score distances are taken, so that
   distances equal in exact arithmetic are equal on every engine (ties).
   control_group (matching with replacement on the score): for a control, the index of its score
   (score_compared) among the distinct scores of its block's controls, so controls tied in score share it;
   for a treated unit, the number of distinct control scores at or below its own. The k nearest controls
   of a treated unit and every control tied with the k-th lie in the k groups just below and the k just
   above it (an equality join on the group index, as for controls_through).
*/
WITH placed AS (
  SELECT
    s.unit_key,
    s.treated,
    COALESCE(s.age_band, '(missing)') AS age_band,
    s.score,
    CAST(s.score AS DECIMAL(24, 10)) AS score_compared,
    CASE
      WHEN s.treated = 0
      AND ROW_NUMBER() OVER (
        PARTITION BY COALESCE(s.age_band, '(missing)'), s.treated, CAST(s.score AS DECIMAL(24, 10))
        ORDER BY s.unit_key NULLS LAST
      ) = 1
      THEN 1
      ELSE 0
    END AS opens_group,
    CAST(FLOOR((
      s.score - k.score_min
    ) / NULLIF(k.width, 0.0)) AS INT) AS score_bin,
    ROW_NUMBER() OVER (PARTITION BY COALESCE(s.age_band, '(missing)') ORDER BY s.score, s.unit_key) AS score_position,
    SUM(CASE WHEN s.treated = 0 THEN 1 ELSE 0 END) OVER (
      PARTITION BY COALESCE(s.age_band, '(missing)')
      ORDER BY s.score, s.unit_key
      ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW
    ) AS controls_through
  FROM `sqlmatch`.annual_pass_scores AS s
  CROSS JOIN `sqlmatch`.annual_pass_nearest_neighbour_caliper AS k
  WHERE
    NOT s.score IS NULL AND k.width > 0.0
)
SELECT
  p.*,
  SUM(p.opens_group) OVER (PARTITION BY p.age_band ORDER BY p.score_compared, p.treated, p.unit_key) AS control_group
FROM placed AS p;

DROP TABLE IF EXISTS `sqlmatch`.annual_pass_nearest_neighbour_units;

ALTER TABLE `sqlmatch`.annual_pass_nearest_neighbour_units__building
RENAME TO `sqlmatch`.annual_pass_nearest_neighbour_units;
