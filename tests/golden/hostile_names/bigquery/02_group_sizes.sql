-- sqlmatch study 'annual_pass', step 02: group_sizes (bigquery)
-- Count treated and control units (refuse an empty cohort or control pool).
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_units

/* Units per group in the study: checks the cohort and the control pool are not empty. */
SELECT
  treated,
  COUNT(*) AS n_units
FROM `sqlmatch`.annual_pass_units
GROUP BY
  treated
ORDER BY
  treated NULLS LAST;
