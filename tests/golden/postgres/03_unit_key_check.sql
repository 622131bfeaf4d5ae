-- sqlmatch study 'annual_pass', step 03: unit_key_check (postgres)
-- Rows and distinct keys among the study's units (refuse duplicate keys).
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Is "rider_id" a key of "riders"? Rows and distinct keys among the units in the study;
   they must be equal, or units would be counted twice. One row. */
SELECT
  COUNT(*) AS n_rows,
  COUNT(DISTINCT unit_key) AS n_keys
FROM "sqlmatch".annual_pass_units;
