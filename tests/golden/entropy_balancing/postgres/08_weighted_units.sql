-- sqlmatch study 'annual_pass', step 08: weighted_units (postgres)
-- Entropy-balancing weights (enrolled 1, non-enrolled exp(lam'z), summing to the enrolled count), beside every unit's features and outcomes.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures
-- writes: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weighted_units__building;

CREATE TABLE "sqlmatch".annual_pass_weighted_units__building AS
/* Entropy balancing for the effect on the treated (enrolled): every study unit's features and
   outcomes with its weight. Enrolled units weigh 1; a non-enrolled unit exp(lam'z - 2.5),
   with z its centred and scaled moment functions and lam the dual's solution (6 Newton steps;
   an exponent below -300 counts as -300, a weight of 5e-131 instead of an underflow error),
   so the weights sum to the number of enrolled units and the weighted non-enrolled means of the
   moment functions equal the enrolled units' means (Hainmueller 2012, Political Analysis 20:25).
   One stratum (0).
   Moments: z0 = (pre_trips - 7.25) / 6.5; z1 = (pre_minutes - 105.0) / 96.5; z2 = (age_band = '25-34' - 0.375) / 0.5; z3 = (log(1 + pre_trips) - 1.9) / 0.8; z4 = ((age_band = '25-34') * (log(1 + pre_trips)) - 0.7) / 0.9; z5 = ((pre_trips - 7.25)^2 - 52.0) / 60.0. */
WITH design AS (
  SELECT
    m.*,
    CAST((
      CAST(m.pre_trips AS DOUBLE PRECISION) - 7.25
    ) AS DOUBLE PRECISION) / 6.5 AS eb__z0,
    CAST((
      CAST(m.pre_minutes AS DOUBLE PRECISION) - 105.0
    ) AS DOUBLE PRECISION) / 96.5 AS eb__z1,
    CAST((
      CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END - 0.375
    ) AS DOUBLE PRECISION) / 0.5 AS eb__z2,
    CAST((
      CAST(LN(1.0 + GREATEST(m.pre_trips, 0.0)) AS DOUBLE PRECISION) - 1.9
    ) AS DOUBLE PRECISION) / 0.8 AS eb__z3,
    CAST((
      CAST((
        CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END
      ) * (
        LN(1.0 + GREATEST(m.pre_trips, 0.0))
      ) AS DOUBLE PRECISION) - 0.7
    ) AS DOUBLE PRECISION) / 0.9 AS eb__z4,
    CAST((
      (
        CAST(m.pre_trips AS DOUBLE PRECISION) - 7.25
      ) * (
        CAST(m.pre_trips AS DOUBLE PRECISION) - 7.25
      ) - 52.0
    ) AS DOUBLE PRECISION) / 60.0 AS eb__z5
  FROM "sqlmatch".annual_pass_measures AS m
)
SELECT
  d.unit_key,
  d.treated,
  d.pre_trips,
  d.pre_minutes,
  d.pre_fare_per_trip,
  d.pre_active_days,
  d.pre_days_since_last,
  d.post_trips,
  d.post_minutes,
  d.fare_per_trip__num,
  d.fare_per_trip__den,
  d.active_last_month,
  d.age_band,
  d.home_district,
  0 AS match__stratum,
  CASE
    WHEN d.treated = 1
    THEN 1.0
    ELSE EXP(
      GREATEST(
        0.5 * eb__z0 + -0.125 * eb__z1 + 0.25 * eb__z2 + 0.375 * eb__z3 + -0.25 * eb__z4 + -0.0625 * eb__z5 - 2.5,
        -300.0
      )
    )
  END AS match__weight
FROM design AS d;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_weighted_units;

ALTER TABLE "sqlmatch".annual_pass_weighted_units__building
RENAME TO annual_pass_weighted_units;

COMMIT;
