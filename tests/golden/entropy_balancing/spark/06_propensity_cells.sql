-- sqlmatch study 'annual_pass', step 06: propensity_cells (spark)
-- Units grouped by their values of the propensity features, with unit and treated counts (the data each Newton step sums over).
-- kind: writes a table
-- reads: sqlmatch.annual_pass_measures
-- writes: sqlmatch.annual_pass_score_cells
-- time zone: the first statement sets this session's time zone to UTC (it stays so for the rest of the session)
-- swap: spark DDL is not written in a transaction here, so between the DROP of the old table and the RENAME the table is absent; a failure there leaves only the __building table: run this file again

SET spark.sql.session.timeZone = UTC;

DROP TABLE IF EXISTS `sqlmatch`.annual_pass_score_cells__building;

CREATE TABLE `sqlmatch`.annual_pass_score_cells__building AS
/* Propensity model, the data it is fitted on: the units grouped by their values of the model's
   features (pre_trips, pre_minutes, age_band), with the number of units and of treated units per group.
   Units with equal feature values add identical terms to the score vector, the information
   matrix and the log-likelihood, so each Newton step sums over these groups instead of over the
   units: the same fit, and a step reads one row per distinct combination of values (few when the
   features are counts and categories; as many as the units when a feature is continuous). */
SELECT
  m.pre_trips,
  m.pre_minutes,
  m.age_band,
  COUNT(*) AS cell__units,
  SUM(m.treated) AS cell__treated
FROM `sqlmatch`.annual_pass_measures AS m
GROUP BY
  m.pre_trips,
  m.pre_minutes,
  m.age_band;

DROP TABLE IF EXISTS `sqlmatch`.annual_pass_score_cells;

ALTER TABLE `sqlmatch`.annual_pass_score_cells__building
RENAME TO `sqlmatch`.annual_pass_score_cells;
