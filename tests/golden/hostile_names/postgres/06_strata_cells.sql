-- sqlmatch study 'annual_pass', step 06: strata_cells (postgres)
-- Coarsened exact matching: cells with treated/control counts; cells with both become strata.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures
-- writes: sqlmatch.annual_pass_cells
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_cells__building;

CREATE TABLE "sqlmatch".annual_pass_cells__building AS
/* Coarsened exact matching, cells: every unit falls in the cell given by its coarsened features (pre_trips, age_band).
   A cell with at least one treated and one control unit becomes a stratum; cells lacking
   either group are kept here (stratum NULL) so the drop is counted. */
WITH coarsened AS (
  SELECT
    m.treated,
    CASE
      WHEN m.pre_trips IS NULL
      THEN -1
      WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(1.0 AS DECIMAL(38, 10))
      THEN 0
      WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(5.0 AS DECIMAL(38, 10))
      THEN 1
      WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(10.0 AS DECIMAL(38, 10))
      THEN 2
      ELSE 3
    END AS pre_trips__bin,
    COALESCE(m.age_band, '(missing)') AS age_band__bin
  FROM "sqlmatch".annual_pass_measures AS m
), cells AS (
  SELECT
    pre_trips__bin,
    age_band__bin,
    SUM(treated) AS n_treated,
    SUM(1 - treated) AS n_control
  FROM coarsened
  GROUP BY
    pre_trips__bin,
    age_band__bin
)
SELECT
  pre_trips__bin,
  age_band__bin,
  n_treated,
  n_control,
  CASE
    WHEN n_treated > 0 AND n_control > 0
    THEN DENSE_RANK() OVER (
      ORDER BY CASE WHEN n_treated > 0 AND n_control > 0 THEN 0 ELSE 1 END, pre_trips__bin, age_band__bin
    )
  END AS stratum
FROM cells;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_cells;

ALTER TABLE "sqlmatch".annual_pass_cells__building
RENAME TO annual_pass_cells;

COMMIT;
