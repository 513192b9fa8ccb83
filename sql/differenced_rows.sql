-- differenced_rows: first differences of the design columns between consecutive periods.
-- inputs:  {{rows}}   design rows (design_rows.sql);
--          {{keys}}   k_unit, k_period and the cluster columns to carry;
--          {{diffs}}  z_j - lag(z_j) OVER w AS z_j for each design column;
--          {{window}} PARTITION BY k_unit ORDER BY k_period (sorts), or nothing: the rows'
--                     own order, for a chunk read on one thread from files sorted by unit and
--                     period (a streaming window; a pair out of order is simply not formed).
-- params:  none. k_prev_unit and k_prev are the previous row's unit and period; a difference
--          is used only when k_prev_unit = k_unit and k_prev = k_period - step.
-- output:  the keys, k_prev_unit, k_prev, and the differenced z columns.
SELECT {{keys}}, lag(k_unit) OVER w AS k_prev_unit, lag(k_period) OVER w AS k_prev, {{diffs}}
FROM {{rows}} AS r
WINDOW w AS ({{window}})
