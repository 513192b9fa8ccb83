-- design_rows: one row per observation of the filtered source, with the model's columns.
-- inputs:  {{source}}  the filtered source (a subquery);
--          {{columns}} the builder's select list: unit AS k_unit, period AS k_period,
--                      cluster columns AS k_c0.., each term minus its shift, times its scale,
--                      AS z0..z{q-1} (the outcome last); a lag is a window framed on the
--                      period range.
-- params:  $s0.. the shifts, $d0.. the scales (powers of two; one each per design column).
-- output:  k_unit, k_period, [k_c0, k_c1], z0 .. z{q-1}.
SELECT {{columns}}
FROM {{source}} AS src
