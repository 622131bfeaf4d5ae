-- sqlmatch study 'annual_pass', step 09: nearest_neighbour_caliper (postgres)
-- Caliper: 0.2 pooled SDs of the logit score (also the width of the score bins).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_scores
-- writes: sqlmatch.annual_pass_nearest_neighbour_caliper
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_caliper__building;

CREATE TABLE "sqlmatch".annual_pass_nearest_neighbour_caliper__building AS
/* Nearest-neighbour matching, the caliper: 0.2 standard deviations of the logit score,
   the SD pooled over the two groups as sqrt((s2_T + s2_C) / 2) (caliper and pooled SD: Austin 2011,
   Pharmaceutical Statistics 10:150, recalled; 0.2 is common practice). Whatever the distance,
   a treated and a control unit further apart than this on the logit score are never matched.
   The width is also the width of the score bins that block the candidate join, counted from the
   lowest score. One row. */
WITH moments AS (
  SELECT
    COUNT(CASE WHEN s.treated = 1 THEN s.score END) AS n_treated,
    COUNT(CASE WHEN s.treated = 0 THEN s.score END) AS n_control,
    VAR_SAMP(CASE WHEN s.treated = 1 THEN s.score END) AS var_treated,
    VAR_SAMP(CASE WHEN s.treated = 0 THEN s.score END) AS var_control,
    MIN(s.score) AS score_min
  FROM "sqlmatch".annual_pass_scores AS s
), pooled AS (
  SELECT
    m.n_treated,
    m.n_control,
    m.score_min,
    SQRT(
      CAST((
        COALESCE(m.var_treated, m.var_control) + COALESCE(m.var_control, m.var_treated)
      ) AS DOUBLE PRECISION) / 2.0
    ) AS score_sd
  FROM moments AS m
)
SELECT
  p.n_treated,
  p.n_control,
  p.score_sd,
  p.score_min,
  0.2 AS caliper_sd,
  0.2 * p.score_sd AS width
FROM pooled AS p;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_caliper;

ALTER TABLE "sqlmatch".annual_pass_nearest_neighbour_caliper__building
RENAME TO annual_pass_nearest_neighbour_caliper;

COMMIT;
