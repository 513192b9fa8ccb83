-- cluster_scores: the meat of the sandwich, sum over clusters of s_g s_g' with
-- s_g = sum of x~ u~ over the cluster's rows, given the coefficients.
-- inputs:  {{rows}}      design or differenced rows, already restricted to used rows;
--          {{centered}}  select list making x~ (z_j, or z_j minus the unit mean) AS x_j and
--                        the residual u~ AS u, from rows r joined to unit means m when needed;
--          {{join}}      nothing, or the join to unit means;
--          {{sets_key}}  GROUPING(cluster columns) AS gid, naming the set of each group;
--          {{sets}}      GROUPING SETS over the cluster columns;
--          {{scores}}    sum(x_j * u) AS g_j for each design column;
--          {{outer}}     sum(g_j * g_l) over the groups of each set, and count(*) AS n_groups.
-- params:  $b0.. coefficients; $s0.. shifts.
-- output:  one row per grouping set: gid, n_groups and the meat's upper triangle.
WITH used AS ({{rows}}),
centered AS (SELECT {{centered}} FROM used AS r {{join}}),
per_group AS (SELECT {{sets_key}}, {{scores}} FROM centered GROUP BY {{sets}})
SELECT gid, count(*) AS n_groups, {{outer}}
FROM per_group
GROUP BY gid
ORDER BY gid
