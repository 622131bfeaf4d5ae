-- sqlmatch study 'annual_pass', step 12: feature_histograms (postgres)
-- Binned distribution of each numeric feature by group, before and after matching (for plots).
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_measures, sqlmatch.annual_pass_weights

/* Distribution of each numeric feature, treated vs control, before and after matching: 20
   equal-width bins over the feature's range among study units; per bin and group the unit count
   (before) and the sum of matching weights (after). Every bin of the grid is returned, empty or
   not, so the number of rows is fixed by the spec: features x 20 bins x 2 groups. */
WITH grid AS (
  SELECT
    b.bin,
    g.treated
  FROM (
    SELECT
      0 AS bin
    UNION ALL
    SELECT
      1 AS bin
    UNION ALL
    SELECT
      2 AS bin
    UNION ALL
    SELECT
      3 AS bin
    UNION ALL
    SELECT
      4 AS bin
    UNION ALL
    SELECT
      5 AS bin
    UNION ALL
    SELECT
      6 AS bin
    UNION ALL
    SELECT
      7 AS bin
    UNION ALL
    SELECT
      8 AS bin
    UNION ALL
    SELECT
      9 AS bin
    UNION ALL
    SELECT
      10 AS bin
    UNION ALL
    SELECT
      11 AS bin
    UNION ALL
    SELECT
      12 AS bin
    UNION ALL
    SELECT
      13 AS bin
    UNION ALL
    SELECT
      14 AS bin
    UNION ALL
    SELECT
      15 AS bin
    UNION ALL
    SELECT
      16 AS bin
    UNION ALL
    SELECT
      17 AS bin
    UNION ALL
    SELECT
      18 AS bin
    UNION ALL
    SELECT
      19 AS bin
  ) AS b
  CROSS JOIN (
    SELECT
      0 AS treated
    UNION ALL
    SELECT
      1 AS treated
  ) AS g
), pre_trips__range AS (
  SELECT
    MIN(pre_trips) AS low,
    CAST((
      MAX(pre_trips) - MIN(pre_trips)
    ) AS DOUBLE PRECISION) / 20.0 AS width
  FROM "sqlmatch".annual_pass_measures
), pre_trips__counts AS (
  SELECT
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          m.pre_trips - r.low
        ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)) AS INT),
        19
      ),
      0
    ) AS bin,
    m.treated,
    COUNT(*) AS n_units,
    SUM(COALESCE(w.weight, 0)) AS sum_w
  FROM "sqlmatch".annual_pass_measures AS m
  LEFT JOIN (
    SELECT
      unit_key,
      SUM(weight) AS weight
    FROM "sqlmatch".annual_pass_weights
    GROUP BY
      unit_key
  ) AS w
    ON w.unit_key = m.unit_key
  CROSS JOIN pre_trips__range AS r
  WHERE
    NOT m.pre_trips IS NULL
  GROUP BY
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          m.pre_trips - r.low
        ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)) AS INT),
        19
      ),
      0
    ),
    m.treated
), pre_minutes__range AS (
  SELECT
    MIN(pre_minutes) AS low,
    CAST((
      MAX(pre_minutes) - MIN(pre_minutes)
    ) AS DOUBLE PRECISION) / 20.0 AS width
  FROM "sqlmatch".annual_pass_measures
), pre_minutes__counts AS (
  SELECT
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          m.pre_minutes - r.low
        ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)) AS INT),
        19
      ),
      0
    ) AS bin,
    m.treated,
    COUNT(*) AS n_units,
    SUM(COALESCE(w.weight, 0)) AS sum_w
  FROM "sqlmatch".annual_pass_measures AS m
  LEFT JOIN (
    SELECT
      unit_key,
      SUM(weight) AS weight
    FROM "sqlmatch".annual_pass_weights
    GROUP BY
      unit_key
  ) AS w
    ON w.unit_key = m.unit_key
  CROSS JOIN pre_minutes__range AS r
  WHERE
    NOT m.pre_minutes IS NULL
  GROUP BY
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          m.pre_minutes - r.low
        ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)) AS INT),
        19
      ),
      0
    ),
    m.treated
), pre_fare_per_trip__range AS (
  SELECT
    MIN(pre_fare_per_trip) AS low,
    CAST((
      MAX(pre_fare_per_trip) - MIN(pre_fare_per_trip)
    ) AS DOUBLE PRECISION) / 20.0 AS width
  FROM "sqlmatch".annual_pass_measures
), pre_fare_per_trip__counts AS (
  SELECT
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          m.pre_fare_per_trip - r.low
        ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)) AS INT),
        19
      ),
      0
    ) AS bin,
    m.treated,
    COUNT(*) AS n_units,
    SUM(COALESCE(w.weight, 0)) AS sum_w
  FROM "sqlmatch".annual_pass_measures AS m
  LEFT JOIN (
    SELECT
      unit_key,
      SUM(weight) AS weight
    FROM "sqlmatch".annual_pass_weights
    GROUP BY
      unit_key
  ) AS w
    ON w.unit_key = m.unit_key
  CROSS JOIN pre_fare_per_trip__range AS r
  WHERE
    NOT m.pre_fare_per_trip IS NULL
  GROUP BY
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          m.pre_fare_per_trip - r.low
        ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)) AS INT),
        19
      ),
      0
    ),
    m.treated
), pre_active_days__range AS (
  SELECT
    MIN(pre_active_days) AS low,
    CAST((
      MAX(pre_active_days) - MIN(pre_active_days)
    ) AS DOUBLE PRECISION) / 20.0 AS width
  FROM "sqlmatch".annual_pass_measures
), pre_active_days__counts AS (
  SELECT
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          m.pre_active_days - r.low
        ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)) AS INT),
        19
      ),
      0
    ) AS bin,
    m.treated,
    COUNT(*) AS n_units,
    SUM(COALESCE(w.weight, 0)) AS sum_w
  FROM "sqlmatch".annual_pass_measures AS m
  LEFT JOIN (
    SELECT
      unit_key,
      SUM(weight) AS weight
    FROM "sqlmatch".annual_pass_weights
    GROUP BY
      unit_key
  ) AS w
    ON w.unit_key = m.unit_key
  CROSS JOIN pre_active_days__range AS r
  WHERE
    NOT m.pre_active_days IS NULL
  GROUP BY
    COALESCE(
      LEAST(
        CAST(FLOOR(CAST((
          m.pre_active_days - r.low
        ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)) AS INT),
        19
      ),
      0
    ),
    m.treated
), pre_days_since_last__range AS (
  SELECT
    MIN(pre_days_since_last) AS low,
    CAST((
      MAX(pre_days_since_last) - MIN(pre_days_since_last)
    ) AS DOUBLE PRECISION) / 20.0 AS width
  FROM "sqlmatch".annual_pass_measures
), pre_days_since_last__counts AS (
  SELECT
    COALESCE(
      LEAST(
        CAST(FLOOR(
          CAST((
            m.pre_days_since_last - r.low
          ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)
        ) AS INT),
        19
      ),
      0
    ) AS bin,
    m.treated,
    COUNT(*) AS n_units,
    SUM(COALESCE(w.weight, 0)) AS sum_w
  FROM "sqlmatch".annual_pass_measures AS m
  LEFT JOIN (
    SELECT
      unit_key,
      SUM(weight) AS weight
    FROM "sqlmatch".annual_pass_weights
    GROUP BY
      unit_key
  ) AS w
    ON w.unit_key = m.unit_key
  CROSS JOIN pre_days_since_last__range AS r
  WHERE
    NOT m.pre_days_since_last IS NULL
  GROUP BY
    COALESCE(
      LEAST(
        CAST(FLOOR(
          CAST((
            m.pre_days_since_last - r.low
          ) AS DOUBLE PRECISION) / NULLIF(r.width, 0)
        ) AS INT),
        19
      ),
      0
    ),
    m.treated
)
SELECT
  'pre_trips' AS feature,
  r.low,
  r.width,
  g.bin,
  g.treated,
  COALESCE(c.n_units, 0) AS n_units,
  COALESCE(c.sum_w, 0) AS sum_w
FROM grid AS g
CROSS JOIN pre_trips__range AS r
LEFT JOIN pre_trips__counts AS c
  ON c.bin = g.bin AND c.treated = g.treated
UNION ALL
SELECT
  'pre_minutes' AS feature,
  r.low,
  r.width,
  g.bin,
  g.treated,
  COALESCE(c.n_units, 0) AS n_units,
  COALESCE(c.sum_w, 0) AS sum_w
FROM grid AS g
CROSS JOIN pre_minutes__range AS r
LEFT JOIN pre_minutes__counts AS c
  ON c.bin = g.bin AND c.treated = g.treated
UNION ALL
SELECT
  'pre_fare_per_trip' AS feature,
  r.low,
  r.width,
  g.bin,
  g.treated,
  COALESCE(c.n_units, 0) AS n_units,
  COALESCE(c.sum_w, 0) AS sum_w
FROM grid AS g
CROSS JOIN pre_fare_per_trip__range AS r
LEFT JOIN pre_fare_per_trip__counts AS c
  ON c.bin = g.bin AND c.treated = g.treated
UNION ALL
SELECT
  'pre_active_days' AS feature,
  r.low,
  r.width,
  g.bin,
  g.treated,
  COALESCE(c.n_units, 0) AS n_units,
  COALESCE(c.sum_w, 0) AS sum_w
FROM grid AS g
CROSS JOIN pre_active_days__range AS r
LEFT JOIN pre_active_days__counts AS c
  ON c.bin = g.bin AND c.treated = g.treated
UNION ALL
SELECT
  'pre_days_since_last' AS feature,
  r.low,
  r.width,
  g.bin,
  g.treated,
  COALESCE(c.n_units, 0) AS n_units,
  COALESCE(c.sum_w, 0) AS sum_w
FROM grid AS g
CROSS JOIN pre_days_since_last__range AS r
LEFT JOIN pre_days_since_last__counts AS c
  ON c.bin = g.bin AND c.treated = g.treated
ORDER BY
  feature,
  bin,
  treated;
