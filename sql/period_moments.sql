-- period_moments: per-period count, sums and sums of products of the design columns (for
-- period effects in pooled and differenced regressions: indicators need only these).
-- inputs:  {{rows}}       used rows (design or differenced);
--          {{aggregates}} count(*) AS n, min/max(k_period), sum(z_j) AS s_j, sum(z_j * z_l) AS p_j_l,
--                         count(DISTINCT k_unit) AS n_units.
-- params:  $s_j shifts.
-- output:  one row per period.
SELECT k_period AS period, {{aggregates}}
FROM ({{rows}}) AS r
GROUP BY k_period
