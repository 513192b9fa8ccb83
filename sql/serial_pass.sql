-- serial_pass: the sums of the serial-correlation test (hypotheses.py): per row the
-- differenced residual e (at t) and its lag l (at t-1, the unit's previous period), then
-- per unit n, sums of l, l*l, e, l*e, e*e, then over units those sums and their products
-- (the unit-clustered meat of the regression of e on (1, l) for any coefficients).
-- inputs:  {{used}}     used differenced rows: differences at t and at t-1 of every design
--                       column (sqlbuild.serial_pass_sql names them);
--          {{joins}}    nothing, or LEFT JOINs of the period values pe0, pe1, pe2 (periods t,
--                       t - step, t - 2 step) to the period term h of the residuals;
--          {{current}}  e per row; {{previous}} l per row;
--          {{per_unit}} the unit's sums; {{outer}} the sums over units and their products.
-- params:  $s_j, $d_j (through {{used}}), $b_j coefficients, $b_one, period values $t_i, $g_i.
-- output:  one row.
WITH used AS ({{used}}),
pairs AS (SELECT r.k_unit, {{current}} AS e, {{previous}} AS l FROM used AS r {{joins}}),
per_unit AS (SELECT {{per_unit}} FROM pairs GROUP BY k_unit)
SELECT count(*) AS n_groups, {{outer}}
FROM per_unit
