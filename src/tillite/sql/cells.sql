-- tillite_cells(tbl, cols, width): the cell pass in SQL.
-- Each usable row is standardised with the exact mean and population sd of its column
-- (u = (x - mean) / sd; a column whose sd is 0 keeps scale 1) and binned per column:
-- key_j = floor((x_j - mean_j) * (1 / sd_j / width)).  One row per occupied cell:
--   cell      BIGINT[]  the per-column keys, in the order of cols
--   n         BIGINT    rows in the cell
--   ls, ss    DOUBLE[]  per-column sums of u and of u^2 (standardised units)
--   centroid  DOUBLE[]  the cell's mean in original units
-- plus, when rows were skipped (NULL/NaN/Inf), one row with cell NULL whose n counts them.
-- The per-column sums are written out for a fixed number of list positions (MAX_COLUMNS in
-- tillite/macros.py; positions past len(cols) sum NULLs and are cut off): one GROUP BY on
-- the wide rows is about ten times faster than unnesting every row to (cell, column) pairs.
CREATE OR REPLACE MACRO {{cells}}(tbl, cols, width := {{default_width}}) AS TABLE
WITH
    __profile AS MATERIALIZED (
        SELECT * FROM {{profile}}(tbl, cols)
    ),
    __grid AS MATERIALIZED (
        SELECT
            CASE
                WHEN NOT coalesce(CAST(width AS DOUBLE) > 0 AND isfinite(CAST(width AS DOUBLE)), false)
                    THEN error({{cells_text}} || ': width must be a positive number, got ' || CAST(width AS VARCHAR))
                WHEN len(cols) > {{max_columns}}
                    THEN error({{cells_text}} || ': at most ' || {{max_columns}} || ' columns, got ' || len(cols))
                ELSE list(mean ORDER BY position)
            END AS mean,
            list(inv ORDER BY position) AS inv,
            list(inv / CAST(width AS DOUBLE) ORDER BY position) AS factor,
            any_value(skipped) AS skipped
        FROM (
            SELECT position, mean, skipped,
                   {{one}} / CASE WHEN sd > {{constant_sd}} * greatest(abs(mean), {{one}}) THEN sd ELSE {{one}} END AS inv
            FROM __profile
        )
    ),
    __keyed AS (
        SELECT
            list_transform(r.x, lambda v, j: CAST(floor(g.factor[j] * (v - g.mean[j])) AS BIGINT)) AS cell,
            list_transform(r.x, lambda v, j: (v - g.mean[j]) * g.inv[j]) AS u
        FROM {{rows}}(tbl, cols) AS r, __grid AS g
        WHERE r.ok
    ),
    __cells AS (
        SELECT cell, count(*) AS n, {{column_sums}}
        FROM __keyed
        GROUP BY cell
    )
SELECT c.cell, c.n,
       list_slice({{linear_sums}}, 1, len(cols)) AS ls,
       list_slice({{square_sums}}, 1, len(cols)) AS ss,
       list_transform(list_slice({{linear_sums}}, 1, len(cols)), lambda s, j: g.mean[j] + s / c.n / g.inv[j]) AS centroid
FROM __cells AS c, __grid AS g
UNION ALL
SELECT NULL, skipped, NULL, NULL, NULL
FROM __grid
WHERE skipped > 0
ORDER BY cell NULLS LAST;
