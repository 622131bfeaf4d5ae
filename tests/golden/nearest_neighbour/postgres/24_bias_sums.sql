-- sqlmatch study 'annual_pass', step 24: bias_sums (postgres)
-- Abadie-Imbens bias correction: weighted sums and cross-products of the features and outcomes per group among matched units.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Nearest-neighbour matching: sums for the Abadie & Imbens (2011) bias correction, per group over the
   matched units weighted by their matching weights (a control's is K_M / M, the times it is used
   over the matches per treated unit): sum w, sum w x_j, sum w x_j x_k (j <= k) for the features
   x = pre_trips, pre_minutes, pre_fare_per_trip, pre_active_days, pre_days_since_last, and sum w v, sum w x_j v for each outcome quantity v. sqlmatch fits the
   controls' regression of v on x from these and subtracts beta' (mean x of the treated - weighted mean x
   of their matched controls) from the effect. Units missing a feature are left out. One row per group. */
WITH matched AS (
  SELECT
    m.treated,
    CAST(m.match__weight AS DOUBLE PRECISION) AS w,
    CAST(m.pre_trips AS DOUBLE PRECISION) AS x1,
    CAST(m.pre_minutes AS DOUBLE PRECISION) AS x2,
    CAST(m.pre_fare_per_trip AS DOUBLE PRECISION) AS x3,
    CAST(m.pre_active_days AS DOUBLE PRECISION) AS x4,
    CAST(m.pre_days_since_last AS DOUBLE PRECISION) AS x5,
    CAST(m.post_trips AS DOUBLE PRECISION) AS v1,
    CAST(m.post_trips - m.pre_trips AS DOUBLE PRECISION) AS v2,
    CAST(m.post_minutes AS DOUBLE PRECISION) AS v3,
    CAST(m.fare_per_trip__num AS DOUBLE PRECISION) AS v4,
    CAST(m.fare_per_trip__den AS DOUBLE PRECISION) AS v5,
    CAST(m.active_last_month AS DOUBLE PRECISION) AS v6
  FROM "sqlmatch".annual_pass_weighted_units AS m
  WHERE
    NOT m.match__weight IS NULL
    AND NOT m.pre_trips IS NULL
    AND NOT m.pre_minutes IS NULL
    AND NOT m.pre_fare_per_trip IS NULL
    AND NOT m.pre_active_days IS NULL
    AND NOT m.pre_days_since_last IS NULL
)
SELECT
  u.treated,
  COUNT(*) AS n_units,
  SUM(u.w) AS sum_w,
  SUM(u.w * u.x1) AS x1,
  SUM(u.w * u.x1 * u.x1) AS x1_x1,
  SUM(u.w * u.x1 * u.x2) AS x1_x2,
  SUM(u.w * u.x1 * u.x3) AS x1_x3,
  SUM(u.w * u.x1 * u.x4) AS x1_x4,
  SUM(u.w * u.x1 * u.x5) AS x1_x5,
  SUM(u.w * u.x2) AS x2,
  SUM(u.w * u.x2 * u.x2) AS x2_x2,
  SUM(u.w * u.x2 * u.x3) AS x2_x3,
  SUM(u.w * u.x2 * u.x4) AS x2_x4,
  SUM(u.w * u.x2 * u.x5) AS x2_x5,
  SUM(u.w * u.x3) AS x3,
  SUM(u.w * u.x3 * u.x3) AS x3_x3,
  SUM(u.w * u.x3 * u.x4) AS x3_x4,
  SUM(u.w * u.x3 * u.x5) AS x3_x5,
  SUM(u.w * u.x4) AS x4,
  SUM(u.w * u.x4 * u.x4) AS x4_x4,
  SUM(u.w * u.x4 * u.x5) AS x4_x5,
  SUM(u.w * u.x5) AS x5,
  SUM(u.w * u.x5 * u.x5) AS x5_x5,
  SUM(u.w * u.v1) AS v1,
  SUM(u.w * u.x1 * u.v1) AS x1_v1,
  SUM(u.w * u.x2 * u.v1) AS x2_v1,
  SUM(u.w * u.x3 * u.v1) AS x3_v1,
  SUM(u.w * u.x4 * u.v1) AS x4_v1,
  SUM(u.w * u.x5 * u.v1) AS x5_v1,
  SUM(u.w * u.v2) AS v2,
  SUM(u.w * u.x1 * u.v2) AS x1_v2,
  SUM(u.w * u.x2 * u.v2) AS x2_v2,
  SUM(u.w * u.x3 * u.v2) AS x3_v2,
  SUM(u.w * u.x4 * u.v2) AS x4_v2,
  SUM(u.w * u.x5 * u.v2) AS x5_v2,
  SUM(u.w * u.v3) AS v3,
  SUM(u.w * u.x1 * u.v3) AS x1_v3,
  SUM(u.w * u.x2 * u.v3) AS x2_v3,
  SUM(u.w * u.x3 * u.v3) AS x3_v3,
  SUM(u.w * u.x4 * u.v3) AS x4_v3,
  SUM(u.w * u.x5 * u.v3) AS x5_v3,
  SUM(u.w * u.v4) AS v4,
  SUM(u.w * u.x1 * u.v4) AS x1_v4,
  SUM(u.w * u.x2 * u.v4) AS x2_v4,
  SUM(u.w * u.x3 * u.v4) AS x3_v4,
  SUM(u.w * u.x4 * u.v4) AS x4_v4,
  SUM(u.w * u.x5 * u.v4) AS x5_v4,
  SUM(u.w * u.v5) AS v5,
  SUM(u.w * u.x1 * u.v5) AS x1_v5,
  SUM(u.w * u.x2 * u.v5) AS x2_v5,
  SUM(u.w * u.x3 * u.v5) AS x3_v5,
  SUM(u.w * u.x4 * u.v5) AS x4_v5,
  SUM(u.w * u.x5 * u.v5) AS x5_v5,
  SUM(u.w * u.v6) AS v6,
  SUM(u.w * u.x1 * u.v6) AS x1_v6,
  SUM(u.w * u.x2 * u.v6) AS x2_v6,
  SUM(u.w * u.x3 * u.v6) AS x3_v6,
  SUM(u.w * u.x4 * u.v6) AS x4_v6,
  SUM(u.w * u.x5 * u.v6) AS x5_v6
FROM matched AS u
GROUP BY
  u.treated
ORDER BY
  u.treated;
