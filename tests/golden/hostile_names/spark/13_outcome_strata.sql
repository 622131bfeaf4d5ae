-- sqlmatch study 'annual_pass', step 13: outcome_strata (spark)
-- Outcome sums per stratum and group among matched units, with the sums of the regressors, their cross-products and products with the outcomes that adjust them by regression.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)

SET spark.sql.session.timeZone = UTC;

/* Outcomes per stratum and group among matched units:
   counts, sums, sums of squares (and, for ratio outcomes, the cross-product) from which the
   effect and its variance are computed. Also the sums of the regressors of the within-stratum
   regression adjustment (the numeric features), their cross-products and
   their products with each count, sum and 0/1 outcome, from which the
   adjustment is computed. Rows grow with the number of strata, never with the
   number of units. */
SELECT
  m.match__stratum AS stratum,
  m.treated,
  COUNT(*) AS n_units,
  SUM(m.match__weight) AS sum_w,
  SUM(m.pre_trips) AS pre_trips__xsum,
  SUM(m.pre_fare) AS pre_fare__xsum,
  SUM(m.pre_trips * m.pre_trips) AS pre_trips__x__pre_trips,
  SUM(m.pre_trips * m.pre_fare) AS pre_trips__x__pre_fare,
  SUM(m.pre_fare * m.pre_fare) AS pre_fare__x__pre_fare,
  SUM(m.pre_trips * m.post_fare) AS pre_trips__x__post_fare,
  SUM(m.pre_fare * m.post_fare) AS pre_fare__x__post_fare,
  SUM(m.post_fare) AS post_fare__sum,
  SUM(m.post_fare * m.post_fare) AS post_fare__sumsq
FROM `sqlmatch`.annual_pass_weighted_units AS m
WHERE
  NOT m.match__weight IS NULL
GROUP BY
  m.match__stratum,
  m.treated
ORDER BY
  m.match__stratum NULLS LAST,
  m.treated NULLS LAST;
