-- sqlmatch study 'annual_pass', step 18: score_histogram (postgres)
-- Binned propensity scores by group, before and after matching (overlap plot).
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_scores, sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Overlap of the propensity score (logit scale), treated vs control, before and after matching:
   60 equal-width bins over the range of all scores; per bin and group the unit count and the
   sum of matching weights. Every bin is returned, empty or not: 60 x 2 rows. */
WITH grid AS (
  SELECT
    t.k * 10 + o.k AS bin,
    g.treated
  FROM (
    SELECT
      0 AS k
    UNION ALL
    SELECT
      1 AS k
    UNION ALL
    SELECT
      2 AS k
    UNION ALL
    SELECT
      3 AS k
    UNION ALL
    SELECT
      4 AS k
    UNION ALL
    SELECT
      5 AS k
    UNION ALL
    SELECT
      6 AS k
    UNION ALL
    SELECT
      7 AS k
    UNION ALL
    SELECT
      8 AS k
    UNION ALL
    SELECT
      9 AS k
  ) AS o
  CROSS JOIN (
    SELECT
      0 AS k
    UNION ALL
    SELECT
      1 AS k
    UNION ALL
    SELECT
      2 AS k
    UNION ALL
    SELECT
      3 AS k
    UNION ALL
    SELECT
      4 AS k
    UNION ALL
    SELECT
      5 AS k
  ) AS t
  CROSS JOIN (
    SELECT
      0 AS treated
    UNION ALL
    SELECT
      1 AS treated
  ) AS g
  WHERE
    t.k * 10 + o.k < 60
), r AS (
  SELECT
    MIN(CAST(CAST(score AS DECIMAL(38, 10)) AS DOUBLE PRECISION)) AS low,
    CAST((
      MAX(CAST(CAST(score AS DECIMAL(38, 10)) AS DOUBLE PRECISION)) - MIN(CAST(CAST(score AS DECIMAL(38, 10)) AS DOUBLE PRECISION))
    ) AS DOUBLE PRECISION) / 60.0 AS width
  FROM "sqlmatch".annual_pass_scores
), counts AS (
  SELECT
    COALESCE(
      LEAST(
        CAST(FLOOR(
          CAST((
            CAST(CAST(s.score AS DECIMAL(38, 10)) AS DOUBLE PRECISION) - r.low
          ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)
        ) AS INT),
        59
      ),
      0
    ) AS bin,
    s.treated,
    COUNT(*) AS n_units,
    SUM(COALESCE(w.match__weight, 0)) AS sum_w
  FROM "sqlmatch".annual_pass_scores AS s
  LEFT JOIN "sqlmatch".annual_pass_weighted_units AS w
    ON w.unit_key = s.unit_key
  CROSS JOIN r
  GROUP BY
    COALESCE(
      LEAST(
        CAST(FLOOR(
          CAST((
            CAST(CAST(s.score AS DECIMAL(38, 10)) AS DOUBLE PRECISION) - r.low
          ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)
        ) AS INT),
        59
      ),
      0
    ),
    s.treated
)
SELECT
  r.low,
  r.width,
  g.bin,
  g.treated,
  COALESCE(c.n_units, 0) AS n_units,
  COALESCE(c.sum_w, 0) AS sum_w
FROM grid AS g
CROSS JOIN r
LEFT JOIN counts AS c
  ON c.bin = g.bin AND c.treated = g.treated
ORDER BY
  g.bin,
  g.treated;
