-- sqlmatch study 'annual_pass', step 10: score_strata (postgres)
-- Score subclass of every unit inside the common support.
-- kind: writes a table
-- reads: sqlmatch.annual_pass_scores, sqlmatch.annual_pass_score_edges
-- writes: sqlmatch.annual_pass_score_strata
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)
-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was

SET TimeZone = 'UTC';

SET jit = off;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_score_strata__building;

CREATE TABLE "sqlmatch".annual_pass_score_strata__building AS
/* Score subclasses: bin k holds scores in (edge_k, edge_k+1] (bin 0 from the lowest score, the
   last bin up to the highest). Units outside the common support, the overlap
   [max of the two groups' lowest scores, min of their highest], are dropped here. */
WITH edges AS (
  SELECT
    MAX(CASE WHEN k = 1 THEN edge END) AS e1,
    MAX(CASE WHEN k = 2 THEN edge END) AS e2,
    MAX(CASE WHEN k = 3 THEN edge END) AS e3,
    MAX(CASE WHEN k = 4 THEN edge END) AS e4
  FROM "sqlmatch".annual_pass_score_edges
), support AS (
  SELECT
    GREATEST(
      MIN(CASE WHEN treated = 1 THEN score END),
      MIN(CASE WHEN treated = 0 THEN score END)
    ) AS low,
    LEAST(
      MAX(CASE WHEN treated = 1 THEN score END),
      MAX(CASE WHEN treated = 0 THEN score END)
    ) AS high
  FROM "sqlmatch".annual_pass_scores
)
SELECT
  s.unit_key,
  s.treated,
  CASE
    WHEN s.score <= e.e1
    THEN 0
    WHEN s.score <= e.e2
    THEN 1
    WHEN s.score <= e.e3
    THEN 2
    WHEN s.score <= e.e4
    THEN 3
    ELSE 4
  END AS score_bin
FROM "sqlmatch".annual_pass_scores AS s
CROSS JOIN edges AS e
CROSS JOIN support AS r
WHERE
  s.score >= r.low AND s.score <= r.high;

BEGIN TRANSACTION;

DROP TABLE IF EXISTS "sqlmatch".annual_pass_score_strata;

ALTER TABLE "sqlmatch".annual_pass_score_strata__building
RENAME TO annual_pass_score_strata;

COMMIT;
