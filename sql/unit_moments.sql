-- unit_moments: per-unit count, sums and sums of products of the design columns.
-- inputs:  {{rows}}       used rows (design or differenced rows that pass the validity test);
--          {{aggregates}} count(*) AS n, sum(z_j) AS s_j, sum(z_j * z_l) AS p_j_l (fsum on a
--                         query that runs on several threads).
-- params:  those of {{rows}}.
-- output:  one row per unit: k_unit, the aggregates, and its first and last period t_lo, t_hi.
SELECT k_unit, {{aggregates}}
FROM {{rows}} AS r
GROUP BY k_unit
