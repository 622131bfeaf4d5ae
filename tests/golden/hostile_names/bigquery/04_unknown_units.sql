-- sqlmatch study 'annual_pass', step 04: unknown_units (bigquery)
-- Events in the windows whose unit is not in the units table (counted and reported; they are left out).
-- kind: returns aggregates to sqlmatch
-- reads: bike "share".order, bike "share".riders; DROP TABLE riders

/* Events inside the windows' span whose unit key is not in bike "share".riders; DROP TABLE riders at all: nobody
   they can be attributed to, so every feature and outcome leaves them out. Counted so the report
   can say how many (a wrong key column shows up as a large share). Reads only the key and time
   columns of the events; turn it off with events.check_unknown_units = false. One row. */
SELECT
  COUNT(*) AS n_events_unknown,
  COUNT(DISTINCT e.`select`) AS n_units_unknown
FROM `bike "share"`.`order` AS e
WHERE
  e.`started at` >= CAST('2025-09-01' AS DATE)
  AND e.`started at` < CAST('2026-07-01' AS DATE)
  AND NOT EXISTS(
    SELECT
      1
    FROM `bike "share"`.`riders; DROP TABLE riders` AS u
    WHERE
      u.`select` = e.`select`
  );
