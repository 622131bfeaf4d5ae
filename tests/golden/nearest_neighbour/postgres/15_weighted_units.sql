-- sqlmatch study 'annual_pass', step 15: weighted_units (postgres)
-- Every unit's features and outcomes with its matching weight (NULL if unmatched), joined once for the steps after.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures, sqlmatch.annual_pass_match_weights
-- writes: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weighted_units__building;

CREATE TABLE "sqlmatch".annual_pass_weighted_units__building AS
/* Every study unit's features and outcomes with its matching weight: the sum of its weights over
   the matches (a control serving several treated units counts that often); NULL for a unit
   left unmatched. Built once, so the balance, plot and regression steps after it read one narrow
   table instead of each joining the measures to the matches again. Here the matching writes at
   most one weight row per unit (nearest neighbours with one control slot: one stratum), so that row is the
   unit's sum and is joined as it is, without summing the weights per unit first. */
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
  w.weight AS match__weight
FROM "sqlmatch".annual_pass_measures AS m
LEFT JOIN "sqlmatch".annual_pass_match_weights AS w
  ON w.unit_key = m.unit_key;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weighted_units;

ALTER TABLE "sqlmatch".annual_pass_weighted_units__building
RENAME TO annual_pass_weighted_units;

COMMIT;
