-- shared_scores: one scan giving the score meats of many models at their coefficients
-- (fit_many): HC1 sums, and per cluster set the sums of s_g s_g'. Rows are read once and
-- summed per cell (a unit, its cluster values and the row's pattern: which samples it is in,
-- as in shared_moments.sql): the union's sums and products, and for HC1 models the row sums
-- that need their residual. Each model's cell sums of x, u and x u follow linearly from the
-- union's (u = y - b'x - b_one), on the cells whose pattern covers its sample (NULL elsewhere).
-- Unit means come from the cells, and each cell's demeaned score follows exactly:
-- sum (x - xbar)(u - ubar) = Sxu - ubar Sx - xbar Su + n xbar ubar.
-- inputs:  {{rows}}          design or differenced rows over the union of the models' columns and
--                            cluster columns;
--          {{pattern}}       the items why and pat0, pat1, ... of each row (shared_moments.sql), and per
--                            HC1 model its residual ru_m and its square ruu_m;
--          {{pattern_keys}}  why, pat0, pat1, ...;
--          {{raw_sums}}      per cell: n_all, the union's sums s_j and products p_j_l, and per HC1
--                            model the sums with its residual (rsxxuu_m_i_l, ...);
--          {{cell_keys}}     k_unit and the cluster keys the grouping sets use;
--          {{cell_sums}}     per model: n_m, su_m, sx_m_i, sxu_m_i (and HC1 sums) per cell;
--          {{unit_sums}}     per demeaned model: the unit's nn_m, uu_m (its mean residual), xx_m_i (means);
--          {{scores}}        per model: the cell's score g_m_i, its HC1 part h_m_i_l, membership k_m;
--          {{grouping}}      GROUPING(keys) over the keys of the sets (0 when only HC1 is asked);
--          {{sets}}          the GROUPING SETS the models' clusters need (() for HC1);
--          {{group_sums}}    per model: sums of g_m_i and h_m_i_l, and its cells with rows AS n_m;
--          {{outer}}         per model: clusters with rows AS ng_m, sums of g_m_i g_m_l and of h_m_i_l.
--          {{materialized}}    AS MATERIALIZED (the cells computed once), or AS.
-- params:  $s_j shifts; $b{m}_j coefficients and $one{m} intercepts of each model.
-- output:  one row per grouping set (gid).
WITH flagged AS (SELECT *, {{pattern}} FROM ({{rows}}) AS r),
raw AS (SELECT {{cell_keys}}, {{pattern_keys}}, {{raw_sums}} FROM flagged GROUP BY {{cell_keys}}, {{pattern_keys}}),
cells {{materialized}} (SELECT {{cell_keys}}, {{cell_sums}} FROM raw),
units AS (SELECT k_unit AS unit_key{{unit_sums}} FROM cells GROUP BY k_unit),
scores AS (SELECT {{cell_keys}}, {{scores}} FROM cells JOIN units ON cells.k_unit IS NOT DISTINCT FROM units.unit_key),
per_group AS (SELECT {{grouping}} AS gid, {{group_sums}} FROM scores GROUP BY {{sets}})
SELECT gid, {{outer}}
FROM per_group
GROUP BY gid
ORDER BY gid
