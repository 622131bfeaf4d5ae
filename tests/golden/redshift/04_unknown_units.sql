-- sqlmatch study 'annual_pass', step 04: unknown_units (redshift)
-- Events in the windows whose unit is not in the units table (counted and reported; they are left out).
-- kind: returns aggregates to sqlmatch
-- reads: trips, riders

/* Events inside the windows' span whose unit key is not in riders at all: nobody
   they can be attributed to, so every feature and outcome leaves them out. Counted so the report
   can say how many (a wrong key column shows up as a large share). Reads only the key and time
   columns of the events; turn it off with events.check_unknown_units = false. One row. */
SELECT
  COUNT(*) AS n_events_unknown,
  COUNT(DISTINCT e."rider_id") AS n_units_unknown
FROM "trips" AS e
WHERE
  e."started_at" >= CAST('2025-09-01' AS DATE)
  AND e."started_at" < CAST('2026-07-01' AS DATE)
  AND NOT EXISTS(
    SELECT
      1
    FROM "riders" AS u
    WHERE
      u."rider_id" = e."rider_id"
  );
