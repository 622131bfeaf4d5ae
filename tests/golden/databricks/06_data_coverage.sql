-- sqlmatch study 'annual_pass', step 06: data_coverage (databricks)
-- First and last event within the windows, and units without events (warn on gaps).
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_measures

/* Do the events cover both windows? The first and last event of the study's units within
   [2025-09-01, 2026-07-01), and how many units have none. One row. */
SELECT
  MIN(first_event_at) AS first_event_at,
  MAX(last_event_at) AS last_event_at,
  COUNT(*) AS n_units,
  SUM(CASE WHEN last_event_at IS NULL THEN 1 ELSE 0 END) AS n_units_without_events
FROM `sqlmatch`.annual_pass_measures;
