-- sqlmatch study 'annual_pass', step 15: outcome_regression (postgres)
-- Weighted regression of each outcome on treatment and the numeric features among matched units, as sums (X'WX, X'Wy, y'Wy) for the sensitivity analysis.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Weighted regression of each outcome on treatment and the numeric features, among matched units
   with the matching weights (the input of the robustness value). Returns one row of sums only:
   X'WX (upper triangle), X'Wy and y'Wy, from which sqlmatch solves the least-squares fit.
   Design columns: x0 = 1; x1 = treated; x2 = pre_trips; x3 = pre_fare.
   Features and outcomes are centred at their weighted means first (this only moves the
   intercept, and keeps the sums well conditioned); the centres are returned too. Units missing a
   numeric feature are left out. A ratio outcome (sum y / sum x) enters as its linearised value
   z = R_g + (y - R_g x) / xbar_g, with R_g the group's ratio of weighted sums and xbar_g its weighted
   mean denominator: the group means of z are R_1 and R_0, so the treatment coefficient is about
   the headline ratio effect. A unit's own ratio y / x would be a different quantity: treatment
   moves the denominators, and adjusting it for the features removes that shift from the effect.
   Also per weight set: sum of squared weights (overall and treated), for the outcomes' SDs. */
WITH matched AS (
  SELECT
    CAST(m.match__weight AS DOUBLE PRECISION) AS w,
    CAST(m.treated AS DOUBLE PRECISION) AS t,
    CAST(m.pre_trips AS DOUBLE PRECISION) AS v0,
    CAST(m.pre_fare AS DOUBLE PRECISION) AS v1,
    CAST(m.post_fare AS DOUBLE PRECISION) AS y0
  FROM "sqlmatch".annual_pass_weighted_units AS m
  WHERE
    NOT m.match__weight IS NULL AND NOT m.pre_trips IS NULL AND NOT m.pre_fare IS NULL
), centre AS (
  SELECT
    CAST(SUM(w * v0) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cv0,
    CAST(SUM(w * v1) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cv1,
    CAST(SUM(w * y0) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cy0,
    SUM(t * w) AS w_t,
    SUM((
      1 - t
    ) * w) AS w_c
  FROM matched
), design AS (
  SELECT
    m.w,
    CAST(1.0 AS DOUBLE PRECISION) AS x0,
    m.t AS x1,
    m.v0 - c.cv0 AS x2,
    c.cv0,
    m.v1 - c.cv1 AS x3,
    c.cv1,
    m.y0 - c.cy0 AS y0,
    c.cy0
  FROM matched AS m
  CROSS JOIN centre AS c
)
SELECT
  COUNT(*) AS n_units,
  SUM(w * w) AS sum_w2,
  SUM(w * w * x1) AS sum_w2_t,
  SUM(w * x0 * x0) AS xtx_0_0,
  SUM(w * x0 * x1) AS xtx_0_1,
  SUM(w * x0 * x2) AS xtx_0_2,
  SUM(w * x0 * x3) AS xtx_0_3,
  SUM(w * x1 * x1) AS xtx_1_1,
  SUM(w * x1 * x2) AS xtx_1_2,
  SUM(w * x1 * x3) AS xtx_1_3,
  SUM(w * x2 * x2) AS xtx_2_2,
  SUM(w * x2 * x3) AS xtx_2_3,
  SUM(w * x3 * x3) AS xtx_3_3,
  MAX(cv0) AS pre_trips__centre,
  MAX(cv1) AS pre_fare__centre,
  SUM(w * x0 * y0) AS post_fare__xty_0,
  SUM(w * x1 * y0) AS post_fare__xty_1,
  SUM(w * x2 * y0) AS post_fare__xty_2,
  SUM(w * x3 * y0) AS post_fare__xty_3,
  SUM(w * y0 * y0) AS post_fare__yty,
  SUM(w * x1 * y0 * y0) AS post_fare__tyy,
  MAX(cy0) AS post_fare__centre
FROM design;
