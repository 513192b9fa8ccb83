-- differenced_rows: first differences of the design columns between consecutive periods.
-- inputs:  {{rows}}  design rows (design_rows.sql);
--          {{keys}}  k_unit, k_period and the cluster columns to carry;
--          {{diffs}} z_j - lag(z_j) OVER w AS z_j for each design column.
-- params:  none. k_prev is the unit's previous observed period (NULL for its first row);
--          a difference is used only when k_prev = k_period - step.
-- output:  the keys, k_prev, and the differenced z columns.
SELECT {{keys}}, lag(k_period) OVER w AS k_prev, {{diffs}}
FROM {{rows}} AS r
WINDOW w AS (PARTITION BY k_unit ORDER BY k_period)
