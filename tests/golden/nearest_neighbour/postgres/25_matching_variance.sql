-- sqlmatch study 'annual_pass', step 25: matching_variance (postgres)
-- Abadie-Imbens variance sums: squared matching weights (times each control is used) times conditional variances estimated by matching each unit to its nearest unit of the same group.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_nearest_neighbour_units, sqlmatch.annual_pass_weighted_units, sqlmatch.annual_pass_nearest_neighbour_matches, sqlmatch.annual_pass_nearest_neighbour_units
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
   nearest other unit of the same group and exact block (age_band) on the logit score,
   sigma2_i = (y_i - y_l(i))^2 / 2 (one match; J / (J + 1) with J = 1). The neighbour is the
   previous or the next unit in score order, whichever is nearer (scores compared at 10 decimal
   places, ties to the previous one, the unit key breaking ties in the order). Each product d_a d_b / 2
   of two neighbour differences is summed weighted by w^2 over the matched units, and unweighted over the
   matched units that have a neighbour (a unit alone in its group and block borrows their mean).
   The units and their order come from the units table of the grouped search, whose score_rank orders each
   group's units of a block as (score at 10 decimal places, unit key) does: the sort is on two integers.
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
    s.unit_key,
    s.treated,
    COALESCE(s.age_band, '(missing)') AS age_band,
    s.score_compared AS score,
    s.score_rank,
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
    w.match__weight AS weight,
    CASE WHEN s.treated = 0 THEN COALESCE(r.share2, 0) ELSE 0 END AS share2
  FROM "sqlmatch".annual_pass_nearest_neighbour_units AS s
  INNER JOIN "sqlmatch".annual_pass_weighted_units AS w
    ON w.unit_key = s.unit_key
  LEFT JOIN reuse AS r
    ON r.control_key = s.unit_key
  WHERE
    NOT s.score IS NULL
), ordered AS (
  SELECT
    u.treated,
    u.weight,
    u.share2,
    u.score - LAG(u.score) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS gap_before,
    LEAD(u.score) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) - u.score AS gap_after,
    u.v1 - LAG(u.v1) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before1,
    u.v1 - LEAD(u.v1) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after1,
    u.v2 - LAG(u.v2) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before2,
    u.v2 - LEAD(u.v2) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after2,
    u.v3 - LAG(u.v3) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before3,
    u.v3 - LEAD(u.v3) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after3,
    u.v4 - LAG(u.v4) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before4,
    u.v4 - LEAD(u.v4) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after4,
    u.v5 - LAG(u.v5) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before5,
    u.v5 - LEAD(u.v5) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after5,
    u.v6 - LAG(u.v6) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before6,
    u.v6 - LEAD(u.v6) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after6,
    u.v7 - LAG(u.v7) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before7,
    u.v7 - LEAD(u.v7) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after7,
    u.v8 - LAG(u.v8) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before8,
    u.v8 - LEAD(u.v8) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after8,
    u.v9 - LAG(u.v9) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before9,
    u.v9 - LEAD(u.v9) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after9,
    u.v10 - LAG(u.v10) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before10,
    u.v10 - LEAD(u.v10) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after10,
    u.v11 - LAG(u.v11) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS before11,
    u.v11 - LEAD(u.v11) OVER (PARTITION BY u.treated, u.age_band ORDER BY u.score_rank, u.unit_key) AS after11
  FROM units AS u
), differences AS (
  SELECT
    o.treated,
    o.weight,
    o.share2,
    CASE WHEN o.gap_before IS NULL AND o.gap_after IS NULL THEN 0 ELSE 1 END AS has_neighbour,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before1
      ELSE o.after1
    END AS d1,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before2
      ELSE o.after2
    END AS d2,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before3
      ELSE o.after3
    END AS d3,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before4
      ELSE o.after4
    END AS d4,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before5
      ELSE o.after5
    END AS d5,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before6
      ELSE o.after6
    END AS d6,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before7
      ELSE o.after7
    END AS d7,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before8
      ELSE o.after8
    END AS d8,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before9
      ELSE o.after9
    END AS d9,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before10
      ELSE o.after10
    END AS d10,
    CASE
      WHEN o.gap_after IS NULL
      OR (
        NOT o.gap_before IS NULL AND o.gap_before <= o.gap_after
      )
      THEN o.before11
      ELSE o.after11
    END AS d11
  FROM ordered AS o
  WHERE
    NOT o.weight IS NULL
)
SELECT
  d.treated,
  COUNT(*) AS n_units,
  SUM(d.has_neighbour) AS n_with_neighbour,
  SUM(d.weight) AS sum_w,
  SUM(d.weight * d.weight) AS sum_w2,
  SUM(CASE WHEN d.has_neighbour = 1 THEN d.weight * d.weight ELSE 0 END) AS sum_w2_with_neighbour,
  SUM(d.share2) AS sum_s2,
  SUM(CASE WHEN d.has_neighbour = 1 THEN d.share2 ELSE 0 END) AS sum_s2_with_neighbour,
  CAST(SUM(d.weight * d.weight * d.d1 * d.d1) AS DOUBLE PRECISION) / 2.0 AS p1_1__w2_dd,
  CAST(SUM(d.share2 * d.d1 * d.d1) AS DOUBLE PRECISION) / 2.0 AS p1_1__s2_dd,
  CAST(SUM(d.d1 * d.d1) AS DOUBLE PRECISION) / 2.0 AS p1_1__dd,
  CAST(SUM(d.weight * d.weight * d.d2 * d.d2) AS DOUBLE PRECISION) / 2.0 AS p2_2__w2_dd,
  CAST(SUM(d.share2 * d.d2 * d.d2) AS DOUBLE PRECISION) / 2.0 AS p2_2__s2_dd,
  CAST(SUM(d.d2 * d.d2) AS DOUBLE PRECISION) / 2.0 AS p2_2__dd,
  CAST(SUM(d.weight * d.weight * d.d3 * d.d3) AS DOUBLE PRECISION) / 2.0 AS p3_3__w2_dd,
  CAST(SUM(d.share2 * d.d3 * d.d3) AS DOUBLE PRECISION) / 2.0 AS p3_3__s2_dd,
  CAST(SUM(d.d3 * d.d3) AS DOUBLE PRECISION) / 2.0 AS p3_3__dd,
  CAST(SUM(d.weight * d.weight * d.d4 * d.d4) AS DOUBLE PRECISION) / 2.0 AS p4_4__w2_dd,
  CAST(SUM(d.share2 * d.d4 * d.d4) AS DOUBLE PRECISION) / 2.0 AS p4_4__s2_dd,
  CAST(SUM(d.d4 * d.d4) AS DOUBLE PRECISION) / 2.0 AS p4_4__dd,
  CAST(SUM(d.weight * d.weight * d.d4 * d.d5) AS DOUBLE PRECISION) / 2.0 AS p4_5__w2_dd,
  CAST(SUM(d.share2 * d.d4 * d.d5) AS DOUBLE PRECISION) / 2.0 AS p4_5__s2_dd,
  CAST(SUM(d.d4 * d.d5) AS DOUBLE PRECISION) / 2.0 AS p4_5__dd,
  CAST(SUM(d.weight * d.weight * d.d5 * d.d5) AS DOUBLE PRECISION) / 2.0 AS p5_5__w2_dd,
  CAST(SUM(d.share2 * d.d5 * d.d5) AS DOUBLE PRECISION) / 2.0 AS p5_5__s2_dd,
  CAST(SUM(d.d5 * d.d5) AS DOUBLE PRECISION) / 2.0 AS p5_5__dd,
  CAST(SUM(d.weight * d.weight * d.d6 * d.d6) AS DOUBLE PRECISION) / 2.0 AS p6_6__w2_dd,
  CAST(SUM(d.share2 * d.d6 * d.d6) AS DOUBLE PRECISION) / 2.0 AS p6_6__s2_dd,
  CAST(SUM(d.d6 * d.d6) AS DOUBLE PRECISION) / 2.0 AS p6_6__dd,
  CAST(SUM(d.weight * d.weight * d.d1 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p1_7__w2_dd,
  CAST(SUM(d.share2 * d.d1 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p1_7__s2_dd,
  CAST(SUM(d.d1 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p1_7__dd,
  CAST(SUM(d.weight * d.weight * d.d1 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p1_8__w2_dd,
  CAST(SUM(d.share2 * d.d1 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p1_8__s2_dd,
  CAST(SUM(d.d1 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p1_8__dd,
  CAST(SUM(d.weight * d.weight * d.d1 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p1_9__w2_dd,
  CAST(SUM(d.share2 * d.d1 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p1_9__s2_dd,
  CAST(SUM(d.d1 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p1_9__dd,
  CAST(SUM(d.weight * d.weight * d.d1 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p1_10__w2_dd,
  CAST(SUM(d.share2 * d.d1 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p1_10__s2_dd,
  CAST(SUM(d.d1 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p1_10__dd,
  CAST(SUM(d.weight * d.weight * d.d1 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p1_11__w2_dd,
  CAST(SUM(d.share2 * d.d1 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p1_11__s2_dd,
  CAST(SUM(d.d1 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p1_11__dd,
  CAST(SUM(d.weight * d.weight * d.d2 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p2_7__w2_dd,
  CAST(SUM(d.share2 * d.d2 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p2_7__s2_dd,
  CAST(SUM(d.d2 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p2_7__dd,
  CAST(SUM(d.weight * d.weight * d.d2 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p2_8__w2_dd,
  CAST(SUM(d.share2 * d.d2 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p2_8__s2_dd,
  CAST(SUM(d.d2 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p2_8__dd,
  CAST(SUM(d.weight * d.weight * d.d2 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p2_9__w2_dd,
  CAST(SUM(d.share2 * d.d2 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p2_9__s2_dd,
  CAST(SUM(d.d2 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p2_9__dd,
  CAST(SUM(d.weight * d.weight * d.d2 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p2_10__w2_dd,
  CAST(SUM(d.share2 * d.d2 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p2_10__s2_dd,
  CAST(SUM(d.d2 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p2_10__dd,
  CAST(SUM(d.weight * d.weight * d.d2 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p2_11__w2_dd,
  CAST(SUM(d.share2 * d.d2 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p2_11__s2_dd,
  CAST(SUM(d.d2 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p2_11__dd,
  CAST(SUM(d.weight * d.weight * d.d3 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p3_7__w2_dd,
  CAST(SUM(d.share2 * d.d3 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p3_7__s2_dd,
  CAST(SUM(d.d3 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p3_7__dd,
  CAST(SUM(d.weight * d.weight * d.d3 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p3_8__w2_dd,
  CAST(SUM(d.share2 * d.d3 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p3_8__s2_dd,
  CAST(SUM(d.d3 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p3_8__dd,
  CAST(SUM(d.weight * d.weight * d.d3 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p3_9__w2_dd,
  CAST(SUM(d.share2 * d.d3 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p3_9__s2_dd,
  CAST(SUM(d.d3 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p3_9__dd,
  CAST(SUM(d.weight * d.weight * d.d3 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p3_10__w2_dd,
  CAST(SUM(d.share2 * d.d3 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p3_10__s2_dd,
  CAST(SUM(d.d3 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p3_10__dd,
  CAST(SUM(d.weight * d.weight * d.d3 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p3_11__w2_dd,
  CAST(SUM(d.share2 * d.d3 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p3_11__s2_dd,
  CAST(SUM(d.d3 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p3_11__dd,
  CAST(SUM(d.weight * d.weight * d.d4 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p4_7__w2_dd,
  CAST(SUM(d.share2 * d.d4 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p4_7__s2_dd,
  CAST(SUM(d.d4 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p4_7__dd,
  CAST(SUM(d.weight * d.weight * d.d4 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p4_8__w2_dd,
  CAST(SUM(d.share2 * d.d4 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p4_8__s2_dd,
  CAST(SUM(d.d4 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p4_8__dd,
  CAST(SUM(d.weight * d.weight * d.d4 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p4_9__w2_dd,
  CAST(SUM(d.share2 * d.d4 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p4_9__s2_dd,
  CAST(SUM(d.d4 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p4_9__dd,
  CAST(SUM(d.weight * d.weight * d.d4 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p4_10__w2_dd,
  CAST(SUM(d.share2 * d.d4 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p4_10__s2_dd,
  CAST(SUM(d.d4 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p4_10__dd,
  CAST(SUM(d.weight * d.weight * d.d4 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p4_11__w2_dd,
  CAST(SUM(d.share2 * d.d4 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p4_11__s2_dd,
  CAST(SUM(d.d4 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p4_11__dd,
  CAST(SUM(d.weight * d.weight * d.d5 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p5_7__w2_dd,
  CAST(SUM(d.share2 * d.d5 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p5_7__s2_dd,
  CAST(SUM(d.d5 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p5_7__dd,
  CAST(SUM(d.weight * d.weight * d.d5 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p5_8__w2_dd,
  CAST(SUM(d.share2 * d.d5 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p5_8__s2_dd,
  CAST(SUM(d.d5 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p5_8__dd,
  CAST(SUM(d.weight * d.weight * d.d5 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p5_9__w2_dd,
  CAST(SUM(d.share2 * d.d5 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p5_9__s2_dd,
  CAST(SUM(d.d5 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p5_9__dd,
  CAST(SUM(d.weight * d.weight * d.d5 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p5_10__w2_dd,
  CAST(SUM(d.share2 * d.d5 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p5_10__s2_dd,
  CAST(SUM(d.d5 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p5_10__dd,
  CAST(SUM(d.weight * d.weight * d.d5 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p5_11__w2_dd,
  CAST(SUM(d.share2 * d.d5 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p5_11__s2_dd,
  CAST(SUM(d.d5 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p5_11__dd,
  CAST(SUM(d.weight * d.weight * d.d6 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p6_7__w2_dd,
  CAST(SUM(d.share2 * d.d6 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p6_7__s2_dd,
  CAST(SUM(d.d6 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p6_7__dd,
  CAST(SUM(d.weight * d.weight * d.d6 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p6_8__w2_dd,
  CAST(SUM(d.share2 * d.d6 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p6_8__s2_dd,
  CAST(SUM(d.d6 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p6_8__dd,
  CAST(SUM(d.weight * d.weight * d.d6 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p6_9__w2_dd,
  CAST(SUM(d.share2 * d.d6 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p6_9__s2_dd,
  CAST(SUM(d.d6 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p6_9__dd,
  CAST(SUM(d.weight * d.weight * d.d6 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p6_10__w2_dd,
  CAST(SUM(d.share2 * d.d6 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p6_10__s2_dd,
  CAST(SUM(d.d6 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p6_10__dd,
  CAST(SUM(d.weight * d.weight * d.d6 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p6_11__w2_dd,
  CAST(SUM(d.share2 * d.d6 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p6_11__s2_dd,
  CAST(SUM(d.d6 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p6_11__dd,
  CAST(SUM(d.weight * d.weight * d.d7 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p7_7__w2_dd,
  CAST(SUM(d.share2 * d.d7 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p7_7__s2_dd,
  CAST(SUM(d.d7 * d.d7) AS DOUBLE PRECISION) / 2.0 AS p7_7__dd,
  CAST(SUM(d.weight * d.weight * d.d7 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p7_8__w2_dd,
  CAST(SUM(d.share2 * d.d7 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p7_8__s2_dd,
  CAST(SUM(d.d7 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p7_8__dd,
  CAST(SUM(d.weight * d.weight * d.d7 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p7_9__w2_dd,
  CAST(SUM(d.share2 * d.d7 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p7_9__s2_dd,
  CAST(SUM(d.d7 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p7_9__dd,
  CAST(SUM(d.weight * d.weight * d.d7 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p7_10__w2_dd,
  CAST(SUM(d.share2 * d.d7 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p7_10__s2_dd,
  CAST(SUM(d.d7 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p7_10__dd,
  CAST(SUM(d.weight * d.weight * d.d7 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p7_11__w2_dd,
  CAST(SUM(d.share2 * d.d7 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p7_11__s2_dd,
  CAST(SUM(d.d7 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p7_11__dd,
  CAST(SUM(d.weight * d.weight * d.d8 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p8_8__w2_dd,
  CAST(SUM(d.share2 * d.d8 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p8_8__s2_dd,
  CAST(SUM(d.d8 * d.d8) AS DOUBLE PRECISION) / 2.0 AS p8_8__dd,
  CAST(SUM(d.weight * d.weight * d.d8 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p8_9__w2_dd,
  CAST(SUM(d.share2 * d.d8 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p8_9__s2_dd,
  CAST(SUM(d.d8 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p8_9__dd,
  CAST(SUM(d.weight * d.weight * d.d8 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p8_10__w2_dd,
  CAST(SUM(d.share2 * d.d8 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p8_10__s2_dd,
  CAST(SUM(d.d8 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p8_10__dd,
  CAST(SUM(d.weight * d.weight * d.d8 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p8_11__w2_dd,
  CAST(SUM(d.share2 * d.d8 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p8_11__s2_dd,
  CAST(SUM(d.d8 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p8_11__dd,
  CAST(SUM(d.weight * d.weight * d.d9 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p9_9__w2_dd,
  CAST(SUM(d.share2 * d.d9 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p9_9__s2_dd,
  CAST(SUM(d.d9 * d.d9) AS DOUBLE PRECISION) / 2.0 AS p9_9__dd,
  CAST(SUM(d.weight * d.weight * d.d9 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p9_10__w2_dd,
  CAST(SUM(d.share2 * d.d9 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p9_10__s2_dd,
  CAST(SUM(d.d9 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p9_10__dd,
  CAST(SUM(d.weight * d.weight * d.d9 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p9_11__w2_dd,
  CAST(SUM(d.share2 * d.d9 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p9_11__s2_dd,
  CAST(SUM(d.d9 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p9_11__dd,
  CAST(SUM(d.weight * d.weight * d.d10 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p10_10__w2_dd,
  CAST(SUM(d.share2 * d.d10 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p10_10__s2_dd,
  CAST(SUM(d.d10 * d.d10) AS DOUBLE PRECISION) / 2.0 AS p10_10__dd,
  CAST(SUM(d.weight * d.weight * d.d10 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p10_11__w2_dd,
  CAST(SUM(d.share2 * d.d10 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p10_11__s2_dd,
  CAST(SUM(d.d10 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p10_11__dd,
  CAST(SUM(d.weight * d.weight * d.d11 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p11_11__w2_dd,
  CAST(SUM(d.share2 * d.d11 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p11_11__s2_dd,
  CAST(SUM(d.d11 * d.d11) AS DOUBLE PRECISION) / 2.0 AS p11_11__dd
FROM differences AS d
GROUP BY
  d.treated
ORDER BY
  d.treated;
