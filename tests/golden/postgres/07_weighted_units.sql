-- sqlmatch study 'annual_pass', step 07: weighted_units (postgres)
-- Matching weights for the effect on the treated, beside every unit's features and outcomes (NULL if unmatched).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures, sqlmatch.annual_pass_cells
-- writes: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weighted_units__building;

CREATE TABLE "sqlmatch".annual_pass_weighted_units__building AS
/* Coarsened exact matching: weights for the effect on the treated, beside every study
   unit's features and outcomes. Treated units weigh 1; a control unit in stratum s weighs
   (n_T,s / n_C,s) * (N_C / N_T), N counting matched units, so each group's weights sum to
   its number of matched units. A unit left unmatched keeps its row with stratum and weight NULL (balance
   before matching counts it). The balance, plot and effect steps after this one read this table
   alone. */
WITH totals AS (
  SELECT
    SUM(n_treated) AS matched_treated,
    SUM(n_control) AS matched_control
  FROM "sqlmatch".annual_pass_cells
  WHERE
    NOT stratum IS NULL
)
SELECT
  m.unit_key,
  m.treated,
  m.pre_trips,
  m.pre_minutes,
  m.pre_fare_per_trip,
  m.pre_active_days,
  m.pre_days_since_last,
  m.post_trips,
  m.post_minutes,
  m.fare_per_trip__num,
  m.fare_per_trip__den,
  m.active_last_month,
  m.age_band,
  m.home_district,
  s.stratum AS match__stratum,
  CASE
    WHEN s.stratum IS NULL
    THEN NULL
    WHEN m.treated = 1
    THEN 1.0
    ELSE (
      CAST(s.n_treated AS DOUBLE PRECISION) / NULLIF(s.n_control, 0)
    ) * (
      CAST(t.matched_control AS DOUBLE PRECISION) / NULLIF(t.matched_treated, 0)
    )
  END AS match__weight
FROM "sqlmatch".annual_pass_measures AS m
CROSS JOIN totals AS t
LEFT JOIN "sqlmatch".annual_pass_cells AS s
  ON s.pre_trips__bin = CASE
    WHEN m.pre_trips IS NULL
    THEN -1
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(1.0 AS DECIMAL(38, 10))
    THEN 0
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(2.0 AS DECIMAL(38, 10))
    THEN 1
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(3.0 AS DECIMAL(38, 10))
    THEN 2
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(4.0 AS DECIMAL(38, 10))
    THEN 3
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(5.0 AS DECIMAL(38, 10))
    THEN 4
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(6.0 AS DECIMAL(38, 10))
    THEN 5
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(7.0 AS DECIMAL(38, 10))
    THEN 6
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(8.0 AS DECIMAL(38, 10))
    THEN 7
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(9.0 AS DECIMAL(38, 10))
    THEN 8
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(10.0 AS DECIMAL(38, 10))
    THEN 9
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(12.0 AS DECIMAL(38, 10))
    THEN 10
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(14.0 AS DECIMAL(38, 10))
    THEN 11
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(16.0 AS DECIMAL(38, 10))
    THEN 12
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(18.0 AS DECIMAL(38, 10))
    THEN 13
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(21.0 AS DECIMAL(38, 10))
    THEN 14
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(25.0 AS DECIMAL(38, 10))
    THEN 15
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(30.0 AS DECIMAL(38, 10))
    THEN 16
    WHEN CAST(m.pre_trips AS DECIMAL(38, 10)) < CAST(40.0 AS DECIMAL(38, 10))
    THEN 17
    ELSE 18
  END
  AND s.age_band__bin = COALESCE(m.age_band, '(missing)');

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weighted_units;

ALTER TABLE "sqlmatch".annual_pass_weighted_units__building
RENAME TO annual_pass_weighted_units;

COMMIT;
