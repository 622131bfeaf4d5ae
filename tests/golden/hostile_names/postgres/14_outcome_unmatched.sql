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
  SUM(m.post_fare) AS post_fare__sum,
  SUM(m.post_fare * m.post_fare) AS post_fare__sumsq
FROM "sqlmatch".annual_pass_measures AS m
GROUP BY
  m.treated
ORDER BY
  m.treated;
