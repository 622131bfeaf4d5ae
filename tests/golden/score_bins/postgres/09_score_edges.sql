-- sqlmatch study 'annual_pass', step 09: score_edges (postgres)
-- Boundaries of 5 score subclasses at quantiles of the treated units' scores.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_scores
-- writes: sqlmatch.annual_pass_score_edges
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_score_edges__building;

CREATE TABLE "sqlmatch".annual_pass_score_edges__building AS
/* Subclass boundaries on the propensity score: the 4 inner quantiles k/5 of the
   treated units' scores, by linear interpolation between order statistics (position
   (n - 1) * k / 5, as numpy.quantile's default). Exact on every engine: ROW_NUMBER with the
   unit key as tiebreak, no approximate percentile function. */
WITH treated AS (
  SELECT
    s.score,
    ROW_NUMBER() OVER (ORDER BY s.score, s.unit_key) - 1 AS pos
  FROM "sqlmatch".annual_pass_scores AS s
  WHERE
    s.treated = 1
), counted AS (
  SELECT
    COUNT(*) AS n
  FROM treated
), quantiles AS (
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
), positions AS (
  SELECT
    q.k,
    CAST(CAST(c.n - 1 AS DOUBLE PRECISION) * q.k AS DOUBLE PRECISION) / 5.0 AS h,
    CAST(FLOOR(CAST(CAST(c.n - 1 AS DOUBLE PRECISION) * q.k AS DOUBLE PRECISION) / 5.0) AS INT) AS lo
  FROM quantiles AS q
  CROSS JOIN counted AS c
)
SELECT
  p.k,
  low.score + (
    p.h - p.lo
  ) * (
    COALESCE(high.score, low.score) - low.score
  ) AS edge
FROM positions AS p
INNER JOIN treated AS low
  ON low.pos = p.lo
LEFT JOIN treated AS high
  ON high.pos = p.lo + 1;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_score_edges;

ALTER TABLE "sqlmatch".annual_pass_score_edges__building
RENAME TO annual_pass_score_edges;

COMMIT;
