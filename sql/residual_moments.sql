-- residual_moments: sums of u~^2 x~_j x~_l over rows (the heteroskedasticity-robust meat)
-- and of u~^2 (the residual sum of squares), given the coefficients.
-- inputs:  {{rows}}     design or differenced rows, restricted to used rows;
--          {{centered}} select list making x~ AS x_j and the residual AS u (see cluster_scores);
--          {{join}}     nothing, or the join to unit means;
--          {{sums}}     sum(u * u * x_j * x_l) AS h_j_l items and sum(u * u) AS rss.
-- params:  $b0.. coefficients; $s0.. shifts.
-- output:  one row.
WITH used AS ({{rows}}),
centered AS (SELECT {{centered}} FROM used AS r {{join}})
SELECT {{sums}}
FROM centered
