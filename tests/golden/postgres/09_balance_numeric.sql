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
  COUNT(m.pre_minutes) AS pre_minutes__n,
  SUM(m.pre_minutes) AS pre_minutes__sum,
  SUM(m.pre_minutes * m.pre_minutes) AS pre_minutes__sumsq,
  MIN(m.pre_minutes) AS pre_minutes__min,
  MAX(m.pre_minutes) AS pre_minutes__max,
  SUM(CASE WHEN NOT m.pre_minutes IS NULL THEN m.match__weight END) AS pre_minutes__w,
  SUM(CASE WHEN NOT m.pre_minutes IS NULL THEN m.match__weight * m.match__weight END) AS pre_minutes__w2,
  SUM(m.match__weight * m.pre_minutes) AS pre_minutes__wsum,
  SUM(m.match__weight * m.pre_minutes * m.pre_minutes) AS pre_minutes__wsumsq,
  COUNT(m.pre_fare_per_trip) AS pre_fare_per_trip__n,
  SUM(m.pre_fare_per_trip) AS pre_fare_per_trip__sum,
  SUM(m.pre_fare_per_trip * m.pre_fare_per_trip) AS pre_fare_per_trip__sumsq,
  MIN(m.pre_fare_per_trip) AS pre_fare_per_trip__min,
  MAX(m.pre_fare_per_trip) AS pre_fare_per_trip__max,
  SUM(CASE WHEN NOT m.pre_fare_per_trip IS NULL THEN m.match__weight END) AS pre_fare_per_trip__w,
  SUM(
    CASE
      WHEN NOT m.pre_fare_per_trip IS NULL
      THEN m.match__weight * m.match__weight
    END
  ) AS pre_fare_per_trip__w2,
  SUM(m.match__weight * m.pre_fare_per_trip) AS pre_fare_per_trip__wsum,
  SUM(m.match__weight * m.pre_fare_per_trip * m.pre_fare_per_trip) AS pre_fare_per_trip__wsumsq,
  COUNT(m.pre_active_days) AS pre_active_days__n,
  SUM(m.pre_active_days) AS pre_active_days__sum,
  SUM(m.pre_active_days * m.pre_active_days) AS pre_active_days__sumsq,
  MIN(m.pre_active_days) AS pre_active_days__min,
  MAX(m.pre_active_days) AS pre_active_days__max,
  SUM(CASE WHEN NOT m.pre_active_days IS NULL THEN m.match__weight END) AS pre_active_days__w,
  SUM(
    CASE WHEN NOT m.pre_active_days IS NULL THEN m.match__weight * m.match__weight END
  ) AS pre_active_days__w2,
  SUM(m.match__weight * m.pre_active_days) AS pre_active_days__wsum,
  SUM(m.match__weight * m.pre_active_days * m.pre_active_days) AS pre_active_days__wsumsq,
  COUNT(m.pre_days_since_last) AS pre_days_since_last__n,
  SUM(m.pre_days_since_last) AS pre_days_since_last__sum,
  SUM(m.pre_days_since_last * m.pre_days_since_last) AS pre_days_since_last__sumsq,
  MIN(m.pre_days_since_last) AS pre_days_since_last__min,
  MAX(m.pre_days_since_last) AS pre_days_since_last__max,
  SUM(CASE WHEN NOT m.pre_days_since_last IS NULL THEN m.match__weight END) AS pre_days_since_last__w,
  SUM(
    CASE
      WHEN NOT m.pre_days_since_last IS NULL
      THEN m.match__weight * m.match__weight
    END
  ) AS pre_days_since_last__w2,
  SUM(m.match__weight * m.pre_days_since_last) AS pre_days_since_last__wsum,
  SUM(m.match__weight * m.pre_days_since_last * m.pre_days_since_last) AS pre_days_since_last__wsumsq
FROM "sqlmatch".annual_pass_weighted_units AS m
GROUP BY
  m.treated
ORDER BY
  m.treated;
