-- cluster_scores: the meat of the sandwich for clusters that cut across units, over all
-- rows: sum over clusters of s_g s_g', s_g = sum of x~ u~ over the cluster's rows.
-- inputs:  {{centered}}  the CTEs making x~ AS x_j and u~ AS u per row (sqlbuild.centered_ctes);
--          {{sets_key}}  GROUPING(cluster columns) AS gid, naming the set of each group;
--          {{sets}}      GROUPING SETS over the cluster columns;
--          {{scores}}    sum(x_j * u) AS g_j for each coefficient;
--          {{outer}}     sum(g_j * g_l) AS o_j_l over the groups of each set.
-- params:  $s_j shifts, $b_j coefficients, period values and effects.
-- output:  one row per grouping set: gid, n_groups and the meat's upper triangle.
WITH {{centered}},
per_group AS (SELECT {{sets_key}}, {{scores}} FROM centered GROUP BY {{sets}})
SELECT gid, count(*) AS n_groups, {{outer}}
FROM per_group
GROUP BY gid
ORDER BY gid
