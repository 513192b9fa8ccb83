-- checkup_units: one scan grouped by unit, reduced at once to a single row of panel structure
-- (balance, gaps, duplicate rows, periods per unit) and within-unit variation per column.
-- inputs:  {{source}}            the filtered source (a subquery);
--          {{unit}}, {{period}}   the key columns (rows missing either are left out);
--          {{slot}}              the period's position on the regular grid (0 = first period);
--          {{distinct_slots}}    distinct periods of a unit: a bitmap count over the grid's slots,
--                                or count(DISTINCT slot) on long grids;
--          {{column_values}}     per numeric column j: CAST(column AS DOUBLE) AS v_j;
--          {{unit_aggregates}}   per numeric column j: regr_sxx(v_j, v_j) AS ss_j, the unit's sum
--                                of squared deviations from its own mean (streaming, offset-safe);
--          {{periods_per_unit}}  distinct periods -> units: histogram(n_periods), or on an engine
--                                without it pairs [n_periods, units] from a subquery over per_unit;
--          {{column_totals}}     per numeric column j: fsum(ss_j) AS within_ss_j and the count of
--                                units with ss_j > 0 AS varying_units_j.
-- params:  $first, $step         the grid (used by {{slot}});
--          $last_slot            the grid's last slot (used by the bitmap);
--          $n_periods            distinct periods in the panel (a unit with all of them is balanced).
-- output:  one row: n_units, n_rows, balanced_units, singleton_units, units_with_gaps,
--          missing_unit_periods, units_with_duplicates, duplicate_rows, periods_per_unit (a map:
--          distinct periods -> units), then the column totals.
WITH keyed AS (
    SELECT {{unit}} AS unit_key, {{slot}} AS slot{{column_values}}
    FROM {{source}} AS src
    WHERE {{unit}} IS NOT NULL AND {{period}} IS NOT NULL
),
per_unit AS (
    SELECT count(*) AS n_rows,
           {{distinct_slots}} AS n_periods,
           min(slot) AS first_slot,
           max(slot) AS last_slot{{unit_aggregates}}
    FROM keyed
    GROUP BY unit_key
)
SELECT count(*) AS n_units,
       coalesce(sum(n_rows), 0) AS n_rows,
       count(*) FILTER (WHERE n_periods = $n_periods) AS balanced_units,
       count(*) FILTER (WHERE n_periods = 1) AS singleton_units,
       count(*) FILTER (WHERE last_slot - first_slot + 1 > n_periods) AS units_with_gaps,
       coalesce(sum(last_slot - first_slot + 1 - n_periods), 0) AS missing_unit_periods,
       count(*) FILTER (WHERE n_rows > n_periods) AS units_with_duplicates,
       coalesce(sum(n_rows - n_periods), 0) AS duplicate_rows,
       {{periods_per_unit}} AS periods_per_unit{{column_totals}}
FROM per_unit
