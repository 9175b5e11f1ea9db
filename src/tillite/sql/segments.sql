-- tillite_segments(tbl, cols, k, width, iterations): k-means on the cells, in SQL.
-- The cells of tillite_cells(tbl, cols, width) are the points, weighted by their row counts.
-- Seeding is deterministic: the heaviest cell first, then again and again the cell with the
-- largest n * (squared distance to the nearest chosen seed), ties to the smaller cell key.
-- Lloyd iterations then run in one recursive query until no cell changes segment or
-- `iterations` steps have run; a segment left without cells keeps its centre.
-- One row per segment:
--   segment          0 .. k-1 (0 is seeded on the heaviest cell)
--   size, cells      rows and cells in the segment
--   centroid         DOUBLE[] in original units, in the order of cols
--   centroid_scaled  DOUBLE[] in standardised units
--   sse              row-level sum of squared distances to the centroid (standardised
--                    units), within-cell scatter included
--   iterations, converged   Lloyd steps run, and whether the last one moved no cell
CREATE OR REPLACE MACRO {{segments}}(tbl, cols, k, width := {{default_width}}, iterations := {{default_iterations}}) AS TABLE
WITH RECURSIVE
    __cells AS MATERIALIZED (
        SELECT row_number() OVER (ORDER BY cell) AS idx, n, ls, ss, centroid,
               list_transform(ls, lambda s: s / n) AS mu
        FROM {{cells}}(tbl, cols, width)
        WHERE cell IS NOT NULL
    ),
    -- the cells' sums in long form (cell, column), for per-segment sums by GROUP BY
    __parts AS MATERIALIZED (
        SELECT idx, n, unnest(ls) AS ls, unnest(ss) AS ss, unnest(centroid) AS centroid, generate_subscripts(ls, 1) AS j
        FROM __cells
    ),
    __first AS (
        SELECT CASE
            WHEN NOT coalesce(CAST(k AS BIGINT) >= 1, false)
                THEN error({{segments_text}} || ': k must be at least 1, got ' || CAST(k AS VARCHAR))
            WHEN NOT coalesce(CAST(iterations AS BIGINT) >= 0, false)
                THEN error({{segments_text}} || ': iterations must be 0 or more, got ' || CAST(iterations AS VARCHAR))
            WHEN count(*) < CAST(k AS BIGINT)
                THEN error({{segments_text}} || ': k=' || CAST(k AS VARCHAR) || ' is larger than the ' || CAST(count(*) AS VARCHAR)
                           || ' occupied cells of ' || tbl || '; use a smaller k or a smaller width')
            ELSE arg_max(idx, [n, -idx])
        END AS idx
        FROM __cells
    ),
    __seeds(step, centres) AS (
        SELECT 1, [c.mu]
        FROM __cells AS c, __first AS f
        WHERE c.idx = f.idx
        UNION ALL
        SELECT
            any_value(s.step) + 1,
            list_append(
                any_value(s.centres),
                arg_max(c.mu, [c.n * list_min(list_transform(s.centres, lambda z: list_distance(c.mu, z) ** 2)), -c.idx])
            )
        FROM __seeds AS s, __cells AS c
        WHERE s.step < CAST(k AS BIGINT)
        GROUP BY s.step
    ),
    -- the state after each step: the centres, the segment of every cell (in cell order) under
    -- the previous centres, and whether any cell changed segment in that step; USING KEY keeps
    -- only the latest state (one key), so memory does not grow with the iterations
    __lloyd(state, it, centres, labels, moved) USING KEY (state) AS (
        SELECT 0, 0, centres, CAST([] AS BIGINT[]), true
        FROM __seeds
        WHERE step = CAST(k AS BIGINT)
        UNION ALL
        (
            WITH
                __now AS MATERIALIZED (
                    SELECT it, centres, labels FROM __lloyd WHERE it < CAST(iterations AS BIGINT) AND moved
                ),
                __assigned AS MATERIALIZED (
                    SELECT idx, n, list_position(d, list_min(d)) - 1 AS seg
                    FROM (
                        SELECT c.idx, c.n, list_transform(s.centres, lambda z: list_distance(c.mu, z)) AS d
                        FROM __now AS s, __cells AS c
                    )
                ),
                __labels AS (
                    SELECT list(seg ORDER BY idx) AS labels FROM __assigned
                ),
                __groups AS (
                    SELECT seg, any_value(m) AS m, list(ls ORDER BY j) AS lsum
                    FROM (
                        SELECT a.seg, p.j, sum(p.n) AS m, sum(p.ls) AS ls
                        FROM __assigned AS a JOIN __parts AS p ON p.idx = a.idx
                        GROUP BY a.seg, p.j
                    )
                    GROUP BY seg
                ),
                __moved AS (
                    SELECT list(coalesce(list_transform(g.lsum, lambda v: v / g.m), s.centres[r.seg + 1]) ORDER BY r.seg) AS centres
                    FROM __now AS s
                    CROSS JOIN range(CAST(k AS BIGINT)) AS r(seg)
                    LEFT JOIN __groups AS g ON g.seg = r.seg
                )
            SELECT 0, s.it + 1, mv.centres, lb.labels, lb.labels <> s.labels
            FROM __now AS s, __moved AS mv, __labels AS lb
        )
    ),
    __final AS (
        SELECT it, centres, moved FROM __lloyd
    ),
    __assigned AS MATERIALIZED (
        SELECT idx, list_position(d, list_min(d)) - 1 AS seg
        FROM (
            SELECT c.idx, list_transform(f.centres, lambda z: list_distance(c.mu, z)) AS d
            FROM __cells AS c, __final AS f
        )
    ),
    __segments AS (
        SELECT
            seg,
            any_value(size) AS size,
            any_value(cells) AS cells,
            list(ls ORDER BY j) AS lsum,
            list(ss ORDER BY j) AS ssum,
            list(wc ORDER BY j) AS wsum
        FROM (
            SELECT a.seg, p.j, sum(p.n) AS size, count(*) AS cells, sum(p.ls) AS ls, sum(p.ss) AS ss, sum(p.n * p.centroid) AS wc
            FROM __assigned AS a JOIN __parts AS p ON p.idx = a.idx
            GROUP BY a.seg, p.j
        )
        GROUP BY seg
    )
SELECT
    CAST(r.seg AS INTEGER) AS segment,
    CAST(coalesce(s.size, 0) AS BIGINT) AS size,
    coalesce(s.cells, 0) AS cells,
    list_transform(s.wsum, lambda v: v / s.size) AS centroid,
    list_transform(s.lsum, lambda v: v / s.size) AS centroid_scaled,
    coalesce(list_sum(list_transform(s.ssum, lambda v, j: greatest(v - s.lsum[j] * s.lsum[j] / s.size, {{zero}}))), {{zero}}) AS sse,
    f.it AS iterations,
    NOT f.moved AS converged
FROM range(CAST(k AS BIGINT)) AS r(seg)
CROSS JOIN __final AS f
LEFT JOIN __segments AS s ON s.seg = r.seg
ORDER BY r.seg;
