-- sqlmatch study 'annual_pass', step 07: weighted_units (postgres)
-- Matching weights for the effect on the treated, beside every unit's features and outcomes (NULL if unmatched).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures, sqlmatch.annual_pass_cells
-- writes: sqlmatch.annual_pass_weighted_units

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
  END
  AND s.age_band__bin = COALESCE(m.age_band, '(missing)');

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weighted_units;

ALTER TABLE "sqlmatch".annual_pass_weighted_units__building
RENAME TO annual_pass_weighted_units;
