-- twoway_pass: one pass for unit and period effects (unbalanced panels exact, by
-- Frisch-Waugh-Lovell with period indicators inside the unit-demeaned model).
-- inputs:  {{used}}     used rows (design columns z_j, k_unit, k_period);
--          {{moments}}  count(*) AS n, sum(z_j) AS s_j, sum(z_j * z_l) AS p_j_l;
--          {{materialized}}  AS MATERIALIZED (the grouped rows computed once), or AS;
--          {{pattern_agg}}   per unit, the periods it is seen in: a bit string over the
--                       periods from the smallest to the largest, or the set of them;
--          {{totals}}   unit_pass.sql over the per-unit rows (FROM unit_rows);
--          {{pattern_text}}  the pattern as a text of 0s and 1s, one per period from the smallest;
--          {{one}}      the DOUBLE one;
--          {{means}}    sum(s_j / n) AS m_j: per presence pattern, the sum of unit means;
--          {{sums}}     s_j AS s_j: per period, the sums of the design columns;
--          {{total_columns}}, {{pattern_columns}}, {{period_columns}}  every output column
--                       in one order, NULL AS the ones a kind of row does not have.
-- params:  $s_j shifts (through {{used}}).
-- output:  one 'total' row (unit_pass), one 'pattern' row per set of periods units are
--          seen in, one 'period' row per period.
WITH used AS ({{used}}),
grouped {{materialized}} (
    SELECT GROUPING(k_unit) AS by_period, k_unit, k_period, {{moments}},
           {{pattern_agg}} AS pattern
    FROM used
    GROUP BY GROUPING SETS ((k_unit), (k_period))
),
unit_rows AS (SELECT * FROM grouped WHERE by_period = 0),
totals AS ({{totals}}),
patterns AS (
    SELECT {{pattern_text}} AS pattern, count(*) AS pattern_units, sum({{one}} / n) AS inv_n, {{means}}
    FROM unit_rows
    GROUP BY pattern
),
periods AS (SELECT k_period AS period, n AS period_n, {{sums}} FROM grouped WHERE by_period = 1)
SELECT 'total' AS kind, {{total_columns}} FROM totals
UNION ALL SELECT 'pattern' AS kind, {{pattern_columns}} FROM patterns
UNION ALL SELECT 'period' AS kind, {{period_columns}} FROM periods
