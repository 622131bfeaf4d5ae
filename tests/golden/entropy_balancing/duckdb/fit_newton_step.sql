/* Entropy balancing, one Newton step of the dual as aggregates (one row). Over the non-enrolled
   units, with z their centred and scaled moment functions and lam the coefficients below:
   top = max lam'z and e = exp(lam'z - top) (at most 1, so no engine overflows), the sums
   s0 = sum e, s1_k = sum e z_k, s2_kl = sum e z_k z_l and sum e^2. sqlmatch computes the dual
   log s0 + top, its gradient s1 / s0 (the weighted means of z, 0 at balance) and Hessian
   s2 / s0 - (s1 / s0)(s1 / s0)', solves for the step and repeats (Hainmueller 2012, Political
   Analysis 20:25). The row also returns lam itself (lam_0, lam_1, ...).
   Moments: z0 = (pre_trips - 7.25) / 6.5; z1 = (pre_minutes - 105.0) / 96.5; z2 = (age_band = '25-34' - 0.375) / 0.5; z3 = (log(1 + pre_trips) - 1.9) / 0.8; z4 = ((age_band = '25-34') * (log(1 + pre_trips)) - 0.7) / 0.9; z5 = ((pre_trips - 7.25)^2 - 52.0) / 60.0. */
WITH design AS (
  SELECT
    (
      CAST(m.pre_trips AS DOUBLE) - 7.25
    ) / 6.5 AS eb__z0,
    (
      CAST(m.pre_minutes AS DOUBLE) - 105.0
    ) / 96.5 AS eb__z1,
    (
      CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END - 0.375
    ) / 0.5 AS eb__z2,
    (
      CAST(LN(1.0 + GREATEST(m.pre_trips, 0.0)) AS DOUBLE) - 1.9
    ) / 0.8 AS eb__z3,
    (
      CAST((
        CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END
      ) * (
        LN(1.0 + GREATEST(m.pre_trips, 0.0))
      ) AS DOUBLE) - 0.7
    ) / 0.9 AS eb__z4,
    (
      (
        CAST(m.pre_trips AS DOUBLE) - 7.25
      ) * (
        CAST(m.pre_trips AS DOUBLE) - 7.25
      ) - 52.0
    ) / 60.0 AS eb__z5
  FROM "sqlmatch".annual_pass_measures AS m
  WHERE
    m.treated = 0
), linear AS (
  SELECT
    d.*,
    0.5 * eb__z0 + -0.125 * eb__z1 + 0.25 * eb__z2 + 0.375 * eb__z3 + -0.25 * eb__z4 + -0.0625 * eb__z5 AS eta
  FROM design AS d
), top AS (
  SELECT
    MAX(eta) AS top
  FROM linear
), exponentiated AS (
  SELECT
    l.*,
    t.top,
    EXP(GREATEST(l.eta - t.top, -300.0)) AS e
  FROM linear AS l
  CROSS JOIN top AS t
)
SELECT
  COUNT(*) AS eb_n_control,
  MAX(top) AS eb_top,
  SUM(e) AS eb_s0,
  SUM(e * e) AS eb_s0_sq,
  SUM(e * eb__z0) AS eb_s1_0,
  SUM(e * eb__z1) AS eb_s1_1,
  SUM(e * eb__z2) AS eb_s1_2,
  SUM(e * eb__z3) AS eb_s1_3,
  SUM(e * eb__z4) AS eb_s1_4,
  SUM(e * eb__z5) AS eb_s1_5,
  SUM(e * eb__z0 * eb__z0) AS eb_s2_0_0,
  SUM(e * eb__z0 * eb__z1) AS eb_s2_0_1,
  SUM(e * eb__z0 * eb__z2) AS eb_s2_0_2,
  SUM(e * eb__z0 * eb__z3) AS eb_s2_0_3,
  SUM(e * eb__z0 * eb__z4) AS eb_s2_0_4,
  SUM(e * eb__z0 * eb__z5) AS eb_s2_0_5,
  SUM(e * eb__z1 * eb__z1) AS eb_s2_1_1,
  SUM(e * eb__z1 * eb__z2) AS eb_s2_1_2,
  SUM(e * eb__z1 * eb__z3) AS eb_s2_1_3,
  SUM(e * eb__z1 * eb__z4) AS eb_s2_1_4,
  SUM(e * eb__z1 * eb__z5) AS eb_s2_1_5,
  SUM(e * eb__z2 * eb__z2) AS eb_s2_2_2,
  SUM(e * eb__z2 * eb__z3) AS eb_s2_2_3,
  SUM(e * eb__z2 * eb__z4) AS eb_s2_2_4,
  SUM(e * eb__z2 * eb__z5) AS eb_s2_2_5,
  SUM(e * eb__z3 * eb__z3) AS eb_s2_3_3,
  SUM(e * eb__z3 * eb__z4) AS eb_s2_3_4,
  SUM(e * eb__z3 * eb__z5) AS eb_s2_3_5,
  SUM(e * eb__z4 * eb__z4) AS eb_s2_4_4,
  SUM(e * eb__z4 * eb__z5) AS eb_s2_4_5,
  SUM(e * eb__z5 * eb__z5) AS eb_s2_5_5,
  0.5 AS eb_lam_0,
  -0.125 AS eb_lam_1,
  0.25 AS eb_lam_2,
  0.375 AS eb_lam_3,
  -0.25 AS eb_lam_4,
  -0.0625 AS eb_lam_5
FROM exponentiated;
