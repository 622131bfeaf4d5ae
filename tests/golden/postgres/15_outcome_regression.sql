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
   Design columns: x0 = 1; x1 = treated; x2 = pre_trips; x3 = pre_minutes; x4 = pre_fare_per_trip; x5 = pre_active_days; x6 = pre_days_since_last.
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
    CAST(m.pre_minutes AS DOUBLE PRECISION) AS v1,
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) AS v2,
    CAST(m.pre_active_days AS DOUBLE PRECISION) AS v3,
    CAST(m.pre_days_since_last AS DOUBLE PRECISION) AS v4,
    CAST(m.post_trips AS DOUBLE PRECISION) AS y0,
    CAST(m.post_minutes AS DOUBLE PRECISION) AS y1,
    CAST(m.fare_per_trip__num AS DOUBLE PRECISION) AS num2,
    CAST(m.fare_per_trip__den AS DOUBLE PRECISION) AS den2,
    CAST(m.active_last_month AS DOUBLE PRECISION) AS y3
  FROM "sqlmatch".annual_pass_weighted_units AS m
  WHERE
    NOT m.match__weight IS NULL
    AND NOT m.pre_trips IS NULL
    AND NOT m.pre_minutes IS NULL
    AND NOT m.pre_fare_per_trip IS NULL
    AND NOT m.pre_active_days IS NULL
    AND NOT m.pre_days_since_last IS NULL
), centre AS (
  SELECT
    CAST(SUM(w * v0) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cv0,
    CAST(SUM(w * v1) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cv1,
    CAST(SUM(w * v2) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cv2,
    CAST(SUM(w * v3) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cv3,
    CAST(SUM(w * v4) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cv4,
    CAST(SUM(w * y0) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cy0,
    CAST(SUM(w * y1) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cy1,
    SUM(t * w * num2) AS num_t2,
    SUM((
      1 - t
    ) * w * num2) AS num_c2,
    SUM(t * w * den2) AS den_t2,
    SUM((
      1 - t
    ) * w * den2) AS den_c2,
    CAST(SUM(w * y3) AS DOUBLE PRECISION) / NULLIF(SUM(w), 0) AS cy3,
    SUM(t * w) AS w_t,
    SUM((
      1 - t
    ) * w) AS w_c
  FROM matched
), ratio_parts AS (
  /* per ratio outcome and group: R_g = sum w y / sum w x and xbar_g = sum w x / sum w; cy, the
     weighted mean of z over both groups, is its centre */
  SELECT
    CAST(c.num_t2 AS DOUBLE PRECISION) / NULLIF(c.den_t2, 0) AS r_t2,
    CAST(c.num_c2 AS DOUBLE PRECISION) / NULLIF(c.den_c2, 0) AS r_c2,
    CAST(c.den_t2 AS DOUBLE PRECISION) / NULLIF(c.w_t, 0) AS xbar_t2,
    CAST(c.den_c2 AS DOUBLE PRECISION) / NULLIF(c.w_c, 0) AS xbar_c2,
    CAST((
      CAST(c.w_t * c.num_t2 AS DOUBLE PRECISION) / NULLIF(c.den_t2, 0) + CAST(c.w_c * c.num_c2 AS DOUBLE PRECISION) / NULLIF(c.den_c2, 0)
    ) AS DOUBLE PRECISION) / NULLIF(c.w_t + c.w_c, 0) AS cy2,
    c.*
  FROM centre AS c
), design AS (
  SELECT
    m.w,
    CAST(1.0 AS DOUBLE PRECISION) AS x0,
    m.t AS x1,
    m.v0 - c.cv0 AS x2,
    c.cv0,
    m.v1 - c.cv1 AS x3,
    c.cv1,
    m.v2 - c.cv2 AS x4,
    c.cv2,
    m.v3 - c.cv3 AS x5,
    c.cv3,
    m.v4 - c.cv4 AS x6,
    c.cv4,
    m.y0 - c.cy0 AS y0,
    c.cy0,
    m.y1 - c.cy1 AS y1,
    c.cy1,
    CASE
      WHEN m.t = 1
      THEN c.r_t2 + CAST((
        m.num2 - c.r_t2 * m.den2
      ) AS DOUBLE PRECISION) / NULLIF(c.xbar_t2, 0)
      ELSE c.r_c2 + CAST((
        m.num2 - c.r_c2 * m.den2
      ) AS DOUBLE PRECISION) / NULLIF(c.xbar_c2, 0)
    END - c.cy2 AS y2,
    c.cy2,
    m.y3 - c.cy3 AS y3,
    c.cy3
  FROM matched AS m
  CROSS JOIN ratio_parts AS c
)
SELECT
  COUNT(*) AS n_units,
  SUM(w * w) AS sum_w2,
  SUM(w * w * x1) AS sum_w2_t,
  SUM(w * x0 * x0) AS xtx_0_0,
  SUM(w * x0 * x1) AS xtx_0_1,
  SUM(w * x0 * x2) AS xtx_0_2,
  SUM(w * x0 * x3) AS xtx_0_3,
  SUM(w * x0 * x4) AS xtx_0_4,
  SUM(w * x0 * x5) AS xtx_0_5,
  SUM(w * x0 * x6) AS xtx_0_6,
  SUM(w * x1 * x1) AS xtx_1_1,
  SUM(w * x1 * x2) AS xtx_1_2,
  SUM(w * x1 * x3) AS xtx_1_3,
  SUM(w * x1 * x4) AS xtx_1_4,
  SUM(w * x1 * x5) AS xtx_1_5,
  SUM(w * x1 * x6) AS xtx_1_6,
  SUM(w * x2 * x2) AS xtx_2_2,
  SUM(w * x2 * x3) AS xtx_2_3,
  SUM(w * x2 * x4) AS xtx_2_4,
  SUM(w * x2 * x5) AS xtx_2_5,
  SUM(w * x2 * x6) AS xtx_2_6,
  SUM(w * x3 * x3) AS xtx_3_3,
  SUM(w * x3 * x4) AS xtx_3_4,
  SUM(w * x3 * x5) AS xtx_3_5,
  SUM(w * x3 * x6) AS xtx_3_6,
  SUM(w * x4 * x4) AS xtx_4_4,
  SUM(w * x4 * x5) AS xtx_4_5,
  SUM(w * x4 * x6) AS xtx_4_6,
  SUM(w * x5 * x5) AS xtx_5_5,
  SUM(w * x5 * x6) AS xtx_5_6,
  SUM(w * x6 * x6) AS xtx_6_6,
  MAX(cv0) AS pre_trips__centre,
  MAX(cv1) AS pre_minutes__centre,
  MAX(cv2) AS pre_fare_per_trip__centre,
  MAX(cv3) AS pre_active_days__centre,
  MAX(cv4) AS pre_days_since_last__centre,
  SUM(w * x0 * y0) AS post_trips__xty_0,
  SUM(w * x1 * y0) AS post_trips__xty_1,
  SUM(w * x2 * y0) AS post_trips__xty_2,
  SUM(w * x3 * y0) AS post_trips__xty_3,
  SUM(w * x4 * y0) AS post_trips__xty_4,
  SUM(w * x5 * y0) AS post_trips__xty_5,
  SUM(w * x6 * y0) AS post_trips__xty_6,
  SUM(w * y0 * y0) AS post_trips__yty,
  SUM(w * x1 * y0 * y0) AS post_trips__tyy,
  MAX(cy0) AS post_trips__centre,
  SUM(w * x0 * y1) AS post_minutes__xty_0,
  SUM(w * x1 * y1) AS post_minutes__xty_1,
  SUM(w * x2 * y1) AS post_minutes__xty_2,
  SUM(w * x3 * y1) AS post_minutes__xty_3,
  SUM(w * x4 * y1) AS post_minutes__xty_4,
  SUM(w * x5 * y1) AS post_minutes__xty_5,
  SUM(w * x6 * y1) AS post_minutes__xty_6,
  SUM(w * y1 * y1) AS post_minutes__yty,
  SUM(w * x1 * y1 * y1) AS post_minutes__tyy,
  MAX(cy1) AS post_minutes__centre,
  SUM(w * x0 * y2) AS fare_per_trip__xty_0,
  SUM(w * x1 * y2) AS fare_per_trip__xty_1,
  SUM(w * x2 * y2) AS fare_per_trip__xty_2,
  SUM(w * x3 * y2) AS fare_per_trip__xty_3,
  SUM(w * x4 * y2) AS fare_per_trip__xty_4,
  SUM(w * x5 * y2) AS fare_per_trip__xty_5,
  SUM(w * x6 * y2) AS fare_per_trip__xty_6,
  SUM(w * y2 * y2) AS fare_per_trip__yty,
  SUM(w * x1 * y2 * y2) AS fare_per_trip__tyy,
  MAX(cy2) AS fare_per_trip__centre,
  SUM(w * x0 * y3) AS active_last_month__xty_0,
  SUM(w * x1 * y3) AS active_last_month__xty_1,
  SUM(w * x2 * y3) AS active_last_month__xty_2,
  SUM(w * x3 * y3) AS active_last_month__xty_3,
  SUM(w * x4 * y3) AS active_last_month__xty_4,
  SUM(w * x5 * y3) AS active_last_month__xty_5,
  SUM(w * x6 * y3) AS active_last_month__xty_6,
  SUM(w * y3 * y3) AS active_last_month__yty,
  SUM(w * x1 * y3 * y3) AS active_last_month__tyy,
  MAX(cy3) AS active_last_month__centre
FROM design;
