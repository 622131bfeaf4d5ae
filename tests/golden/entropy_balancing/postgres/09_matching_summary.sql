-- sqlmatch study 'annual_pass', step 09: matching_summary (postgres)
-- Units weighted per group, each group's weights' sum, sum of squares and range, and the weighted means the balance reached.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Entropy balancing, what was weighted (one row): units per group, each group's weights' sum,
   sum of squares and range (Kish's effective number of units, (sum w)^2 / sum w^2, Kish 1965,
   Survey Sampling; the largest weight's share), and per moment function the enrolled units' mean
   and the non-enrolled units' weighted mean, computed from the stored weights: the balance
   reached. Moments: c0 = pre_trips; c1 = pre_minutes; c2 = age_band = '25-34'; c3 = log(1 + pre_trips); c4 = (age_band = '25-34') * (log(1 + pre_trips)); c5 = (pre_trips - 7.25)^2. */
WITH design AS (
  SELECT
    m.treated,
    m.match__weight AS w,
    CAST(m.pre_trips AS DOUBLE PRECISION) AS c0,
    CAST(m.pre_minutes AS DOUBLE PRECISION) AS c1,
    CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END AS c2,
    CAST(LN(1.0 + GREATEST(m.pre_trips, 0.0)) AS DOUBLE PRECISION) AS c3,
    CAST((
      CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END
    ) * (
      LN(1.0 + GREATEST(m.pre_trips, 0.0))
    ) AS DOUBLE PRECISION) AS c4,
    (
      CAST(m.pre_trips AS DOUBLE PRECISION) - 7.25
    ) * (
      CAST(m.pre_trips AS DOUBLE PRECISION) - 7.25
    ) AS c5
  FROM "sqlmatch".annual_pass_weighted_units AS m
)
SELECT
  SUM(CASE WHEN treated = 1 AND NOT w IS NULL THEN 1 ELSE 0 END) AS n_treated,
  SUM(CASE WHEN treated = 1 AND NOT w IS NULL THEN 1 ELSE 0 END) AS n_treated_matched,
  SUM(CASE WHEN treated = 0 AND NOT w IS NULL THEN 1 ELSE 0 END) AS n_control,
  SUM(CASE WHEN treated = 0 AND NOT w IS NULL THEN 1 ELSE 0 END) AS n_control_matched,
  MAX(CASE WHEN NOT w IS NULL THEN 1 ELSE 0 END) AS n_strata,
  0 AS n_cells_dropped,
  SUM(CASE WHEN treated = 1 THEN w END) AS treated_weight_sum,
  SUM(CASE WHEN treated = 1 THEN w * w END) AS treated_weight_sumsq,
  MIN(CASE WHEN treated = 1 THEN w END) AS treated_weight_min,
  MAX(CASE WHEN treated = 1 THEN w END) AS treated_weight_max,
  SUM(CASE WHEN treated = 0 THEN w END) AS control_weight_sum,
  SUM(CASE WHEN treated = 0 THEN w * w END) AS control_weight_sumsq,
  MIN(CASE WHEN treated = 0 THEN w END) AS control_weight_min,
  MAX(CASE WHEN treated = 0 THEN w END) AS control_weight_max,
  CAST(SUM(CASE WHEN treated = 1 THEN c0 END) AS DOUBLE PRECISION) / SUM(CASE WHEN treated = 1 THEN 1.0 END) AS eb_target_0,
  CAST(SUM(CASE WHEN treated = 0 THEN w * c0 END) AS DOUBLE PRECISION) / NULLIF(SUM(CASE WHEN treated = 0 THEN w END), 0) AS eb_reached_0,
  CAST(SUM(CASE WHEN treated = 1 THEN c1 END) AS DOUBLE PRECISION) / SUM(CASE WHEN treated = 1 THEN 1.0 END) AS eb_target_1,
  CAST(SUM(CASE WHEN treated = 0 THEN w * c1 END) AS DOUBLE PRECISION) / NULLIF(SUM(CASE WHEN treated = 0 THEN w END), 0) AS eb_reached_1,
  CAST(SUM(CASE WHEN treated = 1 THEN c2 END) AS DOUBLE PRECISION) / SUM(CASE WHEN treated = 1 THEN 1.0 END) AS eb_target_2,
  CAST(SUM(CASE WHEN treated = 0 THEN w * c2 END) AS DOUBLE PRECISION) / NULLIF(SUM(CASE WHEN treated = 0 THEN w END), 0) AS eb_reached_2,
  CAST(SUM(CASE WHEN treated = 1 THEN c3 END) AS DOUBLE PRECISION) / SUM(CASE WHEN treated = 1 THEN 1.0 END) AS eb_target_3,
  CAST(SUM(CASE WHEN treated = 0 THEN w * c3 END) AS DOUBLE PRECISION) / NULLIF(SUM(CASE WHEN treated = 0 THEN w END), 0) AS eb_reached_3,
  CAST(SUM(CASE WHEN treated = 1 THEN c4 END) AS DOUBLE PRECISION) / SUM(CASE WHEN treated = 1 THEN 1.0 END) AS eb_target_4,
  CAST(SUM(CASE WHEN treated = 0 THEN w * c4 END) AS DOUBLE PRECISION) / NULLIF(SUM(CASE WHEN treated = 0 THEN w END), 0) AS eb_reached_4,
  CAST(SUM(CASE WHEN treated = 1 THEN c5 END) AS DOUBLE PRECISION) / SUM(CASE WHEN treated = 1 THEN 1.0 END) AS eb_target_5,
  CAST(SUM(CASE WHEN treated = 0 THEN w * c5 END) AS DOUBLE PRECISION) / NULLIF(SUM(CASE WHEN treated = 0 THEN w END), 0) AS eb_reached_5
FROM design;
