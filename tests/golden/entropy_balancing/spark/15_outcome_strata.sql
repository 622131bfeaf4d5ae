-- sqlmatch study 'annual_pass', step 15: outcome_strata (spark)
-- Outcome sums per stratum and group among matched units, with the sums of the regressors, their cross-products and products with the outcomes that adjust them by regression.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)

SET spark.sql.session.timeZone = UTC;

/* Outcomes per stratum and group among matched units:
   counts, sums, sums of squares (and, for ratio outcomes, the cross-product) from which the
   effect and its variance are computed. Rows grow with the number of strata, never with the
   number of units. An outcome with a pre-window twin (the same measure before
   enrolment) also gets the sums of (outcome - twin), for the difference-in-differences. */
SELECT
  m.match__stratum AS stratum,
  m.treated,
  COUNT(*) AS n_units,
  SUM(m.match__weight) AS sum_w,
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
FROM `sqlmatch`.annual_pass_weighted_units AS m
WHERE
  NOT m.match__weight IS NULL
GROUP BY
  m.match__stratum,
  m.treated
ORDER BY
  m.match__stratum NULLS LAST,
  m.treated NULLS LAST;
