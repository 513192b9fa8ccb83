-- effect_levels: the distinct levels of one absorbed effect or cluster, numbered in sort order.
-- inputs:  {{rows}} the used rows (design rows of the sample, a subquery);
--          {{keys}} the level's key columns (k_e<i>_<m> or k_c<i>), comma-separated.
-- params:  those of {{rows}}.
-- output:  the key columns, one row per level, in sort order: the i-th row (from 0) is
--          level index i in effect_rows.sql.
SELECT {{keys}}
FROM (SELECT DISTINCT {{keys}} FROM {{rows}} AS r) AS l
ORDER BY {{keys}}
