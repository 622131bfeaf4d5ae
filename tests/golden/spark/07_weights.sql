-- sqlmatch study 'annual_pass', step 07: weights (spark)
-- Matching weights for the effect on the treated (matched units only).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures, sqlmatch.annual_pass_cells
-- writes: sqlmatch.annual_pass_weights

DROP TABLE IF EXISTS `sqlmatch`.annual_pass_weights__building;

CREATE TABLE `sqlmatch`.annual_pass_weights__building AS
/* Coarsened exact matching, weights for the effect on the treated: treated units weigh 1; a
   control unit in stratum s weighs (n_T,s / n_C,s) * (N_C / N_T), N counting matched units,
   so control weights sum to the number of matched controls. Unmatched units get no row. */
WITH coarsened AS (
  SELECT
    m.unit_key,
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
  FROM `sqlmatch`.annual_pass_measures AS m
), totals AS (
  SELECT
    SUM(n_treated) AS matched_treated,
    SUM(n_control) AS matched_control
  FROM `sqlmatch`.annual_pass_cells
  WHERE
    NOT stratum IS NULL
)
SELECT
  c.unit_key,
  c.treated,
  s.stratum,
  CASE
    WHEN c.treated = 1
    THEN 1.0
    ELSE (
      CAST(s.n_treated AS DOUBLE) / NULLIF(s.n_control, 0)
    ) * (
      CAST(t.matched_control AS DOUBLE) / NULLIF(t.matched_treated, 0)
    )
  END AS weight
FROM coarsened AS c
INNER JOIN `sqlmatch`.annual_pass_cells AS s
  ON s.pre_trips__bin = c.pre_trips__bin AND s.age_band__bin = c.age_band__bin
CROSS JOIN totals AS t
WHERE
  NOT s.stratum IS NULL;

DROP TABLE IF EXISTS `sqlmatch`.annual_pass_weights;

ALTER TABLE `sqlmatch`.annual_pass_weights__building
RENAME TO `sqlmatch`.annual_pass_weights;
