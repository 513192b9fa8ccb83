-- shared_unit_scores: the score meats of many models when every cluster set asked for is the
-- unit or all rows (fit_many: unit clusters and HC1). As shared_scores.sql, usable rows are
-- summed per unit and pattern. A unit with one pattern has its sums in that one cell (read as
-- they are); the cells of units with several are added per unit. Each model's score per unit
-- is sum (x - xbar)(u - ubar) = Sxu - Sx Su / n (plain sum x u without demeaning).
-- inputs:  {{rows}}          design or differenced rows over the union of the models' columns;
--          {{pattern}}       the items why and pat0, pat1, ... of each row (shared_moments.sql), and per
--                            HC1 model its residual ru_m and its square ruu_m;
--          {{pattern_keys}}  why, pat0, pat1, ...;
--          {{raw_sums}}      per unit and pattern: n_all, the union's sums and products, the HC1 row sums;
--          {{cell_sums}}     per model: n_m, su_m, sx_m_i, sxu_m_i (and HC1 sums), NULL off its sample;
--          {{unit_totals}}   per unit: each model's sums added over the unit's patterns;
--          {{unit_means}}    per demeaned model: nn_m, the unit's mean residual uu_m and means xx_m_i;
--          {{scores}}        per model: the unit's score g_m_i, its HC1 part h_m_i_l, membership k_m;
--          {{outer}}         per model: units with rows AS ng_m, sums of g_m_i g_m_l and of h_m_i_l;
--          {{gids}}          VALUES rows: the GROUPING() ids of the sets asked for (shared_scores.sql's).
--          {{materialized}}, {{anti_join}}, {{semi_join}}  the dialect's spellings (AS MATERIALIZED,
--                     ANTI JOIN and SEMI JOIN in DuckDB; AS, LEFT ANTI JOIN, LEFT SEMI JOIN in Spark).
-- params:  $s_j shifts; $b{m}_j coefficients and $one{m} intercepts of each model.
-- output:  one row per set asked for (gid), the same sums on each.
WITH flagged AS (SELECT *, {{pattern}} FROM ({{rows}}) AS r),
raw {{materialized}} (SELECT k_unit, {{pattern_keys}}, {{raw_sums}} FROM flagged WHERE why = 0 GROUP BY k_unit, {{pattern_keys}}),
multi {{materialized}} (SELECT k_unit FROM raw GROUP BY k_unit HAVING count(*) > 1),
cells {{materialized}} (SELECT k_unit, {{cell_sums}} FROM raw),
summed AS (SELECT k_unit, {{unit_totals}} FROM (SELECT c.* FROM cells AS c {{semi_join}} multi AS m ON c.k_unit IS NOT DISTINCT FROM m.k_unit)
           GROUP BY k_unit
           UNION ALL SELECT c.* FROM cells AS c {{anti_join}} multi AS m ON c.k_unit IS NOT DISTINCT FROM m.k_unit),
units AS (SELECT *{{unit_means}} FROM summed),
scores AS (SELECT {{scores}} FROM units),
totals AS (SELECT {{outer}} FROM scores)
SELECT sets.gid, totals.* FROM totals, (VALUES {{gids}}) AS sets (gid)
ORDER BY sets.gid
