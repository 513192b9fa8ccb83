-- unit_moments: per-unit count, sums and sums of products of the design columns.
-- inputs:  {{rows}}       design rows or differenced rows;
--          {{aggregates}} count(*) AS n, sum(z_j) AS s_j, sum(z_j * z_l) AS p_j_l, and for a
--                         cluster column min/max(k_c) (to check it is constant in the unit);
--          {{valid}}      the predicate that keeps a row (all columns finite, consecutive).
-- params:  those of {{rows}}.
-- output:  one row per unit: k_unit and the aggregates.
SELECT k_unit, {{aggregates}}
FROM {{rows}} AS r
WHERE {{valid}}
GROUP BY k_unit
