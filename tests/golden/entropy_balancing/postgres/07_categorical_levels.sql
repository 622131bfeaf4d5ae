-- sqlmatch study 'annual_pass', step 07: categorical_levels (postgres)
-- Levels of the categorical matching features (each level but the first is a balanced share).
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_measures
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Levels of the categorical features in the propensity model: each level but the first becomes
   an indicator column. One row per feature and level. */
SELECT
  'age_band' AS feature,
  COALESCE(m.age_band, '(missing)') AS level,
  COUNT(*) AS n_units
FROM "sqlmatch".annual_pass_measures AS m
GROUP BY
  COALESCE(m.age_band, '(missing)')
ORDER BY
  feature,
  level;
