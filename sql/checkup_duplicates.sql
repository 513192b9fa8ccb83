-- checkup_duplicates: (unit, period) keys held by more than one row; run only when the unit
-- scan found duplicate rows.
-- inputs:  {{source}}             the filtered source (a subquery);
--          {{unit}}, {{period}}    the key columns.
-- params:  $n_examples  how many of the first offending keys (by unit, then period) to return.
-- output:  unit_key, period_key, n_rows, and n_keys (all offending keys) on every row.
WITH repeated AS (
    SELECT {{unit}} AS unit_key, {{period}} AS period_key, count(*) AS n_rows
    FROM {{source}} AS src
    WHERE {{unit}} IS NOT NULL AND {{period}} IS NOT NULL
    GROUP BY unit_key, period_key
    HAVING count(*) > 1
)
SELECT unit_key, period_key, n_rows, count(*) OVER () AS n_keys
FROM repeated
ORDER BY unit_key, period_key
LIMIT $n_examples
