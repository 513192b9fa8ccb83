-- shared_moments: one scan serving the cross-product requests of many models on one source
-- (fit_many): per unit, then summed over units, the count, sums and products of each
-- sample's columns, the within form of the products, row counts and period bounds.
-- inputs:  {{rows}}       design or differenced rows over the union of the models' columns;
--          {{flags}}      per sample s: its columns all finite AS m_s, and the row in the sample
--                         (finite and, for differences, a consecutive pair) AS f_s;
--          {{unit_sums}}  per unit: row counts, period bounds, and per sample n_s, sums, products
--                         (FILTER f_s), missing rows, and distinct cluster values for nesting checks;
--          {{totals}}     sums over units: per sample units, rows, singletons, the sums, products and
--                         within products p - s s'/n (units with n > 1), missing rows, period bounds.
-- params:  $s_j shifts (through {{rows}}).
-- output:  one row.
WITH flagged AS (SELECT *, {{flags}} FROM ({{rows}}) AS r),
units AS (SELECT k_unit, {{unit_sums}} FROM flagged GROUP BY k_unit)
SELECT {{totals}}
FROM units
