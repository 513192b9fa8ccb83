-- unit_mean_scores: per-unit scores of the estimators built on unit means (between,
-- random effects, the correlated random-effects regression), summed as outer products over
-- units: the meat of a variance clustered by unit, in one pass over the rows.
-- inputs:  {{used}}      used rows (design columns z_j, outcome last);
--          {{residuals}} per row, for each score set m: z_y - sum_j $b<m>_j z_j AS e<m>;
--          {{unit_sums}} per unit: count(*) AS n, sum(z_j) AS sx_j, sum(z_j * e<m>) AS xe<m>_j,
--                        sum(e<m>) AS se<m>;
--          {{weights}}   the unit's random-effects weight lam = 1 - $re_e / (n $re_u + $re_e)
--                        and each set's mean residual AS ub<m> (estimators/random_effects.py);
--          {{scores}}    each set's score columns from the unit's sums AS f<m>_i;
--          {{outer}}     sums over units of f<m>_i * f<m>_l AS o<m>_i_l.
-- params:  $s_j, $d_j (through {{used}}), $b<m>_j slopes, $a<m> intercept, $g<m>_j unit-mean
--          coefficients, $re_e and $re_u the variance components (scaled units).
-- output:  one row: n_groups (units) and the outer sums of every set.
WITH used AS ({{used}}),
resid AS (SELECT *, {{residuals}} FROM used),
per_unit AS (SELECT {{unit_sums}} FROM resid GROUP BY k_unit),
weighted AS (SELECT *, {{weights}} FROM per_unit),
scores AS (SELECT {{scores}} FROM weighted)
SELECT count(*) AS n_groups, {{outer}}
FROM scores
