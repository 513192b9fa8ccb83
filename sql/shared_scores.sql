-- shared_scores: one scan giving the score meats of many models at their coefficients
-- (fit_many): HC1 sums over rows, and per cluster set the sums of s_g s_g'.
-- inputs:  {{rows}}      design or differenced rows over the union of the models' columns and
--                        cluster columns;
--          {{flags}}     per sample s: the row in the sample AS f_s;
--          {{centered}}  per demeaned sample s: its rows per unit AS un_s and each column minus its
--                        unit mean over the sample AS c_s_j (window w: PARTITION BY k_unit);
--          {{residuals}} per model m: membership AS in_m, score columns AS x_m_i, residual AS u_m;
--          {{scores}}    per model m: x_m_i * u_m AS g_m_i and, for HC1, u_m^2 x_m_i x_m_l AS h_m_i_l;
--          {{grouping}}  GROUPING(k_unit, k_c0, ...) over the keys;
--          {{sets}}      the GROUPING SETS the models' clusters need (() for HC1);
--          {{group_sums}} per model: sums of g_m_i and h_m_i_l, and count(*) FILTER (in_m) AS n_m;
--          {{outer}}     per model: clusters with rows AS ng_m, sums of g_m_i g_m_l, sums of h_m_i_l.
-- params:  $s_j shifts; $b{m}_j coefficients and $one{m} intercepts of each model.
-- output:  one row per grouping set (gid).
WITH flagged AS (SELECT *, {{flags}} FROM ({{rows}}) AS r),
centered AS (SELECT *{{centered}} FROM flagged WINDOW w AS (PARTITION BY k_unit)),
residuals AS (SELECT *, {{residuals}} FROM centered),
scored AS (SELECT *, {{scores}} FROM residuals),
per_group AS (SELECT {{grouping}} AS gid, {{group_sums}} FROM scored GROUP BY {{sets}})
SELECT gid, {{outer}}
FROM per_group
GROUP BY gid
ORDER BY gid
