-- sqlmatch study 'annual_pass', step 04: unit_measures (snowflake)
-- Per-unit pre-window features and post-window outcomes, one pass over the events (which also counts events of unknown units).
-- kind: writes a table
-- reads: bike "share".order, sqlmatch.annual_pass_units
-- writes: sqlmatch.annual_pass_measures

DROP TABLE IF EXISTS "sqlmatch".annual_pass_measures__building;

CREATE TABLE "sqlmatch".annual_pass_measures__building AS
/* Features over the pre window [2025-09-01, 2026-03-01) and outcomes
   over the post window [2026-04-01, 2026-07-01) for every unit in the
   study, from ONE pass over the events: read once, filtered to the span of both windows,
   aggregated per unit with conditional aggregates. Units without events get the fill value.   Every unit key in the events is aggregated, and the keys not in bike "share".riders; DROP TABLE riders at all
   are counted from those totals (their events are left out of everything): every row carries the
   two counts, read back by data_coverage. With events.check_unknown_units = false the events are
   joined to the study's units before aggregating instead (faster when the study keeps few units). */
WITH event_totals AS (
  SELECT
    e."select" AS unit_key,
    COUNT(
      CASE
        WHEN e."started at" >= CAST('2025-09-01' AS DATE)
        AND e."started at" < CAST('2026-03-01' AS DATE)
        THEN 1
      END
    ) AS pre_trips,
    SUM(
      CASE
        WHEN e."started at" >= CAST('2025-09-01' AS DATE)
        AND e."started at" < CAST('2026-03-01' AS DATE)
        THEN CAST(e."fare'; --" AS DOUBLE)
      END
    ) AS pre_fare,
    SUM(
      CASE
        WHEN e."started at" >= CAST('2026-04-01' AS DATE)
        AND e."started at" < CAST('2026-07-01' AS DATE)
        THEN CAST(e."fare'; --" AS DOUBLE)
      END
    ) AS post_fare,
    COUNT(*) AS n_events,
    CAST(MIN(e."started at") AS DATE) AS first_event_at,
    CAST(MAX(e."started at") AS DATE) AS last_event_at
  FROM "bike ""share"""."order" AS e
  WHERE
    e."started at" >= CAST('2025-09-01' AS DATE)
    AND e."started at" < CAST('2026-07-01' AS DATE)
  GROUP BY
    e."select"
), unknown_units AS (
  /* per-unit totals whose key is nowhere in bike "share".riders; DROP TABLE riders */
  SELECT
    COUNT(*) AS n_units,
    COALESCE(SUM(t.n_events), 0) AS n_events
  FROM event_totals AS t
  WHERE
    NOT EXISTS(
      SELECT
        1
      FROM "bike ""share"""."riders; DROP TABLE riders" AS k
      WHERE
        k."select" = t.unit_key
    )
)
SELECT
  u.unit_key,
  u.treated,
  COALESCE(CAST(t.pre_trips AS DOUBLE), 0.0) AS pre_trips,
  COALESCE(CAST(t.pre_fare AS DOUBLE), 0.0) AS pre_fare,
  COALESCE(CAST(t.post_fare AS DOUBLE), 0.0) AS post_fare,
  x.n_units AS unknown__units,
  x.n_events AS unknown__events,
  t.first_event_at,
  t.last_event_at,
  u.age_band
FROM "sqlmatch".annual_pass_units AS u
LEFT JOIN event_totals AS t
  ON t.unit_key = u.unit_key
CROSS JOIN unknown_units AS x;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_measures;

ALTER TABLE "sqlmatch".annual_pass_measures__building
RENAME TO "sqlmatch".annual_pass_measures;
