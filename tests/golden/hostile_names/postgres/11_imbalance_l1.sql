-- sqlmatch study 'annual_pass', step 11: imbalance_l1 (postgres)
-- Multivariate L1 imbalance on a fixed histogram, before and after matching.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Multivariate imbalance L1 = 1/2 * sum over cells |f_cell - g_cell|, f and g the shares of
   treated and control units in each cell of one fixed histogram (Iacus, King & Porro 2011, JASA
   106:345, and 2012): before matching every unit counts once, after matching units count with
   their weights. The histogram: 10 equal-width bins over the range of each numeric
   feature (pre_trips) crossed with the levels of the categorical
   ones (age_band). 0 = identical distributions, 1 = no overlap. One row. */
WITH ranges AS (
  SELECT
    MIN(CAST(CAST(m.pre_trips AS DECIMAL(38, 10)) AS DOUBLE PRECISION)) AS pre_trips__low,
    CAST((
      MAX(CAST(CAST(m.pre_trips AS DECIMAL(38, 10)) AS DOUBLE PRECISION)) - MIN(CAST(CAST(m.pre_trips AS DECIMAL(38, 10)) AS DOUBLE PRECISION))
    ) AS DOUBLE PRECISION) / 10.0 AS pre_trips__width
  FROM "sqlmatch".annual_pass_weighted_units AS m
), cells AS (
  SELECT
    m.treated,
    COALESCE(
      LEAST(
        CAST(FLOOR(
          CAST((
            CAST(CAST(m.pre_trips AS DECIMAL(38, 10)) AS DOUBLE PRECISION) - r.pre_trips__low
          ) AS DOUBLE PRECISION) / NULLIF(r.pre_trips__width, 0)
        ) AS INT),
        9
      ),
      -1
    ) AS pre_trips__h,
    COALESCE(m.age_band, '(missing)') AS age_band__h,
    CAST(COUNT(*) AS DOUBLE PRECISION) AS n,
    SUM(COALESCE(m.match__weight, 0)) AS sum_w
  FROM "sqlmatch".annual_pass_weighted_units AS m
  CROSS JOIN ranges AS r
  GROUP BY
    m.treated,
    pre_trips__h,
    age_band__h
), totals AS (
  SELECT
    treated,
    SUM(n) AS n,
    SUM(sum_w) AS sum_w
  FROM cells
  GROUP BY
    treated
), shares AS (
  SELECT
    c.pre_trips__h,
    c.age_band__h,
    SUM(
      CASE
        WHEN c.treated = 1
        THEN CAST(c.n AS DOUBLE PRECISION) / NULLIF(t.n, 0)
        ELSE 0
      END
    ) AS treated_before,
    SUM(
      CASE
        WHEN c.treated = 0
        THEN CAST(c.n AS DOUBLE PRECISION) / NULLIF(t.n, 0)
        ELSE 0
      END
    ) AS control_before,
    SUM(
      CASE
        WHEN c.treated = 1
        THEN CAST(c.sum_w AS DOUBLE PRECISION) / NULLIF(t.sum_w, 0)
        ELSE 0
      END
    ) AS treated_after,
    SUM(
      CASE
        WHEN c.treated = 0
        THEN CAST(c.sum_w AS DOUBLE PRECISION) / NULLIF(t.sum_w, 0)
        ELSE 0
      END
    ) AS control_after
  FROM cells AS c
  INNER JOIN totals AS t
    ON t.treated = c.treated
  GROUP BY
    c.pre_trips__h,
    c.age_band__h
)
SELECT
  0.5 * SUM(ABS(treated_before - control_before)) AS l1_before,
  0.5 * SUM(ABS(treated_after - control_after)) AS l1_after,
  COUNT(*) AS n_cells
FROM shares;
