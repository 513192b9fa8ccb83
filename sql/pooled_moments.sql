-- pooled_moments: count, sums and sums of products of the design columns over all used
-- rows (no grouping), the count of distinct units and the period range.
-- inputs:  {{rows}}       used rows (design or differenced rows that pass the validity test);
--          {{aggregates}} count(*) AS n, sum(z_j) AS s_j, sum(z_j * z_l) AS p_j_l,
--                         count(DISTINCT k_unit) AS n_units, min/max(k_period).
-- params:  those of {{rows}}.
-- output:  one row.
SELECT {{aggregates}}
FROM {{rows}} AS r
