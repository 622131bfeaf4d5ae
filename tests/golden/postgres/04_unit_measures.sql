-- sqlmatch study 'annual_pass', step 04: unit_measures (postgres)
-- Per-unit pre-window features and post-window outcomes, one pass over the events (which also counts events of unknown units). Days are cut in UTC: the session's time zone must be UTC (a compiled file sets it where its dialect has the statement), or times with a time zone fall on the session's days.
-- kind: writes a table
-- reads: trips, sqlmatch.annual_pass_units, riders
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
   The same pass counts the events whose unit is not in "riders" at all (they are
   left out of everything): every row carries the two totals, read back by data_coverage.
   Events with a NULL time (no window can hold them) or a NULL unit key (no unit) are read by the
   same pass, left out of every measure and counted: every row carries those totals too.
*/
WITH known_units AS (
  SELECT DISTINCT
    "rider_id" AS unit_key
  FROM "riders"
), unit_keys AS (
  /* every unit key in "riders", flagged 1 when the unit is in the study */
  SELECT
    k.unit_key,
    CASE WHEN s.unit_key IS NULL THEN 0 ELSE 1 END AS in_study,
    s.treated
  FROM known_units AS k
  LEFT JOIN "sqlmatch".annual_pass_units AS s
    ON s.unit_key = k.unit_key
), event_totals AS (
  SELECT
    e."rider_id" AS unit_key,
    COUNT(
      CASE
        WHEN e."started_at" >= CAST('2025-09-01' AS DATE)
        AND e."started_at" < CAST('2026-03-01' AS DATE)
        THEN 1
      END
    ) AS pre_trips,
    SUM(
      CASE
        WHEN e."started_at" >= CAST('2025-09-01' AS DATE)
        AND e."started_at" < CAST('2026-03-01' AS DATE)
        THEN CAST(e."minutes" AS DOUBLE PRECISION)
      END
    ) AS pre_minutes,
    AVG(
      CASE
        WHEN e."started_at" >= CAST('2025-09-01' AS DATE)
        AND e."started_at" < CAST('2026-03-01' AS DATE)
        THEN CAST(e."fare" AS DOUBLE PRECISION)
      END
    ) AS pre_fare_per_trip,
    COUNT(
      DISTINCT CASE
        WHEN e."started_at" >= CAST('2025-09-01' AS DATE)
        AND e."started_at" < CAST('2026-03-01' AS DATE)
        THEN CAST(e."started_at" AS DATE)
      END
    ) AS pre_active_days,
    (
      CAST('2026-03-01' AS DATE) - CAST(MAX(
        CASE
          WHEN e."started_at" >= CAST('2025-09-01' AS DATE)
          AND e."started_at" < CAST('2026-03-01' AS DATE)
          THEN e."started_at"
        END
      ) AS DATE)
    ) AS pre_days_since_last,
    COUNT(
      CASE
        WHEN e."started_at" >= CAST('2026-04-01' AS DATE)
        AND e."started_at" < CAST('2026-07-01' AS DATE)
        THEN 1
      END
    ) AS post_trips,
    SUM(
      CASE
        WHEN e."started_at" >= CAST('2026-04-01' AS DATE)
        AND e."started_at" < CAST('2026-07-01' AS DATE)
        THEN CAST(e."minutes" AS DOUBLE PRECISION)
      END
    ) AS post_minutes,
    SUM(
      CASE
        WHEN e."started_at" >= CAST('2026-04-01' AS DATE)
        AND e."started_at" < CAST('2026-07-01' AS DATE)
        AND NOT e."fare" IS NULL
        THEN CAST(e."fare" AS DOUBLE PRECISION)
      END
    ) AS fare_per_trip__num,
    COUNT(
      CASE
        WHEN e."started_at" >= CAST('2026-04-01' AS DATE)
        AND e."started_at" < CAST('2026-07-01' AS DATE)
        AND NOT e."fare" IS NULL
        THEN 1
      END
    ) AS fare_per_trip__den,
    COUNT(
      CASE
        WHEN e."started_at" >= CAST('2026-04-01' AS DATE)
        AND e."started_at" < CAST('2026-07-01' AS DATE)
        AND (
          e."fare" IS NULL
        )
        THEN 1
      END
    ) AS fare_per_trip__incomplete,
    MAX(
      CASE
        WHEN e."started_at" >= CAST('2026-06-01' AS DATE)
        AND e."started_at" < CAST('2026-07-01' AS DATE)
        THEN 1
        ELSE 0
      END
    ) AS active_last_month,
    COUNT(e."started_at") AS n_events,
    COUNT(*) AS n_rows,
    MAX(u.treated) AS treated,
    MAX(u.in_study) AS in_study,
    CAST(MIN(e."started_at") AS DATE) AS first_event_at,
    CAST(MAX(e."started_at") AS DATE) AS last_event_at
  FROM "trips" AS e
  LEFT JOIN unit_keys AS u
    ON e."rider_id" = u.unit_key
  WHERE
    (
      (
        e."started_at" >= CAST('2025-09-01' AS DATE)
        AND e."started_at" < CAST('2026-07-01' AS DATE)
      )
      OR e."started_at" IS NULL
    )
    AND /* units of the study, and units unknown to "riders" (in_study NULL) or
       without a key (counted, never measured) */ (
      u.in_study = 1 OR u.unit_key IS NULL
    )
  GROUP BY
    e."rider_id"
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
), levels_1 AS (
  /* units of the study per level of home_district, for pooling the small ones below */
  SELECT
    u.home_district AS level,
    COUNT(*) AS n_units
  FROM "sqlmatch".annual_pass_units AS u
  GROUP BY
    u.home_district
)
SELECT
  u.unit_key,
  u.treated,
  COALESCE(CAST(t.pre_trips AS DOUBLE PRECISION), 0.0) AS pre_trips,
  COALESCE(CAST(t.pre_minutes AS DOUBLE PRECISION), 0.0) AS pre_minutes,
  COALESCE(CAST(t.pre_fare_per_trip AS DOUBLE PRECISION), 0.0) AS pre_fare_per_trip,
  COALESCE(CAST(t.pre_active_days AS DOUBLE PRECISION), 0.0) AS pre_active_days,
  COALESCE(CAST(t.pre_days_since_last AS DOUBLE PRECISION), 181.0) AS pre_days_since_last,
  COALESCE(CAST(t.post_trips AS DOUBLE PRECISION), 0.0) AS post_trips,
  COALESCE(CAST(t.post_minutes AS DOUBLE PRECISION), 0.0) AS post_minutes,
  COALESCE(CAST(t.fare_per_trip__num AS DOUBLE PRECISION), 0.0) AS fare_per_trip__num,
  COALESCE(CAST(t.fare_per_trip__den AS DOUBLE PRECISION), 0.0) AS fare_per_trip__den,
  COALESCE(CAST(t.fare_per_trip__incomplete AS DOUBLE PRECISION), 0.0) AS fare_per_trip__incomplete,
  COALESCE(CAST(t.active_last_month AS DOUBLE PRECISION), 0.0) AS active_last_month,
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
  END AS age_band, /* features[5] (age_band): a level held by fewer than 10 units of the study is pooled into
     "(other)", here, before any level leaves the warehouse */
  CASE
    WHEN u.home_district IS NULL
    THEN NULL
    WHEN l1.n_units >= 10
    THEN u.home_district
    ELSE '(other)'
  END AS home_district /* features[6] (home_district): a level held by fewer than 10 units of the study is pooled into
     "(other)", here, before any level leaves the warehouse */
FROM "sqlmatch".annual_pass_units AS u
LEFT JOIN event_totals AS t
  ON t.unit_key = u.unit_key
CROSS JOIN unknown_units AS x
CROSS JOIN unplaced_events AS p
LEFT JOIN levels_0 AS l0
  ON l0.level = u.age_band
LEFT JOIN levels_1 AS l1
  ON l1.level = u.home_district;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_measures;

ALTER TABLE "sqlmatch".annual_pass_measures__building
RENAME TO annual_pass_measures;

COMMIT;
