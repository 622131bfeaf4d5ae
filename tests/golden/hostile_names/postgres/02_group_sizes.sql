-- sqlmatch study 'annual_pass', step 02: group_sizes (postgres)
-- Count treated and control units (refuse an empty cohort or control pool), and NULL attributes.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Units per group in the study: checks the cohort and the control pool are not empty.
   Also, per attribute feature, the units whose value is NULL (reported, refused, filled or
   dropped as the feature's `missing` policy says).
*/
SELECT
  treated,
  COUNT(*) AS n_units,
  SUM(CASE WHEN age_band IS NULL THEN 1 ELSE 0 END) AS age_band__null
FROM "sqlmatch".annual_pass_units
GROUP BY
  treated
ORDER BY
  treated;
