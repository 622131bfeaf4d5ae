-- sqlmatch study 'annual_pass', step 06: strata_cells (snowflake)
-- Coarsened exact matching: cells with treated/control counts; cells with both become strata.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures
-- writes: sqlmatch.annual_pass_cells

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
      WHEN m.pre_trips < 1.0
      THEN 0
      WHEN m.pre_trips < 2.0
      THEN 1
      WHEN m.pre_trips < 3.0
      THEN 2
      WHEN m.pre_trips < 4.0
      THEN 3
      WHEN m.pre_trips < 5.0
      THEN 4
      WHEN m.pre_trips < 6.0
      THEN 5
      WHEN m.pre_trips < 7.0
      THEN 6
      WHEN m.pre_trips < 8.0
      THEN 7
      WHEN m.pre_trips < 9.0
      THEN 8
      WHEN m.pre_trips < 10.0
      THEN 9
      WHEN m.pre_trips < 12.0
      THEN 10
      WHEN m.pre_trips < 14.0
      THEN 11
      WHEN m.pre_trips < 16.0
      THEN 12
      WHEN m.pre_trips < 18.0
      THEN 13
      WHEN m.pre_trips < 21.0
      THEN 14
      WHEN m.pre_trips < 25.0
      THEN 15
      WHEN m.pre_trips < 30.0
      THEN 16
      WHEN m.pre_trips < 40.0
      THEN 17
      ELSE 18
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

DROP TABLE IF EXISTS "sqlmatch".annual_pass_cells;

ALTER TABLE "sqlmatch".annual_pass_cells__building
RENAME TO "sqlmatch".annual_pass_cells;
