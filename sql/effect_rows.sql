-- effect_rows: the sample's rows with each effect's and cluster set's level as a compact
-- integer index, for the sweeps of bigpanel/sweeps.py (streamed on one thread, so the row
-- order is the same on every run).
-- inputs:  {{rows}}    the design rows (a subquery), inlined where it is read;
--          {{valid}}   the predicate of the used rows (finite columns, every effect's keys);
--          {{levels}}  per effect or cluster set: , l_<name> AS (the distinct keys over the
--                      design rows, numbered from 0 in sort order as effect_levels.sql);
--          {{columns}} l_i<e>.i AS i<e> per effect, l_g<c>.i AS g<c> per cluster set, the
--                      design columns z<j>, and the kept keys (k_unit, k_period) when asked for;
--          {{joins}}   JOIN l_<name> ON the key columns (IS NOT DISTINCT FROM for clusters: a
--                      missing cluster value is a cluster of its own, as in cluster_scores.sql).
-- params:  those of {{rows}} ($s_j, $d_j).
-- output:  one row per used row.
WITH design AS NOT MATERIALIZED ({{rows}}){{levels}}
SELECT {{columns}}
FROM (SELECT * FROM design WHERE {{valid}}) AS used{{joins}}
