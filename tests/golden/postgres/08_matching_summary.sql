-- sqlmatch study 'annual_pass', step 08: matching_summary (postgres)
-- Units and strata kept and dropped by coarsened exact matching.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_cells
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Coarsened exact matching, what was kept: cells, strata, and units dropped with the cells
   that lacked a treated or a control unit. One row. */
SELECT
  COUNT(*) AS n_cells,
  COUNT(stratum) AS n_strata,
  SUM(CASE WHEN stratum IS NULL THEN 1 ELSE 0 END) AS n_cells_dropped,
  SUM(n_treated) AS n_treated,
  SUM(CASE WHEN stratum IS NULL THEN 0 ELSE n_treated END) AS n_treated_matched,
  SUM(n_control) AS n_control,
  SUM(CASE WHEN stratum IS NULL THEN 0 ELSE n_control END) AS n_control_matched
FROM "sqlmatch".annual_pass_cells;
