-- sqlmatch study 'annual_pass', step 14: outcome_strata (redshift)
-- Outcome sums per stratum and group among matched units.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_measures, sqlmatch.annual_pass_weights

/* Outcomes per stratum and group among matched units:
   counts, sums, sums of squares (and, for ratio outcomes, the cross-product) from which the
   effect and its variance are computed. Rows grow with the number of strata, never with the
   number of units. */
SELECT
  w.stratum,
  m.treated,
  COUNT(*) AS n_units,
  SUM(w.weight) AS sum_w,
  SUM(m.post_fare) AS post_fare__sum,
  SUM(m.post_fare * m.post_fare) AS post_fare__sumsq
FROM "sqlmatch".annual_pass_measures AS m
INNER JOIN "sqlmatch".annual_pass_weights AS w
  ON w.unit_key = m.unit_key
GROUP BY
  w.stratum,
  m.treated
ORDER BY
  w.stratum,
  m.treated;
