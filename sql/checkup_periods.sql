-- checkup_periods: one scan grouped by period, giving row counts and per-period moments of
-- every checked column; the caller combines the periods into column totals and the grid.
-- inputs:  {{source}}             the filtered source (a subquery);
--          {{period}}             the period column, cast to TIMESTAMP for timestamp kinds;
--          {{unit}}               the unit column (rows without a unit form groups of their own);
--          {{column_aggregates}}  per checked column j: count AS n_j, and for numeric columns
--                                 favg AS mean_j, regr_sxx(v, v) AS ss_j (squared deviations
--                                 from the period mean, a streaming update that keeps its digits
--                                 under large offsets), min AS min_j, max AS max_j.
-- params:  $max_groups  row cap (more groups than this means the period column is wrong).
-- output:  period_value, unit_missing, n_rows, then the column aggregates.
SELECT {{period}} AS period_value,
       {{unit}} IS NULL AS unit_missing,
       count(*) AS n_rows{{column_aggregates}}
FROM {{source}} AS src
GROUP BY period_value, unit_missing
LIMIT $max_groups
