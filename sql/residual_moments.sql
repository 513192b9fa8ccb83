-- residual_moments: sums of u~^2 x~_j x~_l over rows (the heteroskedasticity-robust meat).
-- inputs:  {{centered}} the CTEs making x~ AS x_j and u~ AS u per row (sqlbuild.centered_ctes);
--          {{sums}}     sum(u * u * x_j * x_l) AS h_j_l items.
-- params:  $s_j shifts, $b_j coefficients, period values and effects.
-- output:  one row.
WITH {{centered}}
SELECT {{sums}}
FROM centered
