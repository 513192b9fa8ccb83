-- unit_size_pass: per-unit moments summed over the units of each size (row count n), for
-- the between and random-effects estimators: units of one size share their
-- random-effects weight, so these sums give the within, between and quasi-demeaned
-- cross-products for any variance components (estimators/between.py).
-- inputs:  {{units}} per-unit moments (unit_moments.sql): n, s_j, p_j_l, t_lo, t_hi;
--          {{sums}}  over the units of a size: p_j_l - s_j * s_l / n AS w_j_l (within),
--                    s_j * s_l / n AS b_j_l (between, weighted by n), s_j AS m_j and the raw
--                    squares p_j_j AS r_j.
-- params:  $s_j shifts and $d_j scales (through {{units}}).
-- output:  one row per unit size: n, n_units, the sums, t_min, t_max.
SELECT n, count(*) AS n_units, {{sums}}, min(t_lo) AS t_min, max(t_hi) AS t_max
FROM {{units}} AS u
GROUP BY n
ORDER BY n
