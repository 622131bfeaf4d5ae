-- sqlmatch study 'annual_pass', step 12: weights (duckdb)
-- Matching weights for the effect on the treated (matched units only).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_score_strata, sqlmatch.annual_pass_cells
-- writes: sqlmatch.annual_pass_weights

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weights__building;

CREATE TABLE "sqlmatch".annual_pass_weights__building AS
/* Propensity-score subclassification, weights for the effect on the treated: treated units weigh 1; a
   control unit in stratum s weighs (n_T,s / n_C,s) * (N_C / N_T), N counting matched units,
   so control weights sum to the number of matched controls. Unmatched units get no row. */
WITH coarsened AS (
  SELECT
    m.unit_key,
    m.treated,
    m.score_bin AS score_bin
  FROM "sqlmatch".annual_pass_score_strata AS m
), totals AS (
  SELECT
    SUM(n_treated) AS matched_treated,
    SUM(n_control) AS matched_control
  FROM "sqlmatch".annual_pass_cells
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
INNER JOIN "sqlmatch".annual_pass_cells AS s
  ON s.score_bin = c.score_bin
CROSS JOIN totals AS t
WHERE
  NOT s.stratum IS NULL;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weights;

ALTER TABLE "sqlmatch".annual_pass_weights__building
RENAME TO annual_pass_weights;
