-- sqlmatch study 'annual_pass', step 11: candidate_pairs (postgres)
-- Size of the candidate join (from block counts) and treated units with a control within the caliper.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_nearest_neighbour_units, sqlmatch.annual_pass_nearest_neighbour_caliper
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Nearest-neighbour matching, before the candidate join: how many (treated, control) pairs it
   will compare, from counts per block (exact levels x score bin) only:
   sum over blocks of n_treated(block, bin b) * n_control(block, bins b-1, b, b+1).
   sqlmatch refuses to run the join when this exceeds matching.max_candidate_pairs (50000000).
   Also: how many treated units have a control within the caliper in their exact block, from the
   lowest and highest control score per block (a control in the unit's own bin is always within
   the caliper; in bin b-1 the nearest is the highest, in bin b+1 the lowest), so a caliper that
   leaves nobody to match is reported before any join.
   One row. */
WITH blocks AS (
  SELECT
    u.age_band,
    u.score_bin,
    SUM(u.treated) AS n_treated,
    SUM(1 - u.treated) AS n_control,
    MIN(CASE WHEN u.treated = 0 THEN u.score END) AS control_low,
    MAX(CASE WHEN u.treated = 0 THEN u.score END) AS control_high
  FROM "sqlmatch".annual_pass_nearest_neighbour_units AS u
  GROUP BY
    u.age_band,
    u.score_bin
), pairs AS (
  SELECT
    SUM(CAST(t.n_treated AS BIGINT) * CAST(c.n_control AS BIGINT)) AS n_candidate_pairs
  FROM blocks AS t
  INNER JOIN blocks AS c
    ON c.score_bin BETWEEN t.score_bin - 1 AND t.score_bin + 1
    AND c.age_band = t.age_band
  WHERE
    t.n_treated > 0 AND c.n_control > 0
), treated_reach AS (
  SELECT
    u.unit_key,
    MAX(
      CASE
        WHEN c.score_bin = u.score_bin
        THEN 1
        WHEN c.score_bin = u.score_bin - 1 AND u.score - c.control_high <= k.width
        THEN 1
        WHEN c.score_bin = u.score_bin + 1 AND c.control_low - u.score <= k.width
        THEN 1
        ELSE 0
      END
    ) AS in_reach
  FROM "sqlmatch".annual_pass_nearest_neighbour_units AS u
  INNER JOIN blocks AS c
    ON c.score_bin BETWEEN u.score_bin - 1 AND u.score_bin + 1
    AND c.age_band = u.age_band
  CROSS JOIN "sqlmatch".annual_pass_nearest_neighbour_caliper AS k
  WHERE
    u.treated = 1 AND c.n_control > 0
  GROUP BY
    u.unit_key
), totals AS (
  SELECT
    SUM(b.n_treated) AS n_treated,
    SUM(b.n_control) AS n_control
  FROM blocks AS b
), reach AS (
  SELECT
    SUM(r.in_reach) AS n_treated_in_reach
  FROM treated_reach AS r
)
SELECT
  COALESCE(p.n_candidate_pairs, 0) AS n_candidate_pairs,
  COALESCE(t.n_treated, 0) AS n_treated,
  COALESCE(t.n_control, 0) AS n_control,
  COALESCE(r.n_treated_in_reach, 0) AS n_treated_in_reach,
  k.score_sd,
  k.width
FROM totals AS t
CROSS JOIN pairs AS p
CROSS JOIN reach AS r
CROSS JOIN "sqlmatch".annual_pass_nearest_neighbour_caliper AS k;
