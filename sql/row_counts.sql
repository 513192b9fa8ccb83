-- row_counts: rows kept, and rows dropped by reason, over design or differenced rows.
-- inputs:  {{rows}}   design rows or differenced rows;
--          {{counts}} count(*) AS n_rows and count(*) FILTER (WHERE reason) AS <reason> items.
-- params:  those of {{rows}}.
-- output:  one row of counts.
SELECT {{counts}}
FROM {{rows}} AS r
