-- sqlmatch study 'annual_pass', step 05: data_coverage (postgres)
-- First and last event within the windows, units without events (warn on gaps), events of unknown units, sums of the measures (refuse NaN).
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_measures
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Do the events cover both windows? The first and last event of the study's units within
   [2025-09-01, 2026-07-01), and how many units have none. One row.
   Also the events of units not in the units table, counted by unit_measures (the same on every row).
   And the events unit_measures left out for a NULL unit key or a NULL time (the same on every row).
   Sums of the measures built from numbers (a NaN or infinity anywhere makes its sum one, and
   sqlmatch refuses the run naming the feature or outcome), and of the events each ratio outcome
   left out for lacking a part.
*/
SELECT
  MIN(first_event_at) AS first_event_at,
  MAX(last_event_at) AS last_event_at,
  COUNT(*) AS n_units,
  SUM(CASE WHEN last_event_at IS NULL THEN 1 ELSE 0 END) AS n_units_without_events,
  MAX(missing__key_events) AS n_events_without_key,
  MAX(missing__time_treated) AS n_events_without_time_treated,
  MAX(missing__time_control) AS n_events_without_time_control,
  SUM(m.pre_minutes) AS pre_minutes__total,
  SUM(m.pre_fare_per_trip) AS pre_fare_per_trip__total,
  SUM(m.post_minutes) AS post_minutes__total,
  SUM(m.fare_per_trip__num) AS fare_per_trip__num__total,
  SUM(m.fare_per_trip__incomplete) AS fare_per_trip__incomplete__total,
  MAX(unknown__units) AS n_units_unknown,
  MAX(unknown__events) AS n_events_unknown
FROM "sqlmatch".annual_pass_measures AS m;
