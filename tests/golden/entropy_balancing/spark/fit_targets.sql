/* Entropy balancing, the targets (one row): per moment function the enrolled units' sum and sum
   of squares (their mean is the target) and the non-enrolled units' sum, sum of squares and range
   (a target outside the range cannot be reached by any weights), and the number of values
   present. sqlmatch centres and scales the moments with these before the Newton steps.
   Moments: c0 = pre_trips; c1 = pre_minutes; c2 = age_band = '25-34'; c3 = log(1 + pre_trips); c4 = (age_band = '25-34') * (log(1 + pre_trips)). */
WITH moments AS (
  SELECT
    m.treated AS t,
    CAST(m.pre_trips AS DOUBLE) AS c0,
    CAST(m.pre_minutes AS DOUBLE) AS c1,
    CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END AS c2,
    CAST(LN(1.0 + GREATEST(m.pre_trips, 0.0)) AS DOUBLE) AS c3,
    CAST((
      CASE WHEN COALESCE(m.age_band, '(missing)') = '25-34' THEN 1.0 ELSE 0.0 END
    ) * (
      LN(1.0 + GREATEST(m.pre_trips, 0.0))
    ) AS DOUBLE) AS c4
  FROM `sqlmatch`.annual_pass_measures AS m
)
SELECT
  SUM(CASE WHEN t = 1 THEN 1 ELSE 0 END) AS eb_n_treated,
  SUM(CASE WHEN t = 0 THEN 1 ELSE 0 END) AS eb_n_control,
  SUM(CASE WHEN t = 1 THEN c0 END) AS eb_t_sum_0,
  SUM(CASE WHEN t = 1 THEN c0 * c0 END) AS eb_t_sumsq_0,
  MIN(CASE WHEN t = 1 THEN c0 END) AS eb_t_min_0,
  MAX(CASE WHEN t = 1 THEN c0 END) AS eb_t_max_0,
  SUM(CASE WHEN t = 0 THEN c0 END) AS eb_c_sum_0,
  SUM(CASE WHEN t = 0 THEN c0 * c0 END) AS eb_c_sumsq_0,
  MIN(CASE WHEN t = 0 THEN c0 END) AS eb_c_min_0,
  MAX(CASE WHEN t = 0 THEN c0 END) AS eb_c_max_0,
  COUNT(c0) AS eb_present_0,
  SUM(CASE WHEN t = 1 THEN c1 END) AS eb_t_sum_1,
  SUM(CASE WHEN t = 1 THEN c1 * c1 END) AS eb_t_sumsq_1,
  MIN(CASE WHEN t = 1 THEN c1 END) AS eb_t_min_1,
  MAX(CASE WHEN t = 1 THEN c1 END) AS eb_t_max_1,
  SUM(CASE WHEN t = 0 THEN c1 END) AS eb_c_sum_1,
  SUM(CASE WHEN t = 0 THEN c1 * c1 END) AS eb_c_sumsq_1,
  MIN(CASE WHEN t = 0 THEN c1 END) AS eb_c_min_1,
  MAX(CASE WHEN t = 0 THEN c1 END) AS eb_c_max_1,
  COUNT(c1) AS eb_present_1,
  SUM(CASE WHEN t = 1 THEN c2 END) AS eb_t_sum_2,
  SUM(CASE WHEN t = 1 THEN c2 * c2 END) AS eb_t_sumsq_2,
  MIN(CASE WHEN t = 1 THEN c2 END) AS eb_t_min_2,
  MAX(CASE WHEN t = 1 THEN c2 END) AS eb_t_max_2,
  SUM(CASE WHEN t = 0 THEN c2 END) AS eb_c_sum_2,
  SUM(CASE WHEN t = 0 THEN c2 * c2 END) AS eb_c_sumsq_2,
  MIN(CASE WHEN t = 0 THEN c2 END) AS eb_c_min_2,
  MAX(CASE WHEN t = 0 THEN c2 END) AS eb_c_max_2,
  COUNT(c2) AS eb_present_2,
  SUM(CASE WHEN t = 1 THEN c3 END) AS eb_t_sum_3,
  SUM(CASE WHEN t = 1 THEN c3 * c3 END) AS eb_t_sumsq_3,
  MIN(CASE WHEN t = 1 THEN c3 END) AS eb_t_min_3,
  MAX(CASE WHEN t = 1 THEN c3 END) AS eb_t_max_3,
  SUM(CASE WHEN t = 0 THEN c3 END) AS eb_c_sum_3,
  SUM(CASE WHEN t = 0 THEN c3 * c3 END) AS eb_c_sumsq_3,
  MIN(CASE WHEN t = 0 THEN c3 END) AS eb_c_min_3,
  MAX(CASE WHEN t = 0 THEN c3 END) AS eb_c_max_3,
  COUNT(c3) AS eb_present_3,
  SUM(CASE WHEN t = 1 THEN c4 END) AS eb_t_sum_4,
  SUM(CASE WHEN t = 1 THEN c4 * c4 END) AS eb_t_sumsq_4,
  MIN(CASE WHEN t = 1 THEN c4 END) AS eb_t_min_4,
  MAX(CASE WHEN t = 1 THEN c4 END) AS eb_t_max_4,
  SUM(CASE WHEN t = 0 THEN c4 END) AS eb_c_sum_4,
  SUM(CASE WHEN t = 0 THEN c4 * c4 END) AS eb_c_sumsq_4,
  MIN(CASE WHEN t = 0 THEN c4 END) AS eb_c_min_4,
  MAX(CASE WHEN t = 0 THEN c4 END) AS eb_c_max_4,
  COUNT(c4) AS eb_present_4
FROM moments;
