-- checkup_shifts: a shift per numeric column, the mean of the source's first rows, which the
-- scans subtract so that their sums of squares accumulate values near zero.
-- inputs:  {{source}}  the filtered source (a subquery);
--          {{means}}   per numeric column j: favg(CAST(column AS DOUBLE)) AS c_j.
-- params:  $probe_rows  how many first rows to read.
-- output:  one row: c_j per numeric column (NULL when the first rows hold no value).
SELECT {{means}}
FROM (SELECT * FROM {{source}} AS src LIMIT $probe_rows) AS head
