-- tillite_profile(tbl, cols): one row per chosen column, in the order of cols.
--   position, column_name, rows (all rows), usable (rows with no NULL/NaN/Inf in any chosen
--   column), skipped (rows - usable), invalid (rows whose value in this column is NULL/NaN/Inf),
--   mean, sd (population standard deviation), min, max: over the usable rows.
CREATE OR REPLACE MACRO {{profile}}(tbl, cols) AS TABLE
WITH
    __long AS (
        SELECT ok, unnest(x) AS v, generate_subscripts(x, 1) AS j
        FROM {{rows}}(tbl, cols)
    ),
    __stats AS (
        SELECT
            j,
            count(*) AS rows,
            count(*) FILTER (WHERE ok) AS usable,
            count(*) FILTER (WHERE NOT coalesce(isfinite(v), false)) AS invalid,
            avg(v) FILTER (WHERE ok) AS mean,
            stddev_pop(v) FILTER (WHERE ok) AS sd,
            min(v) FILTER (WHERE ok) AS min,
            max(v) FILTER (WHERE ok) AS max
        FROM __long
        GROUP BY j
    )
SELECT
    p.j AS position,
    cols[p.j] AS column_name,
    coalesce(s.rows, 0) AS rows,
    coalesce(s.usable, 0) AS usable,
    coalesce(s.rows, 0) - coalesce(s.usable, 0) AS skipped,
    coalesce(s.invalid, 0) AS invalid,
    s.mean,
    s.sd,
    s.min,
    s.max
FROM range(1, len(cols) + 1) AS p(j)
LEFT JOIN __stats AS s ON s.j = p.j
ORDER BY p.j;
