-- sqlmatch study 'annual_pass', step 10: weighted_units (trino)
-- Every unit's measures with its matching weight (NULL if unmatched), joined once for the steps after.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures, sqlmatch.annual_pass_weights
-- writes: sqlmatch.annual_pass_weighted

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weighted__building;

CREATE TABLE "sqlmatch".annual_pass_weighted__building AS
/* Every study unit's measures with its matching weight: the sum of its weights over the matches
   (a control serving several treated units counts that often); NULL for a unit left unmatched.
   Built once, so the balance, plot and regression steps after it read one table instead of each
   joining the measures to the matches again. */
SELECT
  m.*,
  w.weight AS match__weight
FROM "sqlmatch".annual_pass_measures AS m
LEFT JOIN (
  SELECT
    unit_key,
    SUM(weight) AS weight
  FROM "sqlmatch".annual_pass_weights
  GROUP BY
    unit_key
) AS w
  ON w.unit_key = m.unit_key;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weighted;

ALTER TABLE "sqlmatch".annual_pass_weighted__building
RENAME TO "sqlmatch".annual_pass_weighted;
