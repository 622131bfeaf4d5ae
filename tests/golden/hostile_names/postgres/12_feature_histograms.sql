-- sqlmatch study 'annual_pass', step 12: feature_histograms (postgres)
-- Binned distribution of each numeric feature by group, before and after matching (for plots).
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_weighted_units
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Distribution of each numeric feature, treated vs control, before and after matching: 60
   equal-width bins over the feature's range among study units; per bin and group the unit count
   (before) and the sum of matching weights (after). One scan finds every feature's range and one
   more counts every bin: each unit's row is repeated once per feature and grouped by (feature,
   bin, group). Every bin of the grid is returned, empty or not, so the number of rows is fixed by
   the spec: features x 60 bins x 2 groups. */
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
), feature_list AS (
  SELECT
    'pre_trips' AS feature
  UNION ALL
  SELECT
    'pre_fare' AS feature
), ranges_wide AS (
  SELECT
    MIN(CAST(CAST(pre_trips AS DECIMAL(38, 10)) AS DOUBLE PRECISION)) AS pre_trips__low,
    CAST((
      MAX(CAST(CAST(pre_trips AS DECIMAL(38, 10)) AS DOUBLE PRECISION)) - MIN(CAST(CAST(pre_trips AS DECIMAL(38, 10)) AS DOUBLE PRECISION))
    ) AS DOUBLE PRECISION) / 60.0 AS pre_trips__width,
    MIN(CAST(CAST(pre_fare AS DECIMAL(38, 10)) AS DOUBLE PRECISION)) AS pre_fare__low,
    CAST((
      MAX(CAST(CAST(pre_fare AS DECIMAL(38, 10)) AS DOUBLE PRECISION)) - MIN(CAST(CAST(pre_fare AS DECIMAL(38, 10)) AS DOUBLE PRECISION))
    ) AS DOUBLE PRECISION) / 60.0 AS pre_fare__width
  FROM "sqlmatch".annual_pass_weighted_units
), ranges AS (
  SELECT
    fl.feature,
    CASE fl.feature
      WHEN 'pre_trips'
      THEN w.pre_trips__low
      WHEN 'pre_fare'
      THEN w.pre_fare__low
    END AS low,
    CASE fl.feature
      WHEN 'pre_trips'
      THEN w.pre_trips__width
      WHEN 'pre_fare'
      THEN w.pre_fare__width
    END AS width
  FROM ranges_wide AS w
  CROSS JOIN feature_list AS fl
), unit_values AS (
  SELECT
    r.feature,
    r.low,
    r.width,
    m.treated,
    CASE r.feature
      WHEN 'pre_trips'
      THEN CAST(CAST(m.pre_trips AS DECIMAL(38, 10)) AS DOUBLE PRECISION)
      WHEN 'pre_fare'
      THEN CAST(CAST(m.pre_fare AS DECIMAL(38, 10)) AS DOUBLE PRECISION)
    END AS value,
    COALESCE(m.match__weight, 0) AS weight
  FROM "sqlmatch".annual_pass_weighted_units AS m
  CROSS JOIN ranges AS r
), counts AS (
  SELECT
    feature,
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          value - low
        ) AS DOUBLE PRECISION) / NULLIF(width, 0)) AS INT),
        59
      ),
      0
    ) AS bin,
    treated,
    COUNT(*) AS n_units,
    SUM(weight) AS sum_w
  FROM unit_values
  WHERE
    NOT value IS NULL
  GROUP BY
    feature,
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          value - low
        ) AS DOUBLE PRECISION) / NULLIF(width, 0)) AS INT),
        59
      ),
      0
    ),
    treated
)
SELECT
  r.feature,
  r.low,
  r.width,
  g.bin,
  g.treated,
  COALESCE(c.n_units, 0) AS n_units,
  COALESCE(c.sum_w, 0) AS sum_w
FROM ranges AS r
CROSS JOIN grid AS g
LEFT JOIN counts AS c
  ON c.feature = r.feature AND c.bin = g.bin AND c.treated = g.treated
ORDER BY
  feature,
  bin,
  treated;
