-- sqlmatch study 'annual_pass', step 10: balance_levels (postgres)
-- Per-level counts of categorical features, before and after matching.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Balance of the categorical features: units per level and group, before matching (count)
   and after matching (sum of weights). One row per feature, level and group. */
SELECT
  'age_band' AS feature,
  COALESCE(m.age_band, '(missing)') AS level,
  m.treated,
  COUNT(*) AS n_units,
  SUM(COALESCE(m.match__weight, 0)) AS sum_w
FROM "sqlmatch".annual_pass_weighted_units AS m
GROUP BY
  COALESCE(m.age_band, '(missing)'),
  m.treated
ORDER BY
  feature,
  level,
  treated;
