-- sqlmatch study 'annual_pass', step 14: outcome_unmatched (postgres)
-- Outcome sums per group before matching (the naive comparison).
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_measures
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Outcomes per group, before matching (one stratum: every unit in the study):
   counts, sums, sums of squares (and, for ratio outcomes, the cross-product) from which the
   effect and its variance are computed. Rows grow with the number of strata, never with the
   number of units. */
SELECT
  0 AS stratum,
  m.treated,
  COUNT(*) AS n_units,
  CAST(COUNT(*) AS DOUBLE PRECISION) AS sum_w,
  SUM(m.post_trips) AS post_trips__sum,
  SUM(m.post_trips * m.post_trips) AS post_trips__sumsq,
  SUM(m.post_minutes) AS post_minutes__sum,
  SUM(m.post_minutes * m.post_minutes) AS post_minutes__sumsq,
  SUM(m.fare_per_trip__num) AS fare_per_trip__sum_y,
  SUM(m.fare_per_trip__den) AS fare_per_trip__sum_x,
  SUM(m.fare_per_trip__num * m.fare_per_trip__num) AS fare_per_trip__sumsq_y,
  SUM(m.fare_per_trip__den * m.fare_per_trip__den) AS fare_per_trip__sumsq_x,
  SUM(m.fare_per_trip__num * m.fare_per_trip__den) AS fare_per_trip__sum_xy,
  SUM(m.active_last_month) AS active_last_month__sum,
  SUM(m.active_last_month * m.active_last_month) AS active_last_month__sumsq
FROM "sqlmatch".annual_pass_measures AS m
GROUP BY
  m.treated
ORDER BY
  m.treated;
