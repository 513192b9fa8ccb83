-- shared_scores: one scan giving the score meats of many models at their coefficients
-- (fit_many): HC1 sums, and per cluster set the sums of s_g s_g'. Rows are read once:
-- per cell (a unit and its cluster values) the raw sums of x, u, x u (and for HC1 the
-- products up to x x u u); unit means come from the cells, and each cell's demeaned score
-- follows exactly: sum (x - xbar)(u - ubar) = Sxu - ubar Sx - xbar Su + n xbar ubar.
-- inputs:  {{rows}}       design or differenced rows over the union of the models' columns and
--                         cluster columns;
--          {{flags}}      per sample s: the row in the sample AS f_s (and columns finite AS m_s);
--          {{residuals}}  per model m: membership AS in_m, score columns AS x_m_i, residual AS u_m
--                         (NULL outside the model's sample);
--          {{cell_keys}}  k_unit and the cluster keys the grouping sets use;
--          {{cell_sums}}  per model: n_m, su_m, sx_m_i, sxu_m_i (and HC1 products) per cell;
--          {{unit_sums}}  per demeaned model: the unit's nn_m, uu_m (its mean residual), xx_m_i (means);
--          {{scores}}     per model: the cell's score g_m_i, its HC1 part h_m_i_l, membership k_m;
--          {{grouping}}   GROUPING(keys) over the keys of the sets (0 when only HC1 is asked);
--          {{sets}}       the GROUPING SETS the models' clusters need (() for HC1);
--          {{group_sums}} per model: sums of g_m_i and h_m_i_l, and its cells with rows AS n_m;
--          {{outer}}      per model: clusters with rows AS ng_m, sums of g_m_i g_m_l and of h_m_i_l.
--          {{materialized}} AS MATERIALIZED (the cells computed once), or AS.
-- params:  $s_j shifts; $b{m}_j coefficients and $one{m} intercepts of each model.
-- output:  one row per grouping set (gid).
WITH flagged AS (SELECT *, {{flags}} FROM ({{rows}}) AS r),
residuals AS (SELECT *, {{residuals}} FROM flagged),
cells {{materialized}} (SELECT {{cell_keys}}, {{cell_sums}} FROM residuals GROUP BY {{cell_keys}}),
units AS (SELECT k_unit AS unit_key{{unit_sums}} FROM cells GROUP BY k_unit),
scores AS (SELECT {{cell_keys}}, {{scores}} FROM cells JOIN units ON cells.k_unit IS NOT DISTINCT FROM units.unit_key),
per_group AS (SELECT {{grouping}} AS gid, {{group_sums}} FROM scores GROUP BY {{sets}})
SELECT gid, {{outer}}
FROM per_group
GROUP BY gid
ORDER BY gid
