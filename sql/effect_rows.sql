-- effect_rows: the sample's rows with each effect's and cluster's level as a compact
-- integer index, for the sweeps of bigpanel/sweeps.py (streamed on one thread, so the
-- row order is the same on every run).
-- inputs:  {{rows}}    the used rows (a subquery), inlined where it is read;
--          {{levels}}  per effect or cluster: , l<i> AS (SELECT keys, row_number() - 1 AS
--                      i FROM the distinct keys in sort order), numbered as effect_levels.sql;
--          {{columns}} l<i>.i AS i<i> per effect, g<i> per cluster, the design columns z<j>,
--                      and the kept keys (k_unit, k_period) when asked for;
--          {{joins}}   JOIN l<i> ON the key columns (NOT DISTINCT for clusters: a missing
--                      cluster value is a cluster of its own, as in cluster_scores.sql).
-- params:  those of {{rows}}.
-- output:  one row per used row.
WITH used AS NOT MATERIALIZED ({{rows}}){{levels}}
SELECT {{columns}}
FROM used{{joins}}
