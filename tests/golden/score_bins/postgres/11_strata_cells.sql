-- sqlmatch study 'annual_pass', step 11: strata_cells (postgres)
-- Propensity-score subclassification: cells with treated/control counts; cells with both become strata.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_score_strata
-- writes: sqlmatch.annual_pass_cells
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_cells__building;

CREATE TABLE "sqlmatch".annual_pass_cells__building AS
/* Propensity-score subclassification, cells: every unit falls in the cell given by its propensity-score subclass (1 of 5).
   A cell with at least one treated and one control unit becomes a stratum; cells lacking
   either group are kept here (stratum NULL) so the drop is counted. */
WITH coarsened AS (
  SELECT
    m.treated,
    m.score_bin AS score_bin
  FROM "sqlmatch".annual_pass_score_strata AS m
), cells AS (
  SELECT
    score_bin,
    SUM(treated) AS n_treated,
    SUM(1 - treated) AS n_control
  FROM coarsened
  GROUP BY
    score_bin
)
SELECT
  score_bin,
  n_treated,
  n_control,
  CASE
    WHEN n_treated > 0 AND n_control > 0
    THEN DENSE_RANK() OVER (ORDER BY CASE WHEN n_treated > 0 AND n_control > 0 THEN 0 ELSE 1 END, score_bin)
  END AS stratum
FROM cells;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_cells;

ALTER TABLE "sqlmatch".annual_pass_cells__building
RENAME TO annual_pass_cells;

COMMIT;
