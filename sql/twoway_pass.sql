-- twoway_pass: one pass for unit and period effects (unbalanced panels exact, by
-- Frisch-Waugh-Lovell with period indicators inside the unit-demeaned model).
-- inputs:  {{used}}     used rows (design columns z_j, k_unit, k_period);
--          {{moments}}  count(*) AS n, sum(z_j) AS s_j, sum(z_j * z_l) AS p_j_l;
--          {{first}}, {{last}}  the smallest and largest period (whole numbers);
--          {{totals}}   unit_pass.sql over the per-unit rows (FROM unit_rows);
--          {{means}}    sum(s_j / n) AS m_j: per presence pattern, the sum of unit means;
--          {{sums}}     s_j AS s_j: per period, the sums of the design columns.
-- params:  $s_j shifts (through {{used}}).
-- output:  one 'total' row (unit_pass), one 'pattern' row per set of periods units are
--          seen in (bits from {{first}}), one 'period' row per period.
WITH used AS ({{used}}),
grouped AS MATERIALIZED (
    SELECT GROUPING(k_unit) AS by_period, k_unit, k_period, {{moments}},
           bitstring_agg(k_period, {{first}}, {{last}}) AS pattern
    FROM used
    GROUP BY GROUPING SETS ((k_unit), (k_period))
),
unit_rows AS (SELECT * FROM grouped WHERE by_period = 0),
totals AS ({{totals}}),
patterns AS (
    SELECT CAST(pattern AS VARCHAR) AS pattern, count(*) AS pattern_units, sum(1.0 / n) AS inv_n, {{means}}
    FROM unit_rows
    GROUP BY pattern
),
periods AS (SELECT k_period AS period, n AS period_n, {{sums}} FROM grouped WHERE by_period = 1)
SELECT 'total' AS kind, * FROM totals
UNION ALL BY NAME SELECT 'pattern' AS kind, * FROM patterns
UNION ALL BY NAME SELECT 'period' AS kind, * FROM periods
