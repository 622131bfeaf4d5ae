-- sqlmatch study 'annual_pass', step 01: study_units (postgres)
-- Treated cohort (2026-03) and control pool, after eligibility filters. Days are cut in UTC: the session's time zone must be UTC (a compiled file sets it where its dialect has the statement), or times with a time zone fall on the session's days.
-- kind: writes a table
-- reads: riders
-- writes: sqlmatch.annual_pass_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_units__building;

CREATE TABLE "sqlmatch".annual_pass_units__building AS
/* Units in the study: the cohort that enrolled in 2026-03 (treated = 1) and the control
   pool (treated = 0): never enrolled, or enrolled on or after 2026-07-01 (after the post window).
   Units that enrolled before 2026-03 are not in the study. */
SELECT
  u."rider_id" AS unit_key,
  CASE
    WHEN u."pass_bought_on" >= CAST('2026-03-01' AS DATE)
    AND u."pass_bought_on" < CAST('2026-04-01' AS DATE)
    THEN 1
    ELSE 0
  END AS treated,
  CAST(u."age_band" AS TEXT) AS age_band,
  CAST(u."home_district" AS TEXT) AS home_district
FROM "riders" AS u
WHERE
  (
    (
      u."pass_bought_on" >= CAST('2026-03-01' AS DATE)
      AND u."pass_bought_on" < CAST('2026-04-01' AS DATE)
    )
    OR u."pass_bought_on" IS NULL
    OR u."pass_bought_on" >= CAST('2026-07-01' AS DATE)
  )
  AND /* eligibility.filters[0] */ (
    u."signup_date" < CAST('2025-09-01' AS DATE)
  );

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_units;

ALTER TABLE "sqlmatch".annual_pass_units__building
RENAME TO annual_pass_units;

COMMIT;
