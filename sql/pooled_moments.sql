-- pooled_moments: count, sums and sums of products of the design columns over all used
-- rows (no grouping), and the period range.
-- inputs:  {{rows}}       design or differenced rows;
--          {{aggregates}} count(*) AS n, sum(z_j) AS s_j, sum(z_j * z_l) AS p_j_l;
--          {{valid}}      the predicate that keeps a row.
-- params:  those of {{rows}}.
-- output:  one row (with the count of distinct units).
SELECT {{aggregates}}
FROM {{rows}} AS r
WHERE {{valid}}
