-- unit_scores: cluster scores for clusters made of whole units, in one pass over a chunk.
-- A unit's score at b is sum_t a_it u_it, with a = z - Gamma_t (the period effects'
-- projection, zero without them) and u the residual; under within the unit mean of u is
-- taken out, which gives sum a e - (sum a)(sum e)/n for e = y - x'b - gamma_t.
-- inputs:  {{used}}        used rows;
--          {{adjusted}}    a_j and e per row (see sqlbuild.adjusted_columns);
--          {{period_join}} nothing, or the join to the period effects' values;
--          {{pick}}        the cluster key carried per unit (k_unit, or min(k_c0));
--          {{sum_e}}, {{unit_sums}}  sum(e); sum(a_j * e) AS ae_j, sum(a_j) AS sa_j (fsum on
--                        one multi-threaded query);
--          {{scores}}      the unit's score e_j from its sums;
--          {{keep}}        which units are in the fit (within: n > 1; a singleton unit is left out,
--                          and so is not counted as a cluster);
--          {{final}}       the outer sums over units (unit clusters) or per-cluster sums.
-- params:  $s_j shifts, $b_j coefficients, period values and effects.
-- output:  one row (n_groups, o_j_l), or one row per cluster (g, e_j).
WITH used AS ({{used}}),
adjusted AS (SELECT r.k_unit, {{adjusted}} FROM used AS r {{period_join}}),
per_unit AS (SELECT {{pick}} AS g, count(*) AS n, {{sum_e}} AS se, {{unit_sums}} FROM adjusted GROUP BY k_unit),
scores AS (SELECT g, {{scores}} FROM per_unit WHERE {{keep}})
{{final}}
