-- sqlmatch study 'annual_pass', step 25: matching_variance (postgres)
-- Abadie-Imbens variance sums: squared matching weights (times each control is used) times conditional variances estimated from each unit's nearest units of the same group (tied ones averaged), summed per tie set.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_nearest_neighbour_units, sqlmatch.annual_pass_weighted_units, sqlmatch.annual_pass_nearest_neighbour_matches
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Nearest-neighbour matching with replacement: the sums of the Abadie & Imbens (2006) variance of
   the effect on the treated, which counts how often each control is used.
     V = (1 / N_1^2) sum_i w_i^2 sigma2_i    over the matched units,
   w_i = 1 for a treated unit, a control's summed matching weight (K_M(i) / M: the times it is used
   over the number of matches per treated unit); sigma2_i, the conditional variance of the
   outcome at the unit's features, is estimated by matching within the unit's own group: with its
   nearest other units of the same group and exact block (age_band) on the logit score
   (scores compared at 10 decimal places), sigma2_i = (y_i - y_l)^2 / 2 for a nearest unit l (one
   match; J / (J + 1) with J = 1), averaged over every unit as near as the nearest: a unit that
   shares its score with others takes the mean over them (distance 0); a unit alone at its score
   takes the mean over the units of the nearer adjacent score (of both when they are equally near).
   So no key order decides which of several tied units serves.
   How: the units are grouped into tie sets (group, block, score), one row each with the sums over
   its units of v_a and v_a v_b, unweighted and weighted by wt = m (1 for a matched unit, else 0),
   w^2 and share2; a window over the tie sets (not over the units) gives each its neighbour set S
   (itself when it holds two or more units, else the nearer adjacent one or both). With n_S units
   in S and A, B, AB its sums of v_a, v_b, v_a v_b, a tie set's sum over its units of wt sigma2_ab is
     (n_S sum wt v_a v_b - B sum wt v_a - A sum wt v_b + AB sum wt) / (2 q),
   q = n_S - 1 when S is the set itself, n_S otherwise (the unit's own term is 0). These are summed
   weighted by w^2 and share2 over the matched units, and by m over the matched units that have a
   neighbour (a unit alone in its group and block borrows their mean).
   For the population variance a control's w^2 splits into the part already in the treated units'
   squared matched differences, share2 = sum over the treated units it serves of its share squared, and
   the rest (w^2 - share2, K_M(i)(K_M(i) - 1) / M^2 without ties): the products are also summed
   weighted by share2.
   One row per group. */
WITH reuse AS (
  SELECT
    u.unit_key AS control_key,
    g.share2
  FROM (
    SELECT
      m.control_group,
      m.age_band,
      SUM(m.share * m.share) AS share2
    FROM "sqlmatch".annual_pass_nearest_neighbour_matches AS m
    GROUP BY
      m.control_group,
      m.age_band
  ) AS g
  INNER JOIN "sqlmatch".annual_pass_nearest_neighbour_units AS u
    ON u.treated = 0 AND u.control_group = g.control_group AND u.age_band = g.age_band
), units AS (
  SELECT
    s.treated,
    COALESCE(s.age_band, '(missing)') AS age_band,
    s.score_compared AS score,
    CAST(w.post_trips AS DOUBLE PRECISION) AS v1,
    CAST(w.post_trips - w.pre_trips AS DOUBLE PRECISION) AS v2,
    CAST(w.post_minutes AS DOUBLE PRECISION) AS v3,
    CAST(w.fare_per_trip__num AS DOUBLE PRECISION) AS v4,
    CAST(w.fare_per_trip__den AS DOUBLE PRECISION) AS v5,
    CAST(w.active_last_month AS DOUBLE PRECISION) AS v6,
    CAST(w.pre_trips AS DOUBLE PRECISION) AS v7,
    CAST(w.pre_minutes AS DOUBLE PRECISION) AS v8,
    CAST(w.pre_fare_per_trip AS DOUBLE PRECISION) AS v9,
    CAST(w.pre_active_days AS DOUBLE PRECISION) AS v10,
    CAST(w.pre_days_since_last AS DOUBLE PRECISION) AS v11,
    CASE WHEN w.match__weight IS NULL THEN 0.0 ELSE 1.0 END AS m,
    COALESCE(w.match__weight, 0.0) AS w,
    COALESCE(w.match__weight * w.match__weight, 0.0) AS w2,
    CASE
      WHEN s.treated = 0 AND NOT w.match__weight IS NULL
      THEN COALESCE(r.share2, 0.0)
      ELSE 0.0
    END AS s2
  FROM "sqlmatch".annual_pass_nearest_neighbour_units AS s
  INNER JOIN "sqlmatch".annual_pass_weighted_units AS w
    ON w.unit_key = s.unit_key
  LEFT JOIN reuse AS r
    ON r.control_key = s.unit_key
  WHERE
    NOT s.score IS NULL
), tie_sets AS (
  SELECT
    u.treated,
    u.age_band,
    u.score,
    COUNT(*) AS n,
    SUM(u.w) AS sum_w,
    SUM(u.v1) AS u_1,
    SUM(u.m * u.v1) AS m_1,
    SUM(u.w2 * u.v1) AS w2_1,
    SUM(u.s2 * u.v1) AS s2_1,
    SUM(u.v2) AS u_2,
    SUM(u.m * u.v2) AS m_2,
    SUM(u.w2 * u.v2) AS w2_2,
    SUM(u.s2 * u.v2) AS s2_2,
    SUM(u.v3) AS u_3,
    SUM(u.m * u.v3) AS m_3,
    SUM(u.w2 * u.v3) AS w2_3,
    SUM(u.s2 * u.v3) AS s2_3,
    SUM(u.v4) AS u_4,
    SUM(u.m * u.v4) AS m_4,
    SUM(u.w2 * u.v4) AS w2_4,
    SUM(u.s2 * u.v4) AS s2_4,
    SUM(u.v5) AS u_5,
    SUM(u.m * u.v5) AS m_5,
    SUM(u.w2 * u.v5) AS w2_5,
    SUM(u.s2 * u.v5) AS s2_5,
    SUM(u.v6) AS u_6,
    SUM(u.m * u.v6) AS m_6,
    SUM(u.w2 * u.v6) AS w2_6,
    SUM(u.s2 * u.v6) AS s2_6,
    SUM(u.v7) AS u_7,
    SUM(u.m * u.v7) AS m_7,
    SUM(u.w2 * u.v7) AS w2_7,
    SUM(u.s2 * u.v7) AS s2_7,
    SUM(u.v8) AS u_8,
    SUM(u.m * u.v8) AS m_8,
    SUM(u.w2 * u.v8) AS w2_8,
    SUM(u.s2 * u.v8) AS s2_8,
    SUM(u.v9) AS u_9,
    SUM(u.m * u.v9) AS m_9,
    SUM(u.w2 * u.v9) AS w2_9,
    SUM(u.s2 * u.v9) AS s2_9,
    SUM(u.v10) AS u_10,
    SUM(u.m * u.v10) AS m_10,
    SUM(u.w2 * u.v10) AS w2_10,
    SUM(u.s2 * u.v10) AS s2_10,
    SUM(u.v11) AS u_11,
    SUM(u.m * u.v11) AS m_11,
    SUM(u.w2 * u.v11) AS w2_11,
    SUM(u.s2 * u.v11) AS s2_11,
    SUM(u.v1 * u.v1) AS u_1_1,
    SUM(u.m * u.v1 * u.v1) AS m_1_1,
    SUM(u.w2 * u.v1 * u.v1) AS w2_1_1,
    SUM(u.s2 * u.v1 * u.v1) AS s2_1_1,
    SUM(u.v2 * u.v2) AS u_2_2,
    SUM(u.m * u.v2 * u.v2) AS m_2_2,
    SUM(u.w2 * u.v2 * u.v2) AS w2_2_2,
    SUM(u.s2 * u.v2 * u.v2) AS s2_2_2,
    SUM(u.v3 * u.v3) AS u_3_3,
    SUM(u.m * u.v3 * u.v3) AS m_3_3,
    SUM(u.w2 * u.v3 * u.v3) AS w2_3_3,
    SUM(u.s2 * u.v3 * u.v3) AS s2_3_3,
    SUM(u.v4 * u.v4) AS u_4_4,
    SUM(u.m * u.v4 * u.v4) AS m_4_4,
    SUM(u.w2 * u.v4 * u.v4) AS w2_4_4,
    SUM(u.s2 * u.v4 * u.v4) AS s2_4_4,
    SUM(u.v4 * u.v5) AS u_4_5,
    SUM(u.m * u.v4 * u.v5) AS m_4_5,
    SUM(u.w2 * u.v4 * u.v5) AS w2_4_5,
    SUM(u.s2 * u.v4 * u.v5) AS s2_4_5,
    SUM(u.v5 * u.v5) AS u_5_5,
    SUM(u.m * u.v5 * u.v5) AS m_5_5,
    SUM(u.w2 * u.v5 * u.v5) AS w2_5_5,
    SUM(u.s2 * u.v5 * u.v5) AS s2_5_5,
    SUM(u.v6 * u.v6) AS u_6_6,
    SUM(u.m * u.v6 * u.v6) AS m_6_6,
    SUM(u.w2 * u.v6 * u.v6) AS w2_6_6,
    SUM(u.s2 * u.v6 * u.v6) AS s2_6_6,
    SUM(u.v1 * u.v7) AS u_1_7,
    SUM(u.m * u.v1 * u.v7) AS m_1_7,
    SUM(u.w2 * u.v1 * u.v7) AS w2_1_7,
    SUM(u.s2 * u.v1 * u.v7) AS s2_1_7,
    SUM(u.v1 * u.v8) AS u_1_8,
    SUM(u.m * u.v1 * u.v8) AS m_1_8,
    SUM(u.w2 * u.v1 * u.v8) AS w2_1_8,
    SUM(u.s2 * u.v1 * u.v8) AS s2_1_8,
    SUM(u.v1 * u.v9) AS u_1_9,
    SUM(u.m * u.v1 * u.v9) AS m_1_9,
    SUM(u.w2 * u.v1 * u.v9) AS w2_1_9,
    SUM(u.s2 * u.v1 * u.v9) AS s2_1_9,
    SUM(u.v1 * u.v10) AS u_1_10,
    SUM(u.m * u.v1 * u.v10) AS m_1_10,
    SUM(u.w2 * u.v1 * u.v10) AS w2_1_10,
    SUM(u.s2 * u.v1 * u.v10) AS s2_1_10,
    SUM(u.v1 * u.v11) AS u_1_11,
    SUM(u.m * u.v1 * u.v11) AS m_1_11,
    SUM(u.w2 * u.v1 * u.v11) AS w2_1_11,
    SUM(u.s2 * u.v1 * u.v11) AS s2_1_11,
    SUM(u.v2 * u.v7) AS u_2_7,
    SUM(u.m * u.v2 * u.v7) AS m_2_7,
    SUM(u.w2 * u.v2 * u.v7) AS w2_2_7,
    SUM(u.s2 * u.v2 * u.v7) AS s2_2_7,
    SUM(u.v2 * u.v8) AS u_2_8,
    SUM(u.m * u.v2 * u.v8) AS m_2_8,
    SUM(u.w2 * u.v2 * u.v8) AS w2_2_8,
    SUM(u.s2 * u.v2 * u.v8) AS s2_2_8,
    SUM(u.v2 * u.v9) AS u_2_9,
    SUM(u.m * u.v2 * u.v9) AS m_2_9,
    SUM(u.w2 * u.v2 * u.v9) AS w2_2_9,
    SUM(u.s2 * u.v2 * u.v9) AS s2_2_9,
    SUM(u.v2 * u.v10) AS u_2_10,
    SUM(u.m * u.v2 * u.v10) AS m_2_10,
    SUM(u.w2 * u.v2 * u.v10) AS w2_2_10,
    SUM(u.s2 * u.v2 * u.v10) AS s2_2_10,
    SUM(u.v2 * u.v11) AS u_2_11,
    SUM(u.m * u.v2 * u.v11) AS m_2_11,
    SUM(u.w2 * u.v2 * u.v11) AS w2_2_11,
    SUM(u.s2 * u.v2 * u.v11) AS s2_2_11,
    SUM(u.v3 * u.v7) AS u_3_7,
    SUM(u.m * u.v3 * u.v7) AS m_3_7,
    SUM(u.w2 * u.v3 * u.v7) AS w2_3_7,
    SUM(u.s2 * u.v3 * u.v7) AS s2_3_7,
    SUM(u.v3 * u.v8) AS u_3_8,
    SUM(u.m * u.v3 * u.v8) AS m_3_8,
    SUM(u.w2 * u.v3 * u.v8) AS w2_3_8,
    SUM(u.s2 * u.v3 * u.v8) AS s2_3_8,
    SUM(u.v3 * u.v9) AS u_3_9,
    SUM(u.m * u.v3 * u.v9) AS m_3_9,
    SUM(u.w2 * u.v3 * u.v9) AS w2_3_9,
    SUM(u.s2 * u.v3 * u.v9) AS s2_3_9,
    SUM(u.v3 * u.v10) AS u_3_10,
    SUM(u.m * u.v3 * u.v10) AS m_3_10,
    SUM(u.w2 * u.v3 * u.v10) AS w2_3_10,
    SUM(u.s2 * u.v3 * u.v10) AS s2_3_10,
    SUM(u.v3 * u.v11) AS u_3_11,
    SUM(u.m * u.v3 * u.v11) AS m_3_11,
    SUM(u.w2 * u.v3 * u.v11) AS w2_3_11,
    SUM(u.s2 * u.v3 * u.v11) AS s2_3_11,
    SUM(u.v4 * u.v7) AS u_4_7,
    SUM(u.m * u.v4 * u.v7) AS m_4_7,
    SUM(u.w2 * u.v4 * u.v7) AS w2_4_7,
    SUM(u.s2 * u.v4 * u.v7) AS s2_4_7,
    SUM(u.v4 * u.v8) AS u_4_8,
    SUM(u.m * u.v4 * u.v8) AS m_4_8,
    SUM(u.w2 * u.v4 * u.v8) AS w2_4_8,
    SUM(u.s2 * u.v4 * u.v8) AS s2_4_8,
    SUM(u.v4 * u.v9) AS u_4_9,
    SUM(u.m * u.v4 * u.v9) AS m_4_9,
    SUM(u.w2 * u.v4 * u.v9) AS w2_4_9,
    SUM(u.s2 * u.v4 * u.v9) AS s2_4_9,
    SUM(u.v4 * u.v10) AS u_4_10,
    SUM(u.m * u.v4 * u.v10) AS m_4_10,
    SUM(u.w2 * u.v4 * u.v10) AS w2_4_10,
    SUM(u.s2 * u.v4 * u.v10) AS s2_4_10,
    SUM(u.v4 * u.v11) AS u_4_11,
    SUM(u.m * u.v4 * u.v11) AS m_4_11,
    SUM(u.w2 * u.v4 * u.v11) AS w2_4_11,
    SUM(u.s2 * u.v4 * u.v11) AS s2_4_11,
    SUM(u.v5 * u.v7) AS u_5_7,
    SUM(u.m * u.v5 * u.v7) AS m_5_7,
    SUM(u.w2 * u.v5 * u.v7) AS w2_5_7,
    SUM(u.s2 * u.v5 * u.v7) AS s2_5_7,
    SUM(u.v5 * u.v8) AS u_5_8,
    SUM(u.m * u.v5 * u.v8) AS m_5_8,
    SUM(u.w2 * u.v5 * u.v8) AS w2_5_8,
    SUM(u.s2 * u.v5 * u.v8) AS s2_5_8,
    SUM(u.v5 * u.v9) AS u_5_9,
    SUM(u.m * u.v5 * u.v9) AS m_5_9,
    SUM(u.w2 * u.v5 * u.v9) AS w2_5_9,
    SUM(u.s2 * u.v5 * u.v9) AS s2_5_9,
    SUM(u.v5 * u.v10) AS u_5_10,
    SUM(u.m * u.v5 * u.v10) AS m_5_10,
    SUM(u.w2 * u.v5 * u.v10) AS w2_5_10,
    SUM(u.s2 * u.v5 * u.v10) AS s2_5_10,
    SUM(u.v5 * u.v11) AS u_5_11,
    SUM(u.m * u.v5 * u.v11) AS m_5_11,
    SUM(u.w2 * u.v5 * u.v11) AS w2_5_11,
    SUM(u.s2 * u.v5 * u.v11) AS s2_5_11,
    SUM(u.v6 * u.v7) AS u_6_7,
    SUM(u.m * u.v6 * u.v7) AS m_6_7,
    SUM(u.w2 * u.v6 * u.v7) AS w2_6_7,
    SUM(u.s2 * u.v6 * u.v7) AS s2_6_7,
    SUM(u.v6 * u.v8) AS u_6_8,
    SUM(u.m * u.v6 * u.v8) AS m_6_8,
    SUM(u.w2 * u.v6 * u.v8) AS w2_6_8,
    SUM(u.s2 * u.v6 * u.v8) AS s2_6_8,
    SUM(u.v6 * u.v9) AS u_6_9,
    SUM(u.m * u.v6 * u.v9) AS m_6_9,
    SUM(u.w2 * u.v6 * u.v9) AS w2_6_9,
    SUM(u.s2 * u.v6 * u.v9) AS s2_6_9,
    SUM(u.v6 * u.v10) AS u_6_10,
    SUM(u.m * u.v6 * u.v10) AS m_6_10,
    SUM(u.w2 * u.v6 * u.v10) AS w2_6_10,
    SUM(u.s2 * u.v6 * u.v10) AS s2_6_10,
    SUM(u.v6 * u.v11) AS u_6_11,
    SUM(u.m * u.v6 * u.v11) AS m_6_11,
    SUM(u.w2 * u.v6 * u.v11) AS w2_6_11,
    SUM(u.s2 * u.v6 * u.v11) AS s2_6_11,
    SUM(u.v7 * u.v7) AS u_7_7,
    SUM(u.m * u.v7 * u.v7) AS m_7_7,
    SUM(u.w2 * u.v7 * u.v7) AS w2_7_7,
    SUM(u.s2 * u.v7 * u.v7) AS s2_7_7,
    SUM(u.v7 * u.v8) AS u_7_8,
    SUM(u.m * u.v7 * u.v8) AS m_7_8,
    SUM(u.w2 * u.v7 * u.v8) AS w2_7_8,
    SUM(u.s2 * u.v7 * u.v8) AS s2_7_8,
    SUM(u.v7 * u.v9) AS u_7_9,
    SUM(u.m * u.v7 * u.v9) AS m_7_9,
    SUM(u.w2 * u.v7 * u.v9) AS w2_7_9,
    SUM(u.s2 * u.v7 * u.v9) AS s2_7_9,
    SUM(u.v7 * u.v10) AS u_7_10,
    SUM(u.m * u.v7 * u.v10) AS m_7_10,
    SUM(u.w2 * u.v7 * u.v10) AS w2_7_10,
    SUM(u.s2 * u.v7 * u.v10) AS s2_7_10,
    SUM(u.v7 * u.v11) AS u_7_11,
    SUM(u.m * u.v7 * u.v11) AS m_7_11,
    SUM(u.w2 * u.v7 * u.v11) AS w2_7_11,
    SUM(u.s2 * u.v7 * u.v11) AS s2_7_11,
    SUM(u.v8 * u.v8) AS u_8_8,
    SUM(u.m * u.v8 * u.v8) AS m_8_8,
    SUM(u.w2 * u.v8 * u.v8) AS w2_8_8,
    SUM(u.s2 * u.v8 * u.v8) AS s2_8_8,
    SUM(u.v8 * u.v9) AS u_8_9,
    SUM(u.m * u.v8 * u.v9) AS m_8_9,
    SUM(u.w2 * u.v8 * u.v9) AS w2_8_9,
    SUM(u.s2 * u.v8 * u.v9) AS s2_8_9,
    SUM(u.v8 * u.v10) AS u_8_10,
    SUM(u.m * u.v8 * u.v10) AS m_8_10,
    SUM(u.w2 * u.v8 * u.v10) AS w2_8_10,
    SUM(u.s2 * u.v8 * u.v10) AS s2_8_10,
    SUM(u.v8 * u.v11) AS u_8_11,
    SUM(u.m * u.v8 * u.v11) AS m_8_11,
    SUM(u.w2 * u.v8 * u.v11) AS w2_8_11,
    SUM(u.s2 * u.v8 * u.v11) AS s2_8_11,
    SUM(u.v9 * u.v9) AS u_9_9,
    SUM(u.m * u.v9 * u.v9) AS m_9_9,
    SUM(u.w2 * u.v9 * u.v9) AS w2_9_9,
    SUM(u.s2 * u.v9 * u.v9) AS s2_9_9,
    SUM(u.v9 * u.v10) AS u_9_10,
    SUM(u.m * u.v9 * u.v10) AS m_9_10,
    SUM(u.w2 * u.v9 * u.v10) AS w2_9_10,
    SUM(u.s2 * u.v9 * u.v10) AS s2_9_10,
    SUM(u.v9 * u.v11) AS u_9_11,
    SUM(u.m * u.v9 * u.v11) AS m_9_11,
    SUM(u.w2 * u.v9 * u.v11) AS w2_9_11,
    SUM(u.s2 * u.v9 * u.v11) AS s2_9_11,
    SUM(u.v10 * u.v10) AS u_10_10,
    SUM(u.m * u.v10 * u.v10) AS m_10_10,
    SUM(u.w2 * u.v10 * u.v10) AS w2_10_10,
    SUM(u.s2 * u.v10 * u.v10) AS s2_10_10,
    SUM(u.v10 * u.v11) AS u_10_11,
    SUM(u.m * u.v10 * u.v11) AS m_10_11,
    SUM(u.w2 * u.v10 * u.v11) AS w2_10_11,
    SUM(u.s2 * u.v10 * u.v11) AS s2_10_11,
    SUM(u.v11 * u.v11) AS u_11_11,
    SUM(u.m * u.v11 * u.v11) AS m_11_11,
    SUM(u.w2 * u.v11 * u.v11) AS w2_11_11,
    SUM(u.s2 * u.v11 * u.v11) AS s2_11_11,
    SUM(u.m) AS m_n,
    SUM(u.w2) AS w2_n,
    SUM(u.s2) AS s2_n
  FROM units AS u
  GROUP BY
    u.treated,
    u.age_band,
    u.score
), ordered AS (
  SELECT
    t.treated,
    t.age_band,
    t.sum_w,
    t.n,
    t.u_1,
    t.u_2,
    t.u_3,
    t.u_4,
    t.u_5,
    t.u_6,
    t.u_7,
    t.u_8,
    t.u_9,
    t.u_10,
    t.u_11,
    t.u_1_1,
    t.u_2_2,
    t.u_3_3,
    t.u_4_4,
    t.u_4_5,
    t.u_5_5,
    t.u_6_6,
    t.u_1_7,
    t.u_1_8,
    t.u_1_9,
    t.u_1_10,
    t.u_1_11,
    t.u_2_7,
    t.u_2_8,
    t.u_2_9,
    t.u_2_10,
    t.u_2_11,
    t.u_3_7,
    t.u_3_8,
    t.u_3_9,
    t.u_3_10,
    t.u_3_11,
    t.u_4_7,
    t.u_4_8,
    t.u_4_9,
    t.u_4_10,
    t.u_4_11,
    t.u_5_7,
    t.u_5_8,
    t.u_5_9,
    t.u_5_10,
    t.u_5_11,
    t.u_6_7,
    t.u_6_8,
    t.u_6_9,
    t.u_6_10,
    t.u_6_11,
    t.u_7_7,
    t.u_7_8,
    t.u_7_9,
    t.u_7_10,
    t.u_7_11,
    t.u_8_8,
    t.u_8_9,
    t.u_8_10,
    t.u_8_11,
    t.u_9_9,
    t.u_9_10,
    t.u_9_11,
    t.u_10_10,
    t.u_10_11,
    t.u_11_11,
    t.m_n,
    t.m_1,
    t.m_2,
    t.m_3,
    t.m_4,
    t.m_5,
    t.m_6,
    t.m_7,
    t.m_8,
    t.m_9,
    t.m_10,
    t.m_11,
    t.m_1_1,
    t.m_2_2,
    t.m_3_3,
    t.m_4_4,
    t.m_4_5,
    t.m_5_5,
    t.m_6_6,
    t.m_1_7,
    t.m_1_8,
    t.m_1_9,
    t.m_1_10,
    t.m_1_11,
    t.m_2_7,
    t.m_2_8,
    t.m_2_9,
    t.m_2_10,
    t.m_2_11,
    t.m_3_7,
    t.m_3_8,
    t.m_3_9,
    t.m_3_10,
    t.m_3_11,
    t.m_4_7,
    t.m_4_8,
    t.m_4_9,
    t.m_4_10,
    t.m_4_11,
    t.m_5_7,
    t.m_5_8,
    t.m_5_9,
    t.m_5_10,
    t.m_5_11,
    t.m_6_7,
    t.m_6_8,
    t.m_6_9,
    t.m_6_10,
    t.m_6_11,
    t.m_7_7,
    t.m_7_8,
    t.m_7_9,
    t.m_7_10,
    t.m_7_11,
    t.m_8_8,
    t.m_8_9,
    t.m_8_10,
    t.m_8_11,
    t.m_9_9,
    t.m_9_10,
    t.m_9_11,
    t.m_10_10,
    t.m_10_11,
    t.m_11_11,
    t.w2_n,
    t.w2_1,
    t.w2_2,
    t.w2_3,
    t.w2_4,
    t.w2_5,
    t.w2_6,
    t.w2_7,
    t.w2_8,
    t.w2_9,
    t.w2_10,
    t.w2_11,
    t.w2_1_1,
    t.w2_2_2,
    t.w2_3_3,
    t.w2_4_4,
    t.w2_4_5,
    t.w2_5_5,
    t.w2_6_6,
    t.w2_1_7,
    t.w2_1_8,
    t.w2_1_9,
    t.w2_1_10,
    t.w2_1_11,
    t.w2_2_7,
    t.w2_2_8,
    t.w2_2_9,
    t.w2_2_10,
    t.w2_2_11,
    t.w2_3_7,
    t.w2_3_8,
    t.w2_3_9,
    t.w2_3_10,
    t.w2_3_11,
    t.w2_4_7,
    t.w2_4_8,
    t.w2_4_9,
    t.w2_4_10,
    t.w2_4_11,
    t.w2_5_7,
    t.w2_5_8,
    t.w2_5_9,
    t.w2_5_10,
    t.w2_5_11,
    t.w2_6_7,
    t.w2_6_8,
    t.w2_6_9,
    t.w2_6_10,
    t.w2_6_11,
    t.w2_7_7,
    t.w2_7_8,
    t.w2_7_9,
    t.w2_7_10,
    t.w2_7_11,
    t.w2_8_8,
    t.w2_8_9,
    t.w2_8_10,
    t.w2_8_11,
    t.w2_9_9,
    t.w2_9_10,
    t.w2_9_11,
    t.w2_10_10,
    t.w2_10_11,
    t.w2_11_11,
    t.s2_n,
    t.s2_1,
    t.s2_2,
    t.s2_3,
    t.s2_4,
    t.s2_5,
    t.s2_6,
    t.s2_7,
    t.s2_8,
    t.s2_9,
    t.s2_10,
    t.s2_11,
    t.s2_1_1,
    t.s2_2_2,
    t.s2_3_3,
    t.s2_4_4,
    t.s2_4_5,
    t.s2_5_5,
    t.s2_6_6,
    t.s2_1_7,
    t.s2_1_8,
    t.s2_1_9,
    t.s2_1_10,
    t.s2_1_11,
    t.s2_2_7,
    t.s2_2_8,
    t.s2_2_9,
    t.s2_2_10,
    t.s2_2_11,
    t.s2_3_7,
    t.s2_3_8,
    t.s2_3_9,
    t.s2_3_10,
    t.s2_3_11,
    t.s2_4_7,
    t.s2_4_8,
    t.s2_4_9,
    t.s2_4_10,
    t.s2_4_11,
    t.s2_5_7,
    t.s2_5_8,
    t.s2_5_9,
    t.s2_5_10,
    t.s2_5_11,
    t.s2_6_7,
    t.s2_6_8,
    t.s2_6_9,
    t.s2_6_10,
    t.s2_6_11,
    t.s2_7_7,
    t.s2_7_8,
    t.s2_7_9,
    t.s2_7_10,
    t.s2_7_11,
    t.s2_8_8,
    t.s2_8_9,
    t.s2_8_10,
    t.s2_8_11,
    t.s2_9_9,
    t.s2_9_10,
    t.s2_9_11,
    t.s2_10_10,
    t.s2_10_11,
    t.s2_11_11,
    t.score - LAG(t.score) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS gap_before,
    LEAD(t.score) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) - t.score AS gap_after,
    LAG(t.n) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS n__before,
    LEAD(t.n) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS n__after,
    LAG(t.u_1) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1__before,
    LEAD(t.u_1) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1__after,
    LAG(t.u_2) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2__before,
    LEAD(t.u_2) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2__after,
    LAG(t.u_3) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3__before,
    LEAD(t.u_3) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3__after,
    LAG(t.u_4) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4__before,
    LEAD(t.u_4) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4__after,
    LAG(t.u_5) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5__before,
    LEAD(t.u_5) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5__after,
    LAG(t.u_6) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6__before,
    LEAD(t.u_6) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6__after,
    LAG(t.u_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7__before,
    LEAD(t.u_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7__after,
    LAG(t.u_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8__before,
    LEAD(t.u_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8__after,
    LAG(t.u_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_9__before,
    LEAD(t.u_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_9__after,
    LAG(t.u_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_10__before,
    LEAD(t.u_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_10__after,
    LAG(t.u_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_11__before,
    LEAD(t.u_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_11__after,
    LAG(t.u_1_1) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_1__before,
    LEAD(t.u_1_1) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_1__after,
    LAG(t.u_2_2) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_2__before,
    LEAD(t.u_2_2) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_2__after,
    LAG(t.u_3_3) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_3__before,
    LEAD(t.u_3_3) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_3__after,
    LAG(t.u_4_4) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_4__before,
    LEAD(t.u_4_4) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_4__after,
    LAG(t.u_4_5) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_5__before,
    LEAD(t.u_4_5) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_5__after,
    LAG(t.u_5_5) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_5__before,
    LEAD(t.u_5_5) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_5__after,
    LAG(t.u_6_6) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_6__before,
    LEAD(t.u_6_6) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_6__after,
    LAG(t.u_1_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_7__before,
    LEAD(t.u_1_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_7__after,
    LAG(t.u_1_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_8__before,
    LEAD(t.u_1_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_8__after,
    LAG(t.u_1_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_9__before,
    LEAD(t.u_1_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_9__after,
    LAG(t.u_1_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_10__before,
    LEAD(t.u_1_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_10__after,
    LAG(t.u_1_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_11__before,
    LEAD(t.u_1_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_1_11__after,
    LAG(t.u_2_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_7__before,
    LEAD(t.u_2_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_7__after,
    LAG(t.u_2_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_8__before,
    LEAD(t.u_2_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_8__after,
    LAG(t.u_2_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_9__before,
    LEAD(t.u_2_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_9__after,
    LAG(t.u_2_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_10__before,
    LEAD(t.u_2_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_10__after,
    LAG(t.u_2_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_11__before,
    LEAD(t.u_2_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_2_11__after,
    LAG(t.u_3_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_7__before,
    LEAD(t.u_3_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_7__after,
    LAG(t.u_3_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_8__before,
    LEAD(t.u_3_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_8__after,
    LAG(t.u_3_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_9__before,
    LEAD(t.u_3_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_9__after,
    LAG(t.u_3_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_10__before,
    LEAD(t.u_3_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_10__after,
    LAG(t.u_3_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_11__before,
    LEAD(t.u_3_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_3_11__after,
    LAG(t.u_4_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_7__before,
    LEAD(t.u_4_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_7__after,
    LAG(t.u_4_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_8__before,
    LEAD(t.u_4_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_8__after,
    LAG(t.u_4_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_9__before,
    LEAD(t.u_4_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_9__after,
    LAG(t.u_4_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_10__before,
    LEAD(t.u_4_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_10__after,
    LAG(t.u_4_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_11__before,
    LEAD(t.u_4_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_4_11__after,
    LAG(t.u_5_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_7__before,
    LEAD(t.u_5_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_7__after,
    LAG(t.u_5_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_8__before,
    LEAD(t.u_5_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_8__after,
    LAG(t.u_5_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_9__before,
    LEAD(t.u_5_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_9__after,
    LAG(t.u_5_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_10__before,
    LEAD(t.u_5_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_10__after,
    LAG(t.u_5_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_11__before,
    LEAD(t.u_5_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_5_11__after,
    LAG(t.u_6_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_7__before,
    LEAD(t.u_6_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_7__after,
    LAG(t.u_6_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_8__before,
    LEAD(t.u_6_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_8__after,
    LAG(t.u_6_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_9__before,
    LEAD(t.u_6_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_9__after,
    LAG(t.u_6_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_10__before,
    LEAD(t.u_6_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_10__after,
    LAG(t.u_6_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_11__before,
    LEAD(t.u_6_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_6_11__after,
    LAG(t.u_7_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_7__before,
    LEAD(t.u_7_7) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_7__after,
    LAG(t.u_7_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_8__before,
    LEAD(t.u_7_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_8__after,
    LAG(t.u_7_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_9__before,
    LEAD(t.u_7_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_9__after,
    LAG(t.u_7_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_10__before,
    LEAD(t.u_7_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_10__after,
    LAG(t.u_7_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_11__before,
    LEAD(t.u_7_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_7_11__after,
    LAG(t.u_8_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8_8__before,
    LEAD(t.u_8_8) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8_8__after,
    LAG(t.u_8_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8_9__before,
    LEAD(t.u_8_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8_9__after,
    LAG(t.u_8_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8_10__before,
    LEAD(t.u_8_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8_10__after,
    LAG(t.u_8_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8_11__before,
    LEAD(t.u_8_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_8_11__after,
    LAG(t.u_9_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_9_9__before,
    LEAD(t.u_9_9) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_9_9__after,
    LAG(t.u_9_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_9_10__before,
    LEAD(t.u_9_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_9_10__after,
    LAG(t.u_9_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_9_11__before,
    LEAD(t.u_9_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_9_11__after,
    LAG(t.u_10_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_10_10__before,
    LEAD(t.u_10_10) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_10_10__after,
    LAG(t.u_10_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_10_11__before,
    LEAD(t.u_10_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_10_11__after,
    LAG(t.u_11_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_11_11__before,
    LEAD(t.u_11_11) OVER (PARTITION BY t.treated, t.age_band ORDER BY t.score) AS u_11_11__after
  FROM tie_sets AS t
), sided AS (
  /* side: 1 = the tie set itself (two or more units), 2 = the adjacent lower score, 3 = the adjacent
     higher one (whichever is nearer), 4 = both (equally near), 0 = no other unit in the group and block */
  SELECT
    o.*,
    CASE
      WHEN o.n >= 2
      THEN 1
      WHEN o.gap_before IS NULL AND o.gap_after IS NULL
      THEN 0
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before < o.gap_after
      )
      THEN 2
      WHEN o.gap_before IS NULL OR o.gap_after < o.gap_before
      THEN 3
      ELSE 4
    END AS side
  FROM ordered AS o
), neighbours AS (
  SELECT
    d.treated,
    d.side,
    d.sum_w,
    d.m_n,
    d.m_1,
    d.m_2,
    d.m_3,
    d.m_4,
    d.m_5,
    d.m_6,
    d.m_7,
    d.m_8,
    d.m_9,
    d.m_10,
    d.m_11,
    d.m_1_1,
    d.m_2_2,
    d.m_3_3,
    d.m_4_4,
    d.m_4_5,
    d.m_5_5,
    d.m_6_6,
    d.m_1_7,
    d.m_1_8,
    d.m_1_9,
    d.m_1_10,
    d.m_1_11,
    d.m_2_7,
    d.m_2_8,
    d.m_2_9,
    d.m_2_10,
    d.m_2_11,
    d.m_3_7,
    d.m_3_8,
    d.m_3_9,
    d.m_3_10,
    d.m_3_11,
    d.m_4_7,
    d.m_4_8,
    d.m_4_9,
    d.m_4_10,
    d.m_4_11,
    d.m_5_7,
    d.m_5_8,
    d.m_5_9,
    d.m_5_10,
    d.m_5_11,
    d.m_6_7,
    d.m_6_8,
    d.m_6_9,
    d.m_6_10,
    d.m_6_11,
    d.m_7_7,
    d.m_7_8,
    d.m_7_9,
    d.m_7_10,
    d.m_7_11,
    d.m_8_8,
    d.m_8_9,
    d.m_8_10,
    d.m_8_11,
    d.m_9_9,
    d.m_9_10,
    d.m_9_11,
    d.m_10_10,
    d.m_10_11,
    d.m_11_11,
    d.w2_n,
    d.w2_1,
    d.w2_2,
    d.w2_3,
    d.w2_4,
    d.w2_5,
    d.w2_6,
    d.w2_7,
    d.w2_8,
    d.w2_9,
    d.w2_10,
    d.w2_11,
    d.w2_1_1,
    d.w2_2_2,
    d.w2_3_3,
    d.w2_4_4,
    d.w2_4_5,
    d.w2_5_5,
    d.w2_6_6,
    d.w2_1_7,
    d.w2_1_8,
    d.w2_1_9,
    d.w2_1_10,
    d.w2_1_11,
    d.w2_2_7,
    d.w2_2_8,
    d.w2_2_9,
    d.w2_2_10,
    d.w2_2_11,
    d.w2_3_7,
    d.w2_3_8,
    d.w2_3_9,
    d.w2_3_10,
    d.w2_3_11,
    d.w2_4_7,
    d.w2_4_8,
    d.w2_4_9,
    d.w2_4_10,
    d.w2_4_11,
    d.w2_5_7,
    d.w2_5_8,
    d.w2_5_9,
    d.w2_5_10,
    d.w2_5_11,
    d.w2_6_7,
    d.w2_6_8,
    d.w2_6_9,
    d.w2_6_10,
    d.w2_6_11,
    d.w2_7_7,
    d.w2_7_8,
    d.w2_7_9,
    d.w2_7_10,
    d.w2_7_11,
    d.w2_8_8,
    d.w2_8_9,
    d.w2_8_10,
    d.w2_8_11,
    d.w2_9_9,
    d.w2_9_10,
    d.w2_9_11,
    d.w2_10_10,
    d.w2_10_11,
    d.w2_11_11,
    d.s2_n,
    d.s2_1,
    d.s2_2,
    d.s2_3,
    d.s2_4,
    d.s2_5,
    d.s2_6,
    d.s2_7,
    d.s2_8,
    d.s2_9,
    d.s2_10,
    d.s2_11,
    d.s2_1_1,
    d.s2_2_2,
    d.s2_3_3,
    d.s2_4_4,
    d.s2_4_5,
    d.s2_5_5,
    d.s2_6_6,
    d.s2_1_7,
    d.s2_1_8,
    d.s2_1_9,
    d.s2_1_10,
    d.s2_1_11,
    d.s2_2_7,
    d.s2_2_8,
    d.s2_2_9,
    d.s2_2_10,
    d.s2_2_11,
    d.s2_3_7,
    d.s2_3_8,
    d.s2_3_9,
    d.s2_3_10,
    d.s2_3_11,
    d.s2_4_7,
    d.s2_4_8,
    d.s2_4_9,
    d.s2_4_10,
    d.s2_4_11,
    d.s2_5_7,
    d.s2_5_8,
    d.s2_5_9,
    d.s2_5_10,
    d.s2_5_11,
    d.s2_6_7,
    d.s2_6_8,
    d.s2_6_9,
    d.s2_6_10,
    d.s2_6_11,
    d.s2_7_7,
    d.s2_7_8,
    d.s2_7_9,
    d.s2_7_10,
    d.s2_7_11,
    d.s2_8_8,
    d.s2_8_9,
    d.s2_8_10,
    d.s2_8_11,
    d.s2_9_9,
    d.s2_9_10,
    d.s2_9_11,
    d.s2_10_10,
    d.s2_10_11,
    d.s2_11_11,
    CASE
      WHEN d.side = 1
      THEN d.n - 1
      WHEN d.side = 2
      THEN d.n__before
      WHEN d.side = 3
      THEN d.n__after
      WHEN d.side = 4
      THEN d.n__before + d.n__after
    END AS others,
    CASE
      WHEN d.side = 1
      THEN d.n
      WHEN d.side = 2
      THEN d.n__before
      WHEN d.side = 3
      THEN d.n__after
      WHEN d.side = 4
      THEN d.n__before + d.n__after
    END AS s_n,
    CASE
      WHEN d.side = 1
      THEN d.u_1
      WHEN d.side = 2
      THEN d.u_1__before
      WHEN d.side = 3
      THEN d.u_1__after
      WHEN d.side = 4
      THEN d.u_1__before + d.u_1__after
    END AS s_u_1,
    CASE
      WHEN d.side = 1
      THEN d.u_2
      WHEN d.side = 2
      THEN d.u_2__before
      WHEN d.side = 3
      THEN d.u_2__after
      WHEN d.side = 4
      THEN d.u_2__before + d.u_2__after
    END AS s_u_2,
    CASE
      WHEN d.side = 1
      THEN d.u_3
      WHEN d.side = 2
      THEN d.u_3__before
      WHEN d.side = 3
      THEN d.u_3__after
      WHEN d.side = 4
      THEN d.u_3__before + d.u_3__after
    END AS s_u_3,
    CASE
      WHEN d.side = 1
      THEN d.u_4
      WHEN d.side = 2
      THEN d.u_4__before
      WHEN d.side = 3
      THEN d.u_4__after
      WHEN d.side = 4
      THEN d.u_4__before + d.u_4__after
    END AS s_u_4,
    CASE
      WHEN d.side = 1
      THEN d.u_5
      WHEN d.side = 2
      THEN d.u_5__before
      WHEN d.side = 3
      THEN d.u_5__after
      WHEN d.side = 4
      THEN d.u_5__before + d.u_5__after
    END AS s_u_5,
    CASE
      WHEN d.side = 1
      THEN d.u_6
      WHEN d.side = 2
      THEN d.u_6__before
      WHEN d.side = 3
      THEN d.u_6__after
      WHEN d.side = 4
      THEN d.u_6__before + d.u_6__after
    END AS s_u_6,
    CASE
      WHEN d.side = 1
      THEN d.u_7
      WHEN d.side = 2
      THEN d.u_7__before
      WHEN d.side = 3
      THEN d.u_7__after
      WHEN d.side = 4
      THEN d.u_7__before + d.u_7__after
    END AS s_u_7,
    CASE
      WHEN d.side = 1
      THEN d.u_8
      WHEN d.side = 2
      THEN d.u_8__before
      WHEN d.side = 3
      THEN d.u_8__after
      WHEN d.side = 4
      THEN d.u_8__before + d.u_8__after
    END AS s_u_8,
    CASE
      WHEN d.side = 1
      THEN d.u_9
      WHEN d.side = 2
      THEN d.u_9__before
      WHEN d.side = 3
      THEN d.u_9__after
      WHEN d.side = 4
      THEN d.u_9__before + d.u_9__after
    END AS s_u_9,
    CASE
      WHEN d.side = 1
      THEN d.u_10
      WHEN d.side = 2
      THEN d.u_10__before
      WHEN d.side = 3
      THEN d.u_10__after
      WHEN d.side = 4
      THEN d.u_10__before + d.u_10__after
    END AS s_u_10,
    CASE
      WHEN d.side = 1
      THEN d.u_11
      WHEN d.side = 2
      THEN d.u_11__before
      WHEN d.side = 3
      THEN d.u_11__after
      WHEN d.side = 4
      THEN d.u_11__before + d.u_11__after
    END AS s_u_11,
    CASE
      WHEN d.side = 1
      THEN d.u_1_1
      WHEN d.side = 2
      THEN d.u_1_1__before
      WHEN d.side = 3
      THEN d.u_1_1__after
      WHEN d.side = 4
      THEN d.u_1_1__before + d.u_1_1__after
    END AS s_u_1_1,
    CASE
      WHEN d.side = 1
      THEN d.u_2_2
      WHEN d.side = 2
      THEN d.u_2_2__before
      WHEN d.side = 3
      THEN d.u_2_2__after
      WHEN d.side = 4
      THEN d.u_2_2__before + d.u_2_2__after
    END AS s_u_2_2,
    CASE
      WHEN d.side = 1
      THEN d.u_3_3
      WHEN d.side = 2
      THEN d.u_3_3__before
      WHEN d.side = 3
      THEN d.u_3_3__after
      WHEN d.side = 4
      THEN d.u_3_3__before + d.u_3_3__after
    END AS s_u_3_3,
    CASE
      WHEN d.side = 1
      THEN d.u_4_4
      WHEN d.side = 2
      THEN d.u_4_4__before
      WHEN d.side = 3
      THEN d.u_4_4__after
      WHEN d.side = 4
      THEN d.u_4_4__before + d.u_4_4__after
    END AS s_u_4_4,
    CASE
      WHEN d.side = 1
      THEN d.u_4_5
      WHEN d.side = 2
      THEN d.u_4_5__before
      WHEN d.side = 3
      THEN d.u_4_5__after
      WHEN d.side = 4
      THEN d.u_4_5__before + d.u_4_5__after
    END AS s_u_4_5,
    CASE
      WHEN d.side = 1
      THEN d.u_5_5
      WHEN d.side = 2
      THEN d.u_5_5__before
      WHEN d.side = 3
      THEN d.u_5_5__after
      WHEN d.side = 4
      THEN d.u_5_5__before + d.u_5_5__after
    END AS s_u_5_5,
    CASE
      WHEN d.side = 1
      THEN d.u_6_6
      WHEN d.side = 2
      THEN d.u_6_6__before
      WHEN d.side = 3
      THEN d.u_6_6__after
      WHEN d.side = 4
      THEN d.u_6_6__before + d.u_6_6__after
    END AS s_u_6_6,
    CASE
      WHEN d.side = 1
      THEN d.u_1_7
      WHEN d.side = 2
      THEN d.u_1_7__before
      WHEN d.side = 3
      THEN d.u_1_7__after
      WHEN d.side = 4
      THEN d.u_1_7__before + d.u_1_7__after
    END AS s_u_1_7,
    CASE
      WHEN d.side = 1
      THEN d.u_1_8
      WHEN d.side = 2
      THEN d.u_1_8__before
      WHEN d.side = 3
      THEN d.u_1_8__after
      WHEN d.side = 4
      THEN d.u_1_8__before + d.u_1_8__after
    END AS s_u_1_8,
    CASE
      WHEN d.side = 1
      THEN d.u_1_9
      WHEN d.side = 2
      THEN d.u_1_9__before
      WHEN d.side = 3
      THEN d.u_1_9__after
      WHEN d.side = 4
      THEN d.u_1_9__before + d.u_1_9__after
    END AS s_u_1_9,
    CASE
      WHEN d.side = 1
      THEN d.u_1_10
      WHEN d.side = 2
      THEN d.u_1_10__before
      WHEN d.side = 3
      THEN d.u_1_10__after
      WHEN d.side = 4
      THEN d.u_1_10__before + d.u_1_10__after
    END AS s_u_1_10,
    CASE
      WHEN d.side = 1
      THEN d.u_1_11
      WHEN d.side = 2
      THEN d.u_1_11__before
      WHEN d.side = 3
      THEN d.u_1_11__after
      WHEN d.side = 4
      THEN d.u_1_11__before + d.u_1_11__after
    END AS s_u_1_11,
    CASE
      WHEN d.side = 1
      THEN d.u_2_7
      WHEN d.side = 2
      THEN d.u_2_7__before
      WHEN d.side = 3
      THEN d.u_2_7__after
      WHEN d.side = 4
      THEN d.u_2_7__before + d.u_2_7__after
    END AS s_u_2_7,
    CASE
      WHEN d.side = 1
      THEN d.u_2_8
      WHEN d.side = 2
      THEN d.u_2_8__before
      WHEN d.side = 3
      THEN d.u_2_8__after
      WHEN d.side = 4
      THEN d.u_2_8__before + d.u_2_8__after
    END AS s_u_2_8,
    CASE
      WHEN d.side = 1
      THEN d.u_2_9
      WHEN d.side = 2
      THEN d.u_2_9__before
      WHEN d.side = 3
      THEN d.u_2_9__after
      WHEN d.side = 4
      THEN d.u_2_9__before + d.u_2_9__after
    END AS s_u_2_9,
    CASE
      WHEN d.side = 1
      THEN d.u_2_10
      WHEN d.side = 2
      THEN d.u_2_10__before
      WHEN d.side = 3
      THEN d.u_2_10__after
      WHEN d.side = 4
      THEN d.u_2_10__before + d.u_2_10__after
    END AS s_u_2_10,
    CASE
      WHEN d.side = 1
      THEN d.u_2_11
      WHEN d.side = 2
      THEN d.u_2_11__before
      WHEN d.side = 3
      THEN d.u_2_11__after
      WHEN d.side = 4
      THEN d.u_2_11__before + d.u_2_11__after
    END AS s_u_2_11,
    CASE
      WHEN d.side = 1
      THEN d.u_3_7
      WHEN d.side = 2
      THEN d.u_3_7__before
      WHEN d.side = 3
      THEN d.u_3_7__after
      WHEN d.side = 4
      THEN d.u_3_7__before + d.u_3_7__after
    END AS s_u_3_7,
    CASE
      WHEN d.side = 1
      THEN d.u_3_8
      WHEN d.side = 2
      THEN d.u_3_8__before
      WHEN d.side = 3
      THEN d.u_3_8__after
      WHEN d.side = 4
      THEN d.u_3_8__before + d.u_3_8__after
    END AS s_u_3_8,
    CASE
      WHEN d.side = 1
      THEN d.u_3_9
      WHEN d.side = 2
      THEN d.u_3_9__before
      WHEN d.side = 3
      THEN d.u_3_9__after
      WHEN d.side = 4
      THEN d.u_3_9__before + d.u_3_9__after
    END AS s_u_3_9,
    CASE
      WHEN d.side = 1
      THEN d.u_3_10
      WHEN d.side = 2
      THEN d.u_3_10__before
      WHEN d.side = 3
      THEN d.u_3_10__after
      WHEN d.side = 4
      THEN d.u_3_10__before + d.u_3_10__after
    END AS s_u_3_10,
    CASE
      WHEN d.side = 1
      THEN d.u_3_11
      WHEN d.side = 2
      THEN d.u_3_11__before
      WHEN d.side = 3
      THEN d.u_3_11__after
      WHEN d.side = 4
      THEN d.u_3_11__before + d.u_3_11__after
    END AS s_u_3_11,
    CASE
      WHEN d.side = 1
      THEN d.u_4_7
      WHEN d.side = 2
      THEN d.u_4_7__before
      WHEN d.side = 3
      THEN d.u_4_7__after
      WHEN d.side = 4
      THEN d.u_4_7__before + d.u_4_7__after
    END AS s_u_4_7,
    CASE
      WHEN d.side = 1
      THEN d.u_4_8
      WHEN d.side = 2
      THEN d.u_4_8__before
      WHEN d.side = 3
      THEN d.u_4_8__after
      WHEN d.side = 4
      THEN d.u_4_8__before + d.u_4_8__after
    END AS s_u_4_8,
    CASE
      WHEN d.side = 1
      THEN d.u_4_9
      WHEN d.side = 2
      THEN d.u_4_9__before
      WHEN d.side = 3
      THEN d.u_4_9__after
      WHEN d.side = 4
      THEN d.u_4_9__before + d.u_4_9__after
    END AS s_u_4_9,
    CASE
      WHEN d.side = 1
      THEN d.u_4_10
      WHEN d.side = 2
      THEN d.u_4_10__before
      WHEN d.side = 3
      THEN d.u_4_10__after
      WHEN d.side = 4
      THEN d.u_4_10__before + d.u_4_10__after
    END AS s_u_4_10,
    CASE
      WHEN d.side = 1
      THEN d.u_4_11
      WHEN d.side = 2
      THEN d.u_4_11__before
      WHEN d.side = 3
      THEN d.u_4_11__after
      WHEN d.side = 4
      THEN d.u_4_11__before + d.u_4_11__after
    END AS s_u_4_11,
    CASE
      WHEN d.side = 1
      THEN d.u_5_7
      WHEN d.side = 2
      THEN d.u_5_7__before
      WHEN d.side = 3
      THEN d.u_5_7__after
      WHEN d.side = 4
      THEN d.u_5_7__before + d.u_5_7__after
    END AS s_u_5_7,
    CASE
      WHEN d.side = 1
      THEN d.u_5_8
      WHEN d.side = 2
      THEN d.u_5_8__before
      WHEN d.side = 3
      THEN d.u_5_8__after
      WHEN d.side = 4
      THEN d.u_5_8__before + d.u_5_8__after
    END AS s_u_5_8,
    CASE
      WHEN d.side = 1
      THEN d.u_5_9
      WHEN d.side = 2
      THEN d.u_5_9__before
      WHEN d.side = 3
      THEN d.u_5_9__after
      WHEN d.side = 4
      THEN d.u_5_9__before + d.u_5_9__after
    END AS s_u_5_9,
    CASE
      WHEN d.side = 1
      THEN d.u_5_10
      WHEN d.side = 2
      THEN d.u_5_10__before
      WHEN d.side = 3
      THEN d.u_5_10__after
      WHEN d.side = 4
      THEN d.u_5_10__before + d.u_5_10__after
    END AS s_u_5_10,
    CASE
      WHEN d.side = 1
      THEN d.u_5_11
      WHEN d.side = 2
      THEN d.u_5_11__before
      WHEN d.side = 3
      THEN d.u_5_11__after
      WHEN d.side = 4
      THEN d.u_5_11__before + d.u_5_11__after
    END AS s_u_5_11,
    CASE
      WHEN d.side = 1
      THEN d.u_6_7
      WHEN d.side = 2
      THEN d.u_6_7__before
      WHEN d.side = 3
      THEN d.u_6_7__after
      WHEN d.side = 4
      THEN d.u_6_7__before + d.u_6_7__after
    END AS s_u_6_7,
    CASE
      WHEN d.side = 1
      THEN d.u_6_8
      WHEN d.side = 2
      THEN d.u_6_8__before
      WHEN d.side = 3
      THEN d.u_6_8__after
      WHEN d.side = 4
      THEN d.u_6_8__before + d.u_6_8__after
    END AS s_u_6_8,
    CASE
      WHEN d.side = 1
      THEN d.u_6_9
      WHEN d.side = 2
      THEN d.u_6_9__before
      WHEN d.side = 3
      THEN d.u_6_9__after
      WHEN d.side = 4
      THEN d.u_6_9__before + d.u_6_9__after
    END AS s_u_6_9,
    CASE
      WHEN d.side = 1
      THEN d.u_6_10
      WHEN d.side = 2
      THEN d.u_6_10__before
      WHEN d.side = 3
      THEN d.u_6_10__after
      WHEN d.side = 4
      THEN d.u_6_10__before + d.u_6_10__after
    END AS s_u_6_10,
    CASE
      WHEN d.side = 1
      THEN d.u_6_11
      WHEN d.side = 2
      THEN d.u_6_11__before
      WHEN d.side = 3
      THEN d.u_6_11__after
      WHEN d.side = 4
      THEN d.u_6_11__before + d.u_6_11__after
    END AS s_u_6_11,
    CASE
      WHEN d.side = 1
      THEN d.u_7_7
      WHEN d.side = 2
      THEN d.u_7_7__before
      WHEN d.side = 3
      THEN d.u_7_7__after
      WHEN d.side = 4
      THEN d.u_7_7__before + d.u_7_7__after
    END AS s_u_7_7,
    CASE
      WHEN d.side = 1
      THEN d.u_7_8
      WHEN d.side = 2
      THEN d.u_7_8__before
      WHEN d.side = 3
      THEN d.u_7_8__after
      WHEN d.side = 4
      THEN d.u_7_8__before + d.u_7_8__after
    END AS s_u_7_8,
    CASE
      WHEN d.side = 1
      THEN d.u_7_9
      WHEN d.side = 2
      THEN d.u_7_9__before
      WHEN d.side = 3
      THEN d.u_7_9__after
      WHEN d.side = 4
      THEN d.u_7_9__before + d.u_7_9__after
    END AS s_u_7_9,
    CASE
      WHEN d.side = 1
      THEN d.u_7_10
      WHEN d.side = 2
      THEN d.u_7_10__before
      WHEN d.side = 3
      THEN d.u_7_10__after
      WHEN d.side = 4
      THEN d.u_7_10__before + d.u_7_10__after
    END AS s_u_7_10,
    CASE
      WHEN d.side = 1
      THEN d.u_7_11
      WHEN d.side = 2
      THEN d.u_7_11__before
      WHEN d.side = 3
      THEN d.u_7_11__after
      WHEN d.side = 4
      THEN d.u_7_11__before + d.u_7_11__after
    END AS s_u_7_11,
    CASE
      WHEN d.side = 1
      THEN d.u_8_8
      WHEN d.side = 2
      THEN d.u_8_8__before
      WHEN d.side = 3
      THEN d.u_8_8__after
      WHEN d.side = 4
      THEN d.u_8_8__before + d.u_8_8__after
    END AS s_u_8_8,
    CASE
      WHEN d.side = 1
      THEN d.u_8_9
      WHEN d.side = 2
      THEN d.u_8_9__before
      WHEN d.side = 3
      THEN d.u_8_9__after
      WHEN d.side = 4
      THEN d.u_8_9__before + d.u_8_9__after
    END AS s_u_8_9,
    CASE
      WHEN d.side = 1
      THEN d.u_8_10
      WHEN d.side = 2
      THEN d.u_8_10__before
      WHEN d.side = 3
      THEN d.u_8_10__after
      WHEN d.side = 4
      THEN d.u_8_10__before + d.u_8_10__after
    END AS s_u_8_10,
    CASE
      WHEN d.side = 1
      THEN d.u_8_11
      WHEN d.side = 2
      THEN d.u_8_11__before
      WHEN d.side = 3
      THEN d.u_8_11__after
      WHEN d.side = 4
      THEN d.u_8_11__before + d.u_8_11__after
    END AS s_u_8_11,
    CASE
      WHEN d.side = 1
      THEN d.u_9_9
      WHEN d.side = 2
      THEN d.u_9_9__before
      WHEN d.side = 3
      THEN d.u_9_9__after
      WHEN d.side = 4
      THEN d.u_9_9__before + d.u_9_9__after
    END AS s_u_9_9,
    CASE
      WHEN d.side = 1
      THEN d.u_9_10
      WHEN d.side = 2
      THEN d.u_9_10__before
      WHEN d.side = 3
      THEN d.u_9_10__after
      WHEN d.side = 4
      THEN d.u_9_10__before + d.u_9_10__after
    END AS s_u_9_10,
    CASE
      WHEN d.side = 1
      THEN d.u_9_11
      WHEN d.side = 2
      THEN d.u_9_11__before
      WHEN d.side = 3
      THEN d.u_9_11__after
      WHEN d.side = 4
      THEN d.u_9_11__before + d.u_9_11__after
    END AS s_u_9_11,
    CASE
      WHEN d.side = 1
      THEN d.u_10_10
      WHEN d.side = 2
      THEN d.u_10_10__before
      WHEN d.side = 3
      THEN d.u_10_10__after
      WHEN d.side = 4
      THEN d.u_10_10__before + d.u_10_10__after
    END AS s_u_10_10,
    CASE
      WHEN d.side = 1
      THEN d.u_10_11
      WHEN d.side = 2
      THEN d.u_10_11__before
      WHEN d.side = 3
      THEN d.u_10_11__after
      WHEN d.side = 4
      THEN d.u_10_11__before + d.u_10_11__after
    END AS s_u_10_11,
    CASE
      WHEN d.side = 1
      THEN d.u_11_11
      WHEN d.side = 2
      THEN d.u_11_11__before
      WHEN d.side = 3
      THEN d.u_11_11__after
      WHEN d.side = 4
      THEN d.u_11_11__before + d.u_11_11__after
    END AS s_u_11_11
  FROM sided AS d
)
SELECT
  e.treated,
  SUM(e.m_n) AS n_units,
  SUM(CASE WHEN e.side > 0 THEN e.m_n ELSE 0 END) AS n_with_neighbour,
  SUM(e.sum_w) AS sum_w,
  SUM(e.w2_n) AS sum_w2,
  SUM(CASE WHEN e.side > 0 THEN e.w2_n ELSE 0 END) AS sum_w2_with_neighbour,
  SUM(e.s2_n) AS sum_s2,
  SUM(CASE WHEN e.side > 0 THEN e.s2_n ELSE 0 END) AS sum_s2_with_neighbour,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_1_1 - e.s_u_1 * e.w2_1 - e.s_u_1 * e.w2_1 + e.s_u_1_1 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_1__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_1_1 - e.s_u_1 * e.s2_1 - e.s_u_1 * e.s2_1 + e.s_u_1_1 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_1__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_1_1 - e.s_u_1 * e.m_1 - e.s_u_1 * e.m_1 + e.s_u_1_1 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_1__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_2_2 - e.s_u_2 * e.w2_2 - e.s_u_2 * e.w2_2 + e.s_u_2_2 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_2__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_2_2 - e.s_u_2 * e.s2_2 - e.s_u_2 * e.s2_2 + e.s_u_2_2 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_2__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_2_2 - e.s_u_2 * e.m_2 - e.s_u_2 * e.m_2 + e.s_u_2_2 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_2__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_3_3 - e.s_u_3 * e.w2_3 - e.s_u_3 * e.w2_3 + e.s_u_3_3 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_3__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_3_3 - e.s_u_3 * e.s2_3 - e.s_u_3 * e.s2_3 + e.s_u_3_3 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_3__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_3_3 - e.s_u_3 * e.m_3 - e.s_u_3 * e.m_3 + e.s_u_3_3 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_3__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_4_4 - e.s_u_4 * e.w2_4 - e.s_u_4 * e.w2_4 + e.s_u_4_4 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_4__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_4_4 - e.s_u_4 * e.s2_4 - e.s_u_4 * e.s2_4 + e.s_u_4_4 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_4__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_4_4 - e.s_u_4 * e.m_4 - e.s_u_4 * e.m_4 + e.s_u_4_4 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_4__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_4_5 - e.s_u_5 * e.w2_4 - e.s_u_4 * e.w2_5 + e.s_u_4_5 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_5__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_4_5 - e.s_u_5 * e.s2_4 - e.s_u_4 * e.s2_5 + e.s_u_4_5 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_5__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_4_5 - e.s_u_5 * e.m_4 - e.s_u_4 * e.m_5 + e.s_u_4_5 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_5__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_5_5 - e.s_u_5 * e.w2_5 - e.s_u_5 * e.w2_5 + e.s_u_5_5 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_5__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_5_5 - e.s_u_5 * e.s2_5 - e.s_u_5 * e.s2_5 + e.s_u_5_5 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_5__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_5_5 - e.s_u_5 * e.m_5 - e.s_u_5 * e.m_5 + e.s_u_5_5 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_5__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_6_6 - e.s_u_6 * e.w2_6 - e.s_u_6 * e.w2_6 + e.s_u_6_6 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_6__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_6_6 - e.s_u_6 * e.s2_6 - e.s_u_6 * e.s2_6 + e.s_u_6_6 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_6__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_6_6 - e.s_u_6 * e.m_6 - e.s_u_6 * e.m_6 + e.s_u_6_6 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_6__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_1_7 - e.s_u_7 * e.w2_1 - e.s_u_1 * e.w2_7 + e.s_u_1_7 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_7__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_1_7 - e.s_u_7 * e.s2_1 - e.s_u_1 * e.s2_7 + e.s_u_1_7 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_7__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_1_7 - e.s_u_7 * e.m_1 - e.s_u_1 * e.m_7 + e.s_u_1_7 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_7__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_1_8 - e.s_u_8 * e.w2_1 - e.s_u_1 * e.w2_8 + e.s_u_1_8 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_8__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_1_8 - e.s_u_8 * e.s2_1 - e.s_u_1 * e.s2_8 + e.s_u_1_8 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_8__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_1_8 - e.s_u_8 * e.m_1 - e.s_u_1 * e.m_8 + e.s_u_1_8 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_8__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_1_9 - e.s_u_9 * e.w2_1 - e.s_u_1 * e.w2_9 + e.s_u_1_9 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_9__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_1_9 - e.s_u_9 * e.s2_1 - e.s_u_1 * e.s2_9 + e.s_u_1_9 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_9__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_1_9 - e.s_u_9 * e.m_1 - e.s_u_1 * e.m_9 + e.s_u_1_9 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_9__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_1_10 - e.s_u_10 * e.w2_1 - e.s_u_1 * e.w2_10 + e.s_u_1_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_1_10 - e.s_u_10 * e.s2_1 - e.s_u_1 * e.s2_10 + e.s_u_1_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_1_10 - e.s_u_10 * e.m_1 - e.s_u_1 * e.m_10 + e.s_u_1_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_1_11 - e.s_u_11 * e.w2_1 - e.s_u_1 * e.w2_11 + e.s_u_1_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_1_11 - e.s_u_11 * e.s2_1 - e.s_u_1 * e.s2_11 + e.s_u_1_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_1_11 - e.s_u_11 * e.m_1 - e.s_u_1 * e.m_11 + e.s_u_1_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p1_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_2_7 - e.s_u_7 * e.w2_2 - e.s_u_2 * e.w2_7 + e.s_u_2_7 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_7__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_2_7 - e.s_u_7 * e.s2_2 - e.s_u_2 * e.s2_7 + e.s_u_2_7 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_7__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_2_7 - e.s_u_7 * e.m_2 - e.s_u_2 * e.m_7 + e.s_u_2_7 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_7__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_2_8 - e.s_u_8 * e.w2_2 - e.s_u_2 * e.w2_8 + e.s_u_2_8 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_8__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_2_8 - e.s_u_8 * e.s2_2 - e.s_u_2 * e.s2_8 + e.s_u_2_8 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_8__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_2_8 - e.s_u_8 * e.m_2 - e.s_u_2 * e.m_8 + e.s_u_2_8 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_8__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_2_9 - e.s_u_9 * e.w2_2 - e.s_u_2 * e.w2_9 + e.s_u_2_9 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_9__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_2_9 - e.s_u_9 * e.s2_2 - e.s_u_2 * e.s2_9 + e.s_u_2_9 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_9__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_2_9 - e.s_u_9 * e.m_2 - e.s_u_2 * e.m_9 + e.s_u_2_9 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_9__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_2_10 - e.s_u_10 * e.w2_2 - e.s_u_2 * e.w2_10 + e.s_u_2_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_2_10 - e.s_u_10 * e.s2_2 - e.s_u_2 * e.s2_10 + e.s_u_2_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_2_10 - e.s_u_10 * e.m_2 - e.s_u_2 * e.m_10 + e.s_u_2_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_2_11 - e.s_u_11 * e.w2_2 - e.s_u_2 * e.w2_11 + e.s_u_2_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_2_11 - e.s_u_11 * e.s2_2 - e.s_u_2 * e.s2_11 + e.s_u_2_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_2_11 - e.s_u_11 * e.m_2 - e.s_u_2 * e.m_11 + e.s_u_2_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p2_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_3_7 - e.s_u_7 * e.w2_3 - e.s_u_3 * e.w2_7 + e.s_u_3_7 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_7__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_3_7 - e.s_u_7 * e.s2_3 - e.s_u_3 * e.s2_7 + e.s_u_3_7 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_7__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_3_7 - e.s_u_7 * e.m_3 - e.s_u_3 * e.m_7 + e.s_u_3_7 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_7__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_3_8 - e.s_u_8 * e.w2_3 - e.s_u_3 * e.w2_8 + e.s_u_3_8 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_8__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_3_8 - e.s_u_8 * e.s2_3 - e.s_u_3 * e.s2_8 + e.s_u_3_8 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_8__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_3_8 - e.s_u_8 * e.m_3 - e.s_u_3 * e.m_8 + e.s_u_3_8 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_8__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_3_9 - e.s_u_9 * e.w2_3 - e.s_u_3 * e.w2_9 + e.s_u_3_9 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_9__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_3_9 - e.s_u_9 * e.s2_3 - e.s_u_3 * e.s2_9 + e.s_u_3_9 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_9__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_3_9 - e.s_u_9 * e.m_3 - e.s_u_3 * e.m_9 + e.s_u_3_9 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_9__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_3_10 - e.s_u_10 * e.w2_3 - e.s_u_3 * e.w2_10 + e.s_u_3_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_3_10 - e.s_u_10 * e.s2_3 - e.s_u_3 * e.s2_10 + e.s_u_3_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_3_10 - e.s_u_10 * e.m_3 - e.s_u_3 * e.m_10 + e.s_u_3_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_3_11 - e.s_u_11 * e.w2_3 - e.s_u_3 * e.w2_11 + e.s_u_3_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_3_11 - e.s_u_11 * e.s2_3 - e.s_u_3 * e.s2_11 + e.s_u_3_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_3_11 - e.s_u_11 * e.m_3 - e.s_u_3 * e.m_11 + e.s_u_3_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p3_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_4_7 - e.s_u_7 * e.w2_4 - e.s_u_4 * e.w2_7 + e.s_u_4_7 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_7__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_4_7 - e.s_u_7 * e.s2_4 - e.s_u_4 * e.s2_7 + e.s_u_4_7 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_7__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_4_7 - e.s_u_7 * e.m_4 - e.s_u_4 * e.m_7 + e.s_u_4_7 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_7__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_4_8 - e.s_u_8 * e.w2_4 - e.s_u_4 * e.w2_8 + e.s_u_4_8 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_8__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_4_8 - e.s_u_8 * e.s2_4 - e.s_u_4 * e.s2_8 + e.s_u_4_8 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_8__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_4_8 - e.s_u_8 * e.m_4 - e.s_u_4 * e.m_8 + e.s_u_4_8 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_8__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_4_9 - e.s_u_9 * e.w2_4 - e.s_u_4 * e.w2_9 + e.s_u_4_9 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_9__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_4_9 - e.s_u_9 * e.s2_4 - e.s_u_4 * e.s2_9 + e.s_u_4_9 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_9__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_4_9 - e.s_u_9 * e.m_4 - e.s_u_4 * e.m_9 + e.s_u_4_9 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_9__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_4_10 - e.s_u_10 * e.w2_4 - e.s_u_4 * e.w2_10 + e.s_u_4_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_4_10 - e.s_u_10 * e.s2_4 - e.s_u_4 * e.s2_10 + e.s_u_4_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_4_10 - e.s_u_10 * e.m_4 - e.s_u_4 * e.m_10 + e.s_u_4_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_4_11 - e.s_u_11 * e.w2_4 - e.s_u_4 * e.w2_11 + e.s_u_4_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_4_11 - e.s_u_11 * e.s2_4 - e.s_u_4 * e.s2_11 + e.s_u_4_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_4_11 - e.s_u_11 * e.m_4 - e.s_u_4 * e.m_11 + e.s_u_4_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p4_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_5_7 - e.s_u_7 * e.w2_5 - e.s_u_5 * e.w2_7 + e.s_u_5_7 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_7__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_5_7 - e.s_u_7 * e.s2_5 - e.s_u_5 * e.s2_7 + e.s_u_5_7 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_7__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_5_7 - e.s_u_7 * e.m_5 - e.s_u_5 * e.m_7 + e.s_u_5_7 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_7__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_5_8 - e.s_u_8 * e.w2_5 - e.s_u_5 * e.w2_8 + e.s_u_5_8 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_8__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_5_8 - e.s_u_8 * e.s2_5 - e.s_u_5 * e.s2_8 + e.s_u_5_8 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_8__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_5_8 - e.s_u_8 * e.m_5 - e.s_u_5 * e.m_8 + e.s_u_5_8 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_8__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_5_9 - e.s_u_9 * e.w2_5 - e.s_u_5 * e.w2_9 + e.s_u_5_9 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_9__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_5_9 - e.s_u_9 * e.s2_5 - e.s_u_5 * e.s2_9 + e.s_u_5_9 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_9__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_5_9 - e.s_u_9 * e.m_5 - e.s_u_5 * e.m_9 + e.s_u_5_9 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_9__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_5_10 - e.s_u_10 * e.w2_5 - e.s_u_5 * e.w2_10 + e.s_u_5_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_5_10 - e.s_u_10 * e.s2_5 - e.s_u_5 * e.s2_10 + e.s_u_5_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_5_10 - e.s_u_10 * e.m_5 - e.s_u_5 * e.m_10 + e.s_u_5_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_5_11 - e.s_u_11 * e.w2_5 - e.s_u_5 * e.w2_11 + e.s_u_5_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_5_11 - e.s_u_11 * e.s2_5 - e.s_u_5 * e.s2_11 + e.s_u_5_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_5_11 - e.s_u_11 * e.m_5 - e.s_u_5 * e.m_11 + e.s_u_5_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p5_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_6_7 - e.s_u_7 * e.w2_6 - e.s_u_6 * e.w2_7 + e.s_u_6_7 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_7__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_6_7 - e.s_u_7 * e.s2_6 - e.s_u_6 * e.s2_7 + e.s_u_6_7 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_7__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_6_7 - e.s_u_7 * e.m_6 - e.s_u_6 * e.m_7 + e.s_u_6_7 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_7__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_6_8 - e.s_u_8 * e.w2_6 - e.s_u_6 * e.w2_8 + e.s_u_6_8 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_8__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_6_8 - e.s_u_8 * e.s2_6 - e.s_u_6 * e.s2_8 + e.s_u_6_8 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_8__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_6_8 - e.s_u_8 * e.m_6 - e.s_u_6 * e.m_8 + e.s_u_6_8 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_8__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_6_9 - e.s_u_9 * e.w2_6 - e.s_u_6 * e.w2_9 + e.s_u_6_9 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_9__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_6_9 - e.s_u_9 * e.s2_6 - e.s_u_6 * e.s2_9 + e.s_u_6_9 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_9__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_6_9 - e.s_u_9 * e.m_6 - e.s_u_6 * e.m_9 + e.s_u_6_9 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_9__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_6_10 - e.s_u_10 * e.w2_6 - e.s_u_6 * e.w2_10 + e.s_u_6_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_6_10 - e.s_u_10 * e.s2_6 - e.s_u_6 * e.s2_10 + e.s_u_6_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_6_10 - e.s_u_10 * e.m_6 - e.s_u_6 * e.m_10 + e.s_u_6_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_6_11 - e.s_u_11 * e.w2_6 - e.s_u_6 * e.w2_11 + e.s_u_6_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_6_11 - e.s_u_11 * e.s2_6 - e.s_u_6 * e.s2_11 + e.s_u_6_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_6_11 - e.s_u_11 * e.m_6 - e.s_u_6 * e.m_11 + e.s_u_6_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p6_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_7_7 - e.s_u_7 * e.w2_7 - e.s_u_7 * e.w2_7 + e.s_u_7_7 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_7__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_7_7 - e.s_u_7 * e.s2_7 - e.s_u_7 * e.s2_7 + e.s_u_7_7 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_7__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_7_7 - e.s_u_7 * e.m_7 - e.s_u_7 * e.m_7 + e.s_u_7_7 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_7__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_7_8 - e.s_u_8 * e.w2_7 - e.s_u_7 * e.w2_8 + e.s_u_7_8 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_8__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_7_8 - e.s_u_8 * e.s2_7 - e.s_u_7 * e.s2_8 + e.s_u_7_8 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_8__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_7_8 - e.s_u_8 * e.m_7 - e.s_u_7 * e.m_8 + e.s_u_7_8 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_8__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_7_9 - e.s_u_9 * e.w2_7 - e.s_u_7 * e.w2_9 + e.s_u_7_9 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_9__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_7_9 - e.s_u_9 * e.s2_7 - e.s_u_7 * e.s2_9 + e.s_u_7_9 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_9__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_7_9 - e.s_u_9 * e.m_7 - e.s_u_7 * e.m_9 + e.s_u_7_9 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_9__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_7_10 - e.s_u_10 * e.w2_7 - e.s_u_7 * e.w2_10 + e.s_u_7_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_7_10 - e.s_u_10 * e.s2_7 - e.s_u_7 * e.s2_10 + e.s_u_7_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_7_10 - e.s_u_10 * e.m_7 - e.s_u_7 * e.m_10 + e.s_u_7_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_7_11 - e.s_u_11 * e.w2_7 - e.s_u_7 * e.w2_11 + e.s_u_7_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_7_11 - e.s_u_11 * e.s2_7 - e.s_u_7 * e.s2_11 + e.s_u_7_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_7_11 - e.s_u_11 * e.m_7 - e.s_u_7 * e.m_11 + e.s_u_7_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p7_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_8_8 - e.s_u_8 * e.w2_8 - e.s_u_8 * e.w2_8 + e.s_u_8_8 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_8__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_8_8 - e.s_u_8 * e.s2_8 - e.s_u_8 * e.s2_8 + e.s_u_8_8 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_8__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_8_8 - e.s_u_8 * e.m_8 - e.s_u_8 * e.m_8 + e.s_u_8_8 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_8__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_8_9 - e.s_u_9 * e.w2_8 - e.s_u_8 * e.w2_9 + e.s_u_8_9 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_9__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_8_9 - e.s_u_9 * e.s2_8 - e.s_u_8 * e.s2_9 + e.s_u_8_9 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_9__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_8_9 - e.s_u_9 * e.m_8 - e.s_u_8 * e.m_9 + e.s_u_8_9 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_9__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_8_10 - e.s_u_10 * e.w2_8 - e.s_u_8 * e.w2_10 + e.s_u_8_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_8_10 - e.s_u_10 * e.s2_8 - e.s_u_8 * e.s2_10 + e.s_u_8_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_8_10 - e.s_u_10 * e.m_8 - e.s_u_8 * e.m_10 + e.s_u_8_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_8_11 - e.s_u_11 * e.w2_8 - e.s_u_8 * e.w2_11 + e.s_u_8_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_8_11 - e.s_u_11 * e.s2_8 - e.s_u_8 * e.s2_11 + e.s_u_8_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_8_11 - e.s_u_11 * e.m_8 - e.s_u_8 * e.m_11 + e.s_u_8_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p8_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_9_9 - e.s_u_9 * e.w2_9 - e.s_u_9 * e.w2_9 + e.s_u_9_9 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p9_9__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_9_9 - e.s_u_9 * e.s2_9 - e.s_u_9 * e.s2_9 + e.s_u_9_9 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p9_9__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_9_9 - e.s_u_9 * e.m_9 - e.s_u_9 * e.m_9 + e.s_u_9_9 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p9_9__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_9_10 - e.s_u_10 * e.w2_9 - e.s_u_9 * e.w2_10 + e.s_u_9_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p9_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_9_10 - e.s_u_10 * e.s2_9 - e.s_u_9 * e.s2_10 + e.s_u_9_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p9_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_9_10 - e.s_u_10 * e.m_9 - e.s_u_9 * e.m_10 + e.s_u_9_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p9_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_9_11 - e.s_u_11 * e.w2_9 - e.s_u_9 * e.w2_11 + e.s_u_9_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p9_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_9_11 - e.s_u_11 * e.s2_9 - e.s_u_9 * e.s2_11 + e.s_u_9_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p9_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_9_11 - e.s_u_11 * e.m_9 - e.s_u_9 * e.m_11 + e.s_u_9_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p9_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_10_10 - e.s_u_10 * e.w2_10 - e.s_u_10 * e.w2_10 + e.s_u_10_10 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p10_10__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_10_10 - e.s_u_10 * e.s2_10 - e.s_u_10 * e.s2_10 + e.s_u_10_10 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p10_10__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_10_10 - e.s_u_10 * e.m_10 - e.s_u_10 * e.m_10 + e.s_u_10_10 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p10_10__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_10_11 - e.s_u_11 * e.w2_10 - e.s_u_10 * e.w2_11 + e.s_u_10_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p10_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_10_11 - e.s_u_11 * e.s2_10 - e.s_u_10 * e.s2_11 + e.s_u_10_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p10_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_10_11 - e.s_u_11 * e.m_10 - e.s_u_10 * e.m_11 + e.s_u_10_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p10_11__dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.w2_11_11 - e.s_u_11 * e.w2_11 - e.s_u_11 * e.w2_11 + e.s_u_11_11 * e.w2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p11_11__w2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.s2_11_11 - e.s_u_11 * e.s2_11 - e.s_u_11 * e.s2_11 + e.s_u_11_11 * e.s2_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p11_11__s2_dd,
  SUM(
    CASE
      WHEN e.side > 0
      THEN CAST((
        e.s_n * e.m_11_11 - e.s_u_11 * e.m_11 - e.s_u_11 * e.m_11 + e.s_u_11_11 * e.m_n
      ) AS DOUBLE PRECISION) / NULLIF(2.0 * e.others, 0)
      ELSE 0
    END
  ) AS p11_11__dd
FROM neighbours AS e
GROUP BY
  e.treated
ORDER BY
  e.treated;
