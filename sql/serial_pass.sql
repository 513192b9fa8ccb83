-- serial_pass: the sums of the serial-correlation test (hypotheses.py). Per row the level
-- residual r (design columns at the fit's coefficients), then, within each unit ordered by
-- period, the differenced residual e at t and its lag l at t-1 where t-1 and t-2 are the
-- unit's previous periods; per unit n, sums of l, l*l, e, l*e, e*e; over units those sums
-- and their products (the unit-clustered meat of e on (1, l) for any coefficients).
-- inputs:  {{used}}     used design rows in levels (k_unit, k_period, z_j, outcome last);
--          {{level}}    r per row; {{level_join}} nothing, or the LEFT JOIN of the period
--                       effects pe(k_period, g) that r subtracts (unit and period effects);
--          {{window}}   PARTITION BY k_unit ORDER BY k_period;
--          {{step}}     the period step (1 on the period grid's slots);
--          {{current}}  e per row; {{previous}} l per row, from r, r1, r2 (r at t, t-1, t-2);
--          {{joins}}    nothing, or LEFT JOINs pe0, pe1 (periods t and t - step) of the
--                       differenced equation's period intercepts;
--          {{per_unit}} the unit's sums; {{outer}} the sums over units and their products.
-- params:  $s_j, $d_j (through {{used}}), $b_j coefficients, $b_one, period values $t_i, $g_i.
-- output:  one row.
WITH used AS ({{used}}),
levels AS (SELECT r.k_unit, r.k_period, {{level}} AS r FROM used AS r {{level_join}}),
lagged AS (SELECT k_unit, k_period, r, lag(r, 1) OVER w AS r1, lag(r, 2) OVER w AS r2,
                  lag(k_period, 1) OVER w AS p1, lag(k_period, 2) OVER w AS p2
           FROM levels WINDOW w AS ({{window}})),
pairs AS (SELECT r.k_unit, {{current}} AS e, {{previous}} AS l FROM lagged AS r {{joins}}
          WHERE r.p1 = r.k_period - {{step}} AND r.p2 = r.k_period - 2 * {{step}}),
per_unit AS (SELECT {{per_unit}} FROM pairs GROUP BY k_unit)
SELECT count(*) AS n_groups, {{outer}}
FROM per_unit
