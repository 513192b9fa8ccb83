-- unit_pass: one pass over the rows, through per-unit moments, to the sums the solver and
-- the unit-cluster variance need.
-- inputs:  {{units}}     per-unit moments (unit_moments.sql): n, s_j, p_j_l;
--          {{entries}}   the unit's transformed cross-product entries AS w_j_l (j <= l, over
--                        regressors, [constant], outcome) and its raw squares p_j_j AS raw_j;
--          {{residuals}} nothing, or the unit's scores at the pilot coefficients,
--                        w_j_y - sum_l w_j_l * $q_l AS e_j (see moments.py);
--          {{keep}}      which units count (within: n > 1; a single-row unit adds zeros);
--          {{sums}}      sum(w_j_l) AS w_j_l, sum(raw_j) AS r_j and, with residuals, the
--                        products of e and w summed over units; the period bounds t_min, t_max
--                        of the units that count.
-- params:  $s_j shifts (through {{units}}), $q_l pilot coefficients (with residuals).
-- output:  one row.
WITH units AS ({{units}}),
entries AS (SELECT n, {{entries}} FROM units),
scored AS (SELECT *{{residuals}} FROM entries)
SELECT
    count(*) FILTER (WHERE {{keep}}) AS n_units,
    CAST(coalesce(sum(n) FILTER (WHERE {{keep}}), 0) AS BIGINT) AS n_obs,
    count(*) FILTER (WHERE NOT ({{keep}})) AS singletons,
    CAST(coalesce(sum(n) FILTER (WHERE NOT ({{keep}})), 0) AS BIGINT) AS singleton_rows,
    {{sums}}
FROM scored
