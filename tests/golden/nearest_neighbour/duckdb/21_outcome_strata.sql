-- sqlmatch study 'annual_pass', step 21: outcome_strata (duckdb)
-- Outcome sums per stratum and group among matched units, with the sums of the regressors, their cross-products and products with the outcomes that adjust them by regression.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_measures, sqlmatch.annual_pass_match_weights
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)

SET TimeZone = 'UTC';

/* Outcomes per stratum and group among matched units:
   counts, sums, sums of squares (and, for ratio outcomes, the cross-product) from which the
   effect and its variance are computed. Also the sums of the regressors of the within-stratum
   regression adjustment (the numeric features), their cross-products and
   their products with each count, sum and 0/1 outcome, from which the
   adjustment is computed. Rows grow with the number of strata, never with the
   number of units. An outcome with a pre-window twin (the same measure before
   enrolment) also gets the sums of (outcome - twin), for the difference-in-differences. */
SELECT
  w.stratum AS stratum,
  m.treated,
  COUNT(*) AS n_units,
  SUM(w.weight) AS sum_w,
  SUM(w.weight * (
    m.pre_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_trips__xsum,
  SUM(w.weight * (
    m.pre_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_minutes__xsum,
  SUM(w.weight * (
    m.pre_fare_per_trip
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_fare_per_trip__xsum,
  SUM(w.weight * (
    m.pre_active_days
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_active_days__xsum,
  SUM(w.weight * (
    m.pre_days_since_last
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_days_since_last__xsum,
  SUM(w.weight * (
    m.pre_trips * m.pre_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_trips__x__pre_trips,
  SUM(w.weight * (
    m.pre_trips * m.pre_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_trips__x__pre_minutes,
  SUM(w.weight * (
    m.pre_trips * m.pre_fare_per_trip
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_trips__x__pre_fare_per_trip,
  SUM(w.weight * (
    m.pre_trips * m.pre_active_days
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_trips__x__pre_active_days,
  SUM(w.weight * (
    m.pre_trips * m.pre_days_since_last
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_trips__x__pre_days_since_last,
  SUM(w.weight * (
    m.pre_minutes * m.pre_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_minutes__x__pre_minutes,
  SUM(w.weight * (
    m.pre_minutes * m.pre_fare_per_trip
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_minutes__x__pre_fare_per_trip,
  SUM(w.weight * (
    m.pre_minutes * m.pre_active_days
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_minutes__x__pre_active_days,
  SUM(w.weight * (
    m.pre_minutes * m.pre_days_since_last
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_minutes__x__pre_days_since_last,
  SUM(w.weight * (
    m.pre_fare_per_trip * m.pre_fare_per_trip
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_fare_per_trip__x__pre_fare_per_trip,
  SUM(w.weight * (
    m.pre_fare_per_trip * m.pre_active_days
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_fare_per_trip__x__pre_active_days,
  SUM(w.weight * (
    m.pre_fare_per_trip * m.pre_days_since_last
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_fare_per_trip__x__pre_days_since_last,
  SUM(w.weight * (
    m.pre_active_days * m.pre_active_days
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_active_days__x__pre_active_days,
  SUM(w.weight * (
    m.pre_active_days * m.pre_days_since_last
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_active_days__x__pre_days_since_last,
  SUM(w.weight * (
    m.pre_days_since_last * m.pre_days_since_last
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_days_since_last__x__pre_days_since_last,
  SUM(w.weight * (
    m.pre_trips * m.post_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_trips__x__post_trips,
  SUM(w.weight * (
    m.pre_minutes * m.post_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_minutes__x__post_trips,
  SUM(w.weight * (
    m.pre_fare_per_trip * m.post_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_fare_per_trip__x__post_trips,
  SUM(w.weight * (
    m.pre_active_days * m.post_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_active_days__x__post_trips,
  SUM(w.weight * (
    m.pre_days_since_last * m.post_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_days_since_last__x__post_trips,
  SUM(w.weight * (
    m.pre_trips * m.post_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_trips__x__post_minutes,
  SUM(w.weight * (
    m.pre_minutes * m.post_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_minutes__x__post_minutes,
  SUM(w.weight * (
    m.pre_fare_per_trip * m.post_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_fare_per_trip__x__post_minutes,
  SUM(w.weight * (
    m.pre_active_days * m.post_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_active_days__x__post_minutes,
  SUM(w.weight * (
    m.pre_days_since_last * m.post_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_days_since_last__x__post_minutes,
  SUM(w.weight * (
    m.pre_trips * m.active_last_month
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_trips__x__active_last_month,
  SUM(w.weight * (
    m.pre_minutes * m.active_last_month
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_minutes__x__active_last_month,
  SUM(w.weight * (
    m.pre_fare_per_trip * m.active_last_month
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_fare_per_trip__x__active_last_month,
  SUM(w.weight * (
    m.pre_active_days * m.active_last_month
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_active_days__x__active_last_month,
  SUM(w.weight * (
    m.pre_days_since_last * m.active_last_month
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS pre_days_since_last__x__active_last_month,
  SUM(w.weight * (
    m.post_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS post_trips__sum,
  SUM(w.weight * (
    m.post_trips * m.post_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS post_trips__sumsq,
  SUM(w.weight * (
    m.post_trips - m.pre_trips
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS post_trips__did_sum,
  SUM(
    w.weight * (
      (
        m.post_trips - m.pre_trips
      ) * (
        m.post_trips - m.pre_trips
      )
    )
  ) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS post_trips__did_sumsq,
  SUM(w.weight * (
    m.post_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS post_minutes__sum,
  SUM(w.weight * (
    m.post_minutes * m.post_minutes
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS post_minutes__sumsq,
  SUM(w.weight * (
    m.fare_per_trip__num
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS fare_per_trip__sum_y,
  SUM(w.weight * (
    m.fare_per_trip__den
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS fare_per_trip__sum_x,
  SUM(w.weight * (
    m.fare_per_trip__num * m.fare_per_trip__num
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS fare_per_trip__sumsq_y,
  SUM(w.weight * (
    m.fare_per_trip__den * m.fare_per_trip__den
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS fare_per_trip__sumsq_x,
  SUM(w.weight * (
    m.fare_per_trip__num * m.fare_per_trip__den
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS fare_per_trip__sum_xy,
  SUM(w.weight * (
    m.active_last_month
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS active_last_month__sum,
  SUM(w.weight * (
    m.active_last_month * m.active_last_month
  )) * COUNT(*) / NULLIF(SUM(w.weight), 0) AS active_last_month__sumsq
FROM "sqlmatch".annual_pass_measures AS m
INNER JOIN "sqlmatch".annual_pass_match_weights AS w
  ON w.unit_key = m.unit_key
GROUP BY
  w.stratum,
  m.treated
ORDER BY
  w.stratum,
  m.treated;
