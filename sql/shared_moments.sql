-- shared_moments: one scan serving the cross-products of many models on one source (fit_many).
-- Each row gets a pattern: why (0 a usable row; differences: 1 first row of its unit, 2 after a
-- gap, 3 a duplicate key, 4 other) and bit s of pat{t} set when sample s's columns are all
-- finite. Rows are summed once per unit and pattern (cells: the union's sums and products,
-- no FILTER per sample). A unit whose usable rows share one pattern has one cell, which is
-- its sums for every sample the pattern covers: such units are summed by pattern (part 0).
-- Units with several usable cells are summed per sample through the samples table (part 1).
-- Part 2 counts rows per pattern (missing values, reasons, period bounds). Python adds, per
-- sample, the rows whose pattern (or sid) covers it (plan.pattern_totals).
-- inputs:  {{rows}}          design or differenced rows over the union of the models' columns;
--          {{pattern}}       the items why and pat0, pat1, ... of each row;
--          {{pattern_keys}}  why, pat0, pat1, ...;
--          {{cell_sums}}     per cell: n, lo, hi, cluster bounds cmin_c/cmax_c, sums s_j, products p_j_l;
--          {{samples}}       VALUES rows (sid, word, bit): sample sid is bit `bit` of pat{word};
--          {{covers}}        the join condition: the cell c's pattern covers the sample;
--          {{sample_sums}}   per unit and sample: the cells' sums added;
--          {{totals}}        per group: t_units, t_groups, t_n, t_lo, t_hi, t_mixed_c, t_s_j, t_p_j_l,
--                            t_w_j_l (within products p - s s'/n);
--          {{no_keys}}       NULL for each pattern key (part 1);
--          {{counts}}        part 2: t_n, t_lo, t_hi, and NULL for the other totals.
--          {{materialized}}, {{anti_join}}, {{semi_join}}  the dialect's spellings (AS MATERIALIZED,
--                     ANTI JOIN and SEMI JOIN in DuckDB; AS, LEFT ANTI JOIN, LEFT SEMI JOIN in Spark).
-- params:  $s_j shifts, $d_j scales (through {{rows}}).
-- output:  a few rows: part, the pattern keys, sid, w (units with more than one row), totals.
WITH flagged AS (SELECT *, {{pattern}} FROM ({{rows}}) AS r),
cells {{materialized}} (SELECT k_unit, {{pattern_keys}}, {{cell_sums}} FROM flagged GROUP BY k_unit, {{pattern_keys}}),
multi {{materialized}} (SELECT k_unit FROM cells WHERE why = 0 GROUP BY k_unit HAVING count(*) > 1),
single AS (SELECT c.* FROM cells AS c {{anti_join}} multi AS m ON c.k_unit IS NOT DISTINCT FROM m.k_unit WHERE c.why = 0),
several AS (SELECT c.* FROM cells AS c {{semi_join}} multi AS m ON c.k_unit IS NOT DISTINCT FROM m.k_unit WHERE c.why = 0),
samples (sid, word, bit) AS (VALUES {{samples}}),
per_sample AS (SELECT c.k_unit, samples.sid, {{sample_sums}} FROM several AS c JOIN samples ON {{covers}}
               GROUP BY c.k_unit, samples.sid)
SELECT 0 AS part, {{pattern_keys}}, NULL AS sid, n > 1 AS w, {{totals}} FROM single GROUP BY {{pattern_keys}}, n > 1
UNION ALL
SELECT 1 AS part, {{no_keys}}, sid, n > 1 AS w, {{totals}} FROM per_sample GROUP BY sid, n > 1
UNION ALL
SELECT 2 AS part, {{pattern_keys}}, NULL AS sid, NULL AS w, {{counts}} FROM cells GROUP BY {{pattern_keys}}
ORDER BY ALL
