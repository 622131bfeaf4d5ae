-- sqlmatch study 'annual_pass', step 10: nearest_neighbour_units (postgres)
-- Units with a score: exact block, score bin.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_scores, sqlmatch.annual_pass_nearest_neighbour_caliper
-- writes: sqlmatch.annual_pass_nearest_neighbour_units

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_units__building;

CREATE TABLE "sqlmatch".annual_pass_nearest_neighbour_units__building AS
/* Nearest-neighbour matching, the units that can be matched: every unit with a propensity score,
   its exact block (age_band; a missing level is a level of its own) and its score
   bin, CAST(FLOOR((score - lowest score) / width) AS INTEGER) with the caliper's width, so a control within the
   caliper of a treated unit is always in the treated unit's bin or an adjacent one.
   unit_seq numbers the units by key; it feeds a multiplicative hash that breaks ties in distance, so
   that treated units with identical scores do not all take the same control (the one with the
   lowest key), while the result stays the same on every engine.
*/
SELECT
  s.unit_key,
  s.treated,
  ROW_NUMBER() OVER (ORDER BY s.unit_key) AS unit_seq,
  COALESCE(s.age_band, '(missing)') AS age_band,
  s.score,
  CAST(FLOOR(CAST((
    s.score - k.score_min
  ) AS DOUBLE PRECISION) / NULLIF(k.width, 0.0)) AS INT) AS score_bin
FROM "sqlmatch".annual_pass_scores AS s
CROSS JOIN "sqlmatch".annual_pass_nearest_neighbour_caliper AS k
WHERE
  NOT s.score IS NULL AND k.width > 0.0;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_nearest_neighbour_units;

ALTER TABLE "sqlmatch".annual_pass_nearest_neighbour_units__building
RENAME TO annual_pass_nearest_neighbour_units;
