-- sqlmatch study 'annual_pass', step 14: matching_summary (postgres)
-- Units considered and matched by nearest-neighbour matching.
-- kind: returns aggregates to sqlmatch
-- reads: sqlmatch.annual_pass_nearest_neighbour_units, sqlmatch.annual_pass_nearest_neighbour_matches, sqlmatch.annual_pass_match_weights
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)

SET TimeZone = 'UTC';

SET jit = off;

/* Nearest-neighbour matching, what was kept. Units considered: those with a propensity score.
   Strata group the matched treated units by their number of control slots, so n_cells = n_strata =
   the number of such groups. n_matches: (treated unit, control unit) matches, every control of a tie counted.
   n_cells_dropped = treated units left without a control within the caliper. One row. */
WITH considered AS (
  SELECT
    SUM(u.treated) AS n_treated,
    SUM(1 - u.treated) AS n_control
  FROM "sqlmatch".annual_pass_nearest_neighbour_units AS u
), matched AS (
  SELECT
    COUNT(DISTINCT CASE WHEN w.treated = 1 THEN w.unit_key END) AS n_treated_matched,
    COUNT(DISTINCT CASE WHEN w.treated = 0 THEN w.unit_key END) AS n_control_matched
  FROM "sqlmatch".annual_pass_match_weights AS w
), match_rows AS (
  SELECT
    SUM(m.n_controls) AS n_matches
  FROM "sqlmatch".annual_pass_nearest_neighbour_matches AS m
), strata AS (
  SELECT
    COUNT(DISTINCT w.stratum) AS n_strata
  FROM "sqlmatch".annual_pass_match_weights AS w
)
SELECT
  s.n_strata AS n_cells,
  s.n_strata,
  COALESCE(c.n_treated, 0) - m.n_treated_matched AS n_cells_dropped,
  COALESCE(c.n_treated, 0) AS n_treated,
  m.n_treated_matched,
  COALESCE(c.n_control, 0) AS n_control,
  m.n_control_matched,
  r.n_matches,
  0 AS n_treated_still_open,
  0 AS n_treated_cut_short
FROM considered AS c
CROSS JOIN matched AS m
CROSS JOIN match_rows AS r
CROSS JOIN strata AS s;
