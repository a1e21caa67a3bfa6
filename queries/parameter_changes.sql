-- purpose: The parameters of two runs side by side, matched on (name, row, col), with the change
--   difference = value_b - value_a; a parameter only one run has shows NULL for the other.
-- param run_a: id of the first run
-- param run_b: id of the second run
-- columns: name, row, col, value_a, value_b, difference, std_error_a, std_error_b
SELECT COALESCE(a.name, b.name) AS name,
       COALESCE(a."row", b."row") AS "row",
       COALESCE(a.col, b.col) AS col,
       a.value AS value_a,
       b.value AS value_b,
       b.value - a.value AS difference,
       a.std_error AS std_error_a,
       b.std_error AS std_error_b
FROM (
    SELECT name, "row", col, value, std_error FROM parameters WHERE run_id = CAST(:run_a AS BIGINT)
) a
FULL OUTER JOIN (
    SELECT name, "row", col, value, std_error FROM parameters WHERE run_id = CAST(:run_b AS BIGINT)
) b
  ON a.name = b.name
 AND COALESCE(a."row", '') = COALESCE(b."row", '')
 AND COALESCE(a.col, '') = COALESCE(b.col, '')
ORDER BY 1, 2, 3
