-- sqlmatch study 'annual_pass', step 07: propensity_check (postgres)
-- Propensity model: score vector, information matrix and log-likelihood at the coefficients shown.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_score_cells
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Propensity model, one Newton-Raphson step as aggregates. At the coefficients b below, with
   p = 1 / (1 + exp(-b'x)), returns the score vector g_i = sum (t - p) x_i, the information matrix
   h_ij = sum p (1 - p) x_i x_j (upper triangle) and the log-likelihood; sqlmatch solves
   h d = g and repeats with b + d until the step is negligible. The sums over units are taken
   over the groups of equal feature values (n units, of which n_t treated, in each): a group adds
   (n_t - n p) x_i to g_i, n p (1 - p) x_i x_j to h_ij and n_t b'x - n ln(1 + exp(b'x)) to the
   log-likelihood. Fitted on a sample of the controls; sqlmatch adds log(share sampled) to
   the intercept afterwards (case-control correction). The linear predictor is capped at +-30.0 inside
   exp() so no engine overflows. The row also returns b itself (b_0, b_1, ...), so whoever reads it
   later knows which coefficients the sums belong to.
   Design columns: x0 = intercept; x1 = pre_trips; x2 = log(1 + pre_minutes); x3 = age_band = '25-34'; x4 = age_band = '35-49'; x5 = age_band = '50+'. */
WITH design AS (
  SELECT
    CAST(m.cell__units AS DOUBLE PRECISION) AS n,
    CAST(m.cell__treated AS DOUBLE PRECISION) AS n_t,
    1.0 AS x0,
    m.pre_trips AS x1,
    LN(1.0 + GREATEST(m.pre_minutes, 0.0)) AS x2,
    CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END AS x3,
    CASE WHEN COALESCE(m.age_band, '(missing)') = '35-49' THEN 1.0 ELSE 0.0 END AS x4,
    CASE WHEN COALESCE(m.age_band, '(missing)') = '50+' THEN 1.0 ELSE 0.0 END AS x5
  FROM "sqlmatch".annual_pass_score_cells AS m
), linear AS (
  SELECT
    d.*,
    LEAST(
      GREATEST(-2.5 * x0 + 0.125 * x1 + 0.0625 * x2 + 0.25 * x3 + -0.25 * x4 + 0.5 * x5, -30.0),
      30.0
    ) AS eta
  FROM design AS d
), fitted AS (
  SELECT
    l.*,
    CAST(1.0 AS DOUBLE PRECISION) / (
      1.0 + EXP(-l.eta)
    ) AS p
  FROM linear AS l
)
SELECT
  SUM(n) AS n_units,
  SUM((
    n_t - n * p
  ) * x0) AS g_0,
  SUM((
    n_t - n * p
  ) * x1) AS g_1,
  SUM((
    n_t - n * p
  ) * x2) AS g_2,
  SUM((
    n_t - n * p
  ) * x3) AS g_3,
  SUM((
    n_t - n * p
  ) * x4) AS g_4,
  SUM((
    n_t - n * p
  ) * x5) AS g_5,
  SUM(n * p * (
    1.0 - p
  ) * x0 * x0) AS h_0_0,
  SUM(n * p * (
    1.0 - p
  ) * x0 * x1) AS h_0_1,
  SUM(n * p * (
    1.0 - p
  ) * x0 * x2) AS h_0_2,
  SUM(n * p * (
    1.0 - p
  ) * x0 * x3) AS h_0_3,
  SUM(n * p * (
    1.0 - p
  ) * x0 * x4) AS h_0_4,
  SUM(n * p * (
    1.0 - p
  ) * x0 * x5) AS h_0_5,
  SUM(n * p * (
    1.0 - p
  ) * x1 * x1) AS h_1_1,
  SUM(n * p * (
    1.0 - p
  ) * x1 * x2) AS h_1_2,
  SUM(n * p * (
    1.0 - p
  ) * x1 * x3) AS h_1_3,
  SUM(n * p * (
    1.0 - p
  ) * x1 * x4) AS h_1_4,
  SUM(n * p * (
    1.0 - p
  ) * x1 * x5) AS h_1_5,
  SUM(n * p * (
    1.0 - p
  ) * x2 * x2) AS h_2_2,
  SUM(n * p * (
    1.0 - p
  ) * x2 * x3) AS h_2_3,
  SUM(n * p * (
    1.0 - p
  ) * x2 * x4) AS h_2_4,
  SUM(n * p * (
    1.0 - p
  ) * x2 * x5) AS h_2_5,
  SUM(n * p * (
    1.0 - p
  ) * x3 * x3) AS h_3_3,
  SUM(n * p * (
    1.0 - p
  ) * x3 * x4) AS h_3_4,
  SUM(n * p * (
    1.0 - p
  ) * x3 * x5) AS h_3_5,
  SUM(n * p * (
    1.0 - p
  ) * x4 * x4) AS h_4_4,
  SUM(n * p * (
    1.0 - p
  ) * x4 * x5) AS h_4_5,
  SUM(n * p * (
    1.0 - p
  ) * x5 * x5) AS h_5_5,
  SUM(n_t * eta - n * LN(1.0 + EXP(eta))) AS log_likelihood,
  MIN(p) AS p_min,
  MAX(p) AS p_max,
  -2.5 AS b_0,
  0.125 AS b_1,
  0.0625 AS b_2,
  0.25 AS b_3,
  -0.25 AS b_4,
  0.5 AS b_5
FROM fitted;
