-- sqlmatch study 'annual_pass', step 04: unit_measures (postgres)
-- Per-unit pre-window features and post-window outcomes, one pass over the events (which also counts events of unknown units). Days are cut in UTC: the session's time zone must be UTC (a compiled file sets it where its dialect has the statement), or times with a time zone fall on the session's days.
-- kind: writes a table
-- reads: bike "share".order, sqlmatch.annual_pass_units, bike "share".riders; DROP TABLE riders
-- writes: sqlmatch.annual_pass_measures
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_measures__building;

CREATE TABLE "sqlmatch".annual_pass_measures__building AS
/* Features over the pre window [2025-09-01, 2026-03-01) and outcomes
   over the post window [2026-04-01, 2026-07-01) for every unit in the
   study, from ONE pass over the events: read once, filtered to the span of both windows,
   aggregated per unit with conditional aggregates. Units without events get the fill value.
   The same pass counts the events whose unit is not in "bike ""share"""."riders; DROP TABLE riders" at all (they are
   left out of everything): every row carries the two totals, read back by data_coverage.
   Events with a NULL time (no window can hold them) or a NULL unit key (no unit) are read by the
   same pass, left out of every measure and counted: every row carries those totals too.
*/
WITH known_units AS (
  SELECT DISTINCT
    "select" AS unit_key
  FROM "bike ""share"""."riders; DROP TABLE riders"
), unit_keys AS (
  /* every unit key in "bike ""share"""."riders; DROP TABLE riders", flagged 1 when the unit is in the study */
  SELECT
    k.unit_key,
    CASE WHEN s.unit_key IS NULL THEN 0 ELSE 1 END AS in_study,
    s.treated
  FROM known_units AS k
  LEFT JOIN "sqlmatch".annual_pass_units AS s
    ON s.unit_key = k.unit_key
), event_totals AS (
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
        THEN CAST(e."fare'; --" AS DOUBLE PRECISION)
      END
    ) AS pre_fare,
    SUM(
      CASE
        WHEN e."started at" >= CAST('2026-04-01' AS DATE)
        AND e."started at" < CAST('2026-07-01' AS DATE)
        THEN CAST(e."fare'; --" AS DOUBLE PRECISION)
      END
    ) AS post_fare,
    COUNT(e."started at") AS n_events,
    COUNT(*) AS n_rows,
    MAX(u.treated) AS treated,
    MAX(u.in_study) AS in_study,
    CAST(MIN(e."started at") AS DATE) AS first_event_at,
    CAST(MAX(e."started at") AS DATE) AS last_event_at
  FROM "bike ""share"""."order" AS e
  LEFT JOIN unit_keys AS u
    ON e."select" = u.unit_key
  WHERE
    (
      (
        e."started at" >= CAST('2025-09-01' AS DATE)
        AND e."started at" < CAST('2026-07-01' AS DATE)
      )
      OR e."started at" IS NULL
    )
    AND /* units of the study, and units unknown to "bike ""share"""."riders; DROP TABLE riders" (in_study NULL) or
       without a key (counted, never measured) */ (
      u.in_study = 1 OR u.unit_key IS NULL
    )
  GROUP BY
    e."select"
), unknown_units AS (
  SELECT
    COUNT(*) AS n_units,
    COALESCE(SUM(n_events), 0) AS n_events
  FROM event_totals
  WHERE
    in_study IS NULL AND NOT unit_key IS NULL AND n_events > 0
), unplaced_events AS (
  /* events no unit or no window can hold: without a unit key, or of a study unit without a time */
  SELECT
    COALESCE(SUM(CASE WHEN unit_key IS NULL THEN n_rows ELSE 0 END), 0) AS keyless,
    COALESCE(
      SUM(CASE WHEN NOT unit_key IS NULL AND treated = 1 THEN n_rows - n_events ELSE 0 END),
      0
    ) AS untimed_treated,
    COALESCE(
      SUM(CASE WHEN NOT unit_key IS NULL AND treated = 0 THEN n_rows - n_events ELSE 0 END),
      0
    ) AS untimed_control
  FROM event_totals
), levels_0 AS (
  /* units of the study per level of age_band, for pooling the small ones below */
  SELECT
    u.age_band AS level,
    COUNT(*) AS n_units
  FROM "sqlmatch".annual_pass_units AS u
  GROUP BY
    u.age_band
)
SELECT
  u.unit_key,
  u.treated,
  COALESCE(CAST(t.pre_trips AS DOUBLE PRECISION), 0.0) AS pre_trips,
  COALESCE(CAST(t.pre_fare AS DOUBLE PRECISION), 0.0) AS pre_fare,
  COALESCE(CAST(t.post_fare AS DOUBLE PRECISION), 0.0) AS post_fare,
  x.n_units AS unknown__units,
  x.n_events AS unknown__events,
  p.keyless AS missing__key_events,
  p.untimed_treated AS missing__time_treated,
  p.untimed_control AS missing__time_control,
  t.first_event_at,
  t.last_event_at,
  CASE
    WHEN u.age_band IS NULL
    THEN NULL
    WHEN l0.n_units >= 10
    THEN u.age_band
    ELSE '(other)'
  END AS age_band /* features[2] (age_band): a level held by fewer than 10 units of the study is pooled into
     "(other)", here, before any level leaves the warehouse */
FROM "sqlmatch".annual_pass_units AS u
LEFT JOIN event_totals AS t
  ON t.unit_key = u.unit_key
CROSS JOIN unknown_units AS x
CROSS JOIN unplaced_events AS p
LEFT JOIN levels_0 AS l0
  ON l0.level = u.age_band;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_measures;

ALTER TABLE "sqlmatch".annual_pass_measures__building
RENAME TO annual_pass_measures;

COMMIT;
