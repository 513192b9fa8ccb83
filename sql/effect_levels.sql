-- effect_levels: the distinct levels of one absorbed effect or cluster set, in sort order.
-- inputs:  {{rows}}    the design rows (a subquery; only the key columns are read);
--          {{keys}}    the level's key columns (k_e<i>_<m> or k_c<i>), comma-separated;
--          {{present}} which rows have a level (effects: every key has a value; clusters: true).
-- params:  those of {{rows}} (bound, though only the key columns are read).
-- output:  the key columns, one row per level, in sort order: the i-th row (from 0) is
--          level index i in effect_rows.sql. Levels without a used row get no row there.
SELECT {{keys}}
FROM (SELECT DISTINCT {{keys}} FROM {{rows}} AS r WHERE {{present}}) AS l
ORDER BY {{keys}}
