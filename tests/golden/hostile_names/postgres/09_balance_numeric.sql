-- sqlmatch study 'annual_pass', step 09: balance_numeric (postgres)
-- Per-group counts, sums and sums of squares of numeric features, before and after matching.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Balance of the numeric features, per group: before matching every unit in the study counts
   once; after matching each matched unit counts with its weight (unmatched units weigh 0).
   Counts, sums and sums of squares only; means, SDs and SMDs are computed from these. */
SELECT
  m.treated,
  COUNT(*) AS n_units,
  COUNT(m.match__weight) AS n_matched,
  COUNT(m.pre_trips) AS pre_trips__n,
  SUM(m.pre_trips) AS pre_trips__sum,
  SUM(m.pre_trips * m.pre_trips) AS pre_trips__sumsq,
  MIN(m.pre_trips) AS pre_trips__min,
  MAX(m.pre_trips) AS pre_trips__max,
  SUM(CASE WHEN NOT m.pre_trips IS NULL THEN m.match__weight END) AS pre_trips__w,
  SUM(CASE WHEN NOT m.pre_trips IS NULL THEN m.match__weight * m.match__weight END) AS pre_trips__w2,
  SUM(m.match__weight * m.pre_trips) AS pre_trips__wsum,
  SUM(m.match__weight * m.pre_trips * m.pre_trips) AS pre_trips__wsumsq,
  COUNT(m.pre_fare) AS pre_fare__n,
  SUM(m.pre_fare) AS pre_fare__sum,
  SUM(m.pre_fare * m.pre_fare) AS pre_fare__sumsq,
  MIN(m.pre_fare) AS pre_fare__min,
  MAX(m.pre_fare) AS pre_fare__max,
  SUM(CASE WHEN NOT m.pre_fare IS NULL THEN m.match__weight END) AS pre_fare__w,
  SUM(CASE WHEN NOT m.pre_fare IS NULL THEN m.match__weight * m.match__weight END) AS pre_fare__w2,
  SUM(m.match__weight * m.pre_fare) AS pre_fare__wsum,
  SUM(m.match__weight * m.pre_fare * m.pre_fare) AS pre_fare__wsumsq
FROM "sqlmatch".annual_pass_weighted_units AS m
GROUP BY
  m.treated
ORDER BY
  m.treated;
