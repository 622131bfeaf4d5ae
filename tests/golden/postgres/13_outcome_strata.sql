-- sqlmatch study 'annual_pass', step 13: outcome_strata (postgres)
-- Outcome sums per stratum and group among matched units, with the sums of the regressors, their cross-products and products with the outcomes that adjust them by regression.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)

SET TimeZone = 'UTC';

/* Outcomes per stratum and group among matched units:
   counts, sums, sums of squares (and, for ratio outcomes, the cross-product) from which the
   effect and its variance are computed. Also the sums of the regressors of the within-stratum
   regression adjustment (the numeric features and their squares), their cross-products and
   their products with each outcome (a ratio outcome's numerator and denominator), from which the
   adjustment is computed. Rows grow with the number of strata, never with the
   number of units. An outcome with a pre-window twin (the same measure before
   enrolment) also gets the sums of (outcome - twin), for the difference-in-differences. */
SELECT
  m.match__stratum AS stratum,
  m.treated,
  COUNT(*) AS n_units,
  SUM(m.match__weight) AS sum_w,
  SUM(m.pre_trips) AS pre_trips__xsum,
  SUM(m.pre_minutes) AS pre_minutes__xsum,
  SUM(m.pre_fare_per_trip) AS pre_fare_per_trip__xsum,
  SUM(m.pre_active_days) AS pre_active_days__xsum,
  SUM(m.pre_days_since_last) AS pre_days_since_last__xsum,
  SUM(m.pre_trips * m.pre_trips) AS pre_trips__x__pre_trips,
  SUM(m.pre_minutes * m.pre_minutes) AS pre_minutes__x__pre_minutes,
  SUM(m.pre_fare_per_trip * m.pre_fare_per_trip) AS pre_fare_per_trip__x__pre_fare_per_trip,
  SUM(m.pre_active_days * m.pre_active_days) AS pre_active_days__x__pre_active_days,
  SUM(m.pre_days_since_last * m.pre_days_since_last) AS pre_days_since_last__x__pre_days_since_last,
  SUM(m.pre_trips * m.pre_minutes) AS pre_trips__x__pre_minutes,
  SUM(m.pre_trips * m.pre_fare_per_trip) AS pre_trips__x__pre_fare_per_trip,
  SUM(m.pre_trips * m.pre_active_days) AS pre_trips__x__pre_active_days,
  SUM(m.pre_trips * m.pre_days_since_last) AS pre_trips__x__pre_days_since_last,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_trips) AS adj_0_0_0,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_minutes * m.pre_minutes) AS adj_0_1_1,
  SUM(
    CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.pre_fare_per_trip
  ) AS adj_0_2_2,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_active_days * m.pre_active_days) AS adj_0_3_3,
  SUM(
    CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_0_4_4,
  SUM(m.pre_minutes * m.pre_fare_per_trip) AS pre_minutes__x__pre_fare_per_trip,
  SUM(m.pre_minutes * m.pre_active_days) AS pre_minutes__x__pre_active_days,
  SUM(m.pre_minutes * m.pre_days_since_last) AS pre_minutes__x__pre_days_since_last,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_minutes) AS adj_0_0_1,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.pre_minutes) AS adj_1_1_1,
  SUM(
    CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.pre_fare_per_trip
  ) AS adj_1_2_2,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_active_days * m.pre_active_days) AS adj_1_3_3,
  SUM(
    CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_1_4_4,
  SUM(m.pre_fare_per_trip * m.pre_active_days) AS pre_fare_per_trip__x__pre_active_days,
  SUM(m.pre_fare_per_trip * m.pre_days_since_last) AS pre_fare_per_trip__x__pre_days_since_last,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_fare_per_trip) AS adj_0_0_2,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.pre_fare_per_trip) AS adj_1_1_2,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.pre_fare_per_trip
  ) AS adj_2_2_2,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_active_days * m.pre_active_days
  ) AS adj_2_3_3,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_2_4_4,
  SUM(m.pre_active_days * m.pre_days_since_last) AS pre_active_days__x__pre_days_since_last,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_active_days) AS adj_0_0_3,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.pre_active_days) AS adj_1_1_3,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.pre_active_days
  ) AS adj_2_2_3,
  SUM(
    CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_active_days * m.pre_active_days
  ) AS adj_3_3_3,
  SUM(
    CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_3_4_4,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_days_since_last) AS adj_0_0_4,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.pre_days_since_last) AS adj_1_1_4,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.pre_days_since_last
  ) AS adj_2_2_4,
  SUM(
    CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_active_days * m.pre_days_since_last
  ) AS adj_3_3_4,
  SUM(
    CAST(m.pre_days_since_last AS DOUBLE PRECISION) * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_4_4_4,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_trips * m.pre_trips) AS adj_0_0_0_0,
  SUM(
    CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_minutes * m.pre_minutes
  ) AS adj_0_0_1_1,
  SUM(
    CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_fare_per_trip * m.pre_fare_per_trip
  ) AS adj_0_0_2_2,
  SUM(
    CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_active_days * m.pre_active_days
  ) AS adj_0_0_3_3,
  SUM(
    CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_0_0_4_4,
  SUM(
    CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.pre_minutes * m.pre_minutes
  ) AS adj_1_1_1_1,
  SUM(
    CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.pre_fare_per_trip * m.pre_fare_per_trip
  ) AS adj_1_1_2_2,
  SUM(
    CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.pre_active_days * m.pre_active_days
  ) AS adj_1_1_3_3,
  SUM(
    CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_1_1_4_4,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.pre_fare_per_trip * m.pre_fare_per_trip
  ) AS adj_2_2_2_2,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.pre_active_days * m.pre_active_days
  ) AS adj_2_2_3_3,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_2_2_4_4,
  SUM(
    CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_active_days * m.pre_active_days * m.pre_active_days
  ) AS adj_3_3_3_3,
  SUM(
    CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_active_days * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_3_3_4_4,
  SUM(
    CAST(m.pre_days_since_last AS DOUBLE PRECISION) * m.pre_days_since_last * m.pre_days_since_last * m.pre_days_since_last
  ) AS adj_4_4_4_4,
  SUM(m.pre_trips * m.post_trips) AS pre_trips__x__post_trips,
  SUM(m.pre_minutes * m.post_trips) AS pre_minutes__x__post_trips,
  SUM(m.pre_fare_per_trip * m.post_trips) AS pre_fare_per_trip__x__post_trips,
  SUM(m.pre_active_days * m.post_trips) AS pre_active_days__x__post_trips,
  SUM(m.pre_days_since_last * m.post_trips) AS pre_days_since_last__x__post_trips,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.post_trips) AS adj_0_0__x__post_trips,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.post_trips) AS adj_1_1__x__post_trips,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.post_trips
  ) AS adj_2_2__x__post_trips,
  SUM(CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_active_days * m.post_trips) AS adj_3_3__x__post_trips,
  SUM(
    CAST(m.pre_days_since_last AS DOUBLE PRECISION) * m.pre_days_since_last * m.post_trips
  ) AS adj_4_4__x__post_trips,
  SUM(m.pre_trips * m.post_minutes) AS pre_trips__x__post_minutes,
  SUM(m.pre_minutes * m.post_minutes) AS pre_minutes__x__post_minutes,
  SUM(m.pre_fare_per_trip * m.post_minutes) AS pre_fare_per_trip__x__post_minutes,
  SUM(m.pre_active_days * m.post_minutes) AS pre_active_days__x__post_minutes,
  SUM(m.pre_days_since_last * m.post_minutes) AS pre_days_since_last__x__post_minutes,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.post_minutes) AS adj_0_0__x__post_minutes,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.post_minutes) AS adj_1_1__x__post_minutes,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.post_minutes
  ) AS adj_2_2__x__post_minutes,
  SUM(CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_active_days * m.post_minutes) AS adj_3_3__x__post_minutes,
  SUM(
    CAST(m.pre_days_since_last AS DOUBLE PRECISION) * m.pre_days_since_last * m.post_minutes
  ) AS adj_4_4__x__post_minutes,
  SUM(m.pre_trips * m.fare_per_trip__num) AS pre_trips__x__fare_per_trip__num,
  SUM(m.pre_minutes * m.fare_per_trip__num) AS pre_minutes__x__fare_per_trip__num,
  SUM(m.pre_fare_per_trip * m.fare_per_trip__num) AS pre_fare_per_trip__x__fare_per_trip__num,
  SUM(m.pre_active_days * m.fare_per_trip__num) AS pre_active_days__x__fare_per_trip__num,
  SUM(m.pre_days_since_last * m.fare_per_trip__num) AS pre_days_since_last__x__fare_per_trip__num,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.fare_per_trip__num) AS adj_0_0__x__fare_per_trip__num,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.fare_per_trip__num) AS adj_1_1__x__fare_per_trip__num,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.fare_per_trip__num
  ) AS adj_2_2__x__fare_per_trip__num,
  SUM(
    CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_active_days * m.fare_per_trip__num
  ) AS adj_3_3__x__fare_per_trip__num,
  SUM(
    CAST(m.pre_days_since_last AS DOUBLE PRECISION) * m.pre_days_since_last * m.fare_per_trip__num
  ) AS adj_4_4__x__fare_per_trip__num,
  SUM(m.pre_trips * m.fare_per_trip__den) AS pre_trips__x__fare_per_trip__den,
  SUM(m.pre_minutes * m.fare_per_trip__den) AS pre_minutes__x__fare_per_trip__den,
  SUM(m.pre_fare_per_trip * m.fare_per_trip__den) AS pre_fare_per_trip__x__fare_per_trip__den,
  SUM(m.pre_active_days * m.fare_per_trip__den) AS pre_active_days__x__fare_per_trip__den,
  SUM(m.pre_days_since_last * m.fare_per_trip__den) AS pre_days_since_last__x__fare_per_trip__den,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.fare_per_trip__den) AS adj_0_0__x__fare_per_trip__den,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.fare_per_trip__den) AS adj_1_1__x__fare_per_trip__den,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.fare_per_trip__den
  ) AS adj_2_2__x__fare_per_trip__den,
  SUM(
    CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_active_days * m.fare_per_trip__den
  ) AS adj_3_3__x__fare_per_trip__den,
  SUM(
    CAST(m.pre_days_since_last AS DOUBLE PRECISION) * m.pre_days_since_last * m.fare_per_trip__den
  ) AS adj_4_4__x__fare_per_trip__den,
  SUM(m.pre_trips * m.active_last_month) AS pre_trips__x__active_last_month,
  SUM(m.pre_minutes * m.active_last_month) AS pre_minutes__x__active_last_month,
  SUM(m.pre_fare_per_trip * m.active_last_month) AS pre_fare_per_trip__x__active_last_month,
  SUM(m.pre_active_days * m.active_last_month) AS pre_active_days__x__active_last_month,
  SUM(m.pre_days_since_last * m.active_last_month) AS pre_days_since_last__x__active_last_month,
  SUM(CAST(m.pre_trips AS DOUBLE PRECISION) * m.pre_trips * m.active_last_month) AS adj_0_0__x__active_last_month,
  SUM(CAST(m.pre_minutes AS DOUBLE PRECISION) * m.pre_minutes * m.active_last_month) AS adj_1_1__x__active_last_month,
  SUM(
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) * m.pre_fare_per_trip * m.active_last_month
  ) AS adj_2_2__x__active_last_month,
  SUM(
    CAST(m.pre_active_days AS DOUBLE PRECISION) * m.pre_active_days * m.active_last_month
  ) AS adj_3_3__x__active_last_month,
  SUM(
    CAST(m.pre_days_since_last AS DOUBLE PRECISION) * m.pre_days_since_last * m.active_last_month
  ) AS adj_4_4__x__active_last_month,
  SUM(m.post_trips) AS post_trips__sum,
  SUM(m.post_trips * m.post_trips) AS post_trips__sumsq,
  SUM(m.post_trips - m.pre_trips) AS post_trips__did_sum,
  SUM((
    m.post_trips - m.pre_trips
  ) * (
    m.post_trips - m.pre_trips
  )) AS post_trips__did_sumsq,
  SUM(m.post_minutes) AS post_minutes__sum,
  SUM(m.post_minutes * m.post_minutes) AS post_minutes__sumsq,
  SUM(m.fare_per_trip__num) AS fare_per_trip__sum_y,
  SUM(m.fare_per_trip__den) AS fare_per_trip__sum_x,
  SUM(m.fare_per_trip__num * m.fare_per_trip__num) AS fare_per_trip__sumsq_y,
  SUM(m.fare_per_trip__den * m.fare_per_trip__den) AS fare_per_trip__sumsq_x,
  SUM(m.fare_per_trip__num * m.fare_per_trip__den) AS fare_per_trip__sum_xy,
  SUM(m.active_last_month) AS active_last_month__sum,
  SUM(m.active_last_month * m.active_last_month) AS active_last_month__sumsq
FROM "sqlmatch".annual_pass_weighted_units AS m
WHERE
  NOT m.match__weight IS NULL
GROUP BY
  m.match__stratum,
  m.treated
ORDER BY
  m.match__stratum,
  m.treated;
