-- period_moments: per-period count, sums and sums of products of the design columns (for
-- period effects in pooled and differenced regressions: indicators need only these), and
-- one more row over all periods for the count of distinct units.
-- inputs:  {{rows}}       used rows (design or differenced);
--          {{aggregates}} count(*) AS n, sum(z_j) AS s_j, sum(z_j * z_l) AS p_j_l,
--                         count(DISTINCT k_unit) AS n_units.
-- params:  $s_j shifts.
-- output:  one row per period (all_periods = 0) and one for all rows (all_periods = 1).
SELECT k_period AS period, GROUPING(k_period) AS all_periods, {{aggregates}}
FROM ({{rows}}) AS r
GROUP BY GROUPING SETS ((k_period), ())
