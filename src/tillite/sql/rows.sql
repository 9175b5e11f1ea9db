-- tillite_rows(tbl, cols): the chosen columns of every row of a table, as one list.
--   x   DOUBLE[]  the values of cols, in the order of cols (CAST to DOUBLE)
--   ok  BOOLEAN   true when no value is NULL, NaN or infinite (such rows are skipped
--                 by the profile, the cells and the segments, and counted)
-- tbl is a table or view name as a string; cols is a list of column-name strings, matched
-- as DuckDB matches identifiers (case-insensitively).  A column that does not exist is
-- reported by DuckDB ("Column ... was selected but was not found"); a column given twice
-- or one that is not a number is reported by the macro.
CREATE OR REPLACE MACRO {{rows}}(tbl, cols) AS TABLE
WITH
    -- one row is enough to learn the chosen columns' names (in table order) and types
    __head AS (
        SELECT COLUMNS(cols) FROM query_table(tbl) LIMIT 1
    ),
    __described AS (
        SELECT
            list_transform(json_keys(to_json(struct_pack(*COLUMNS(*)))), lambda m: lower(m)) AS lowered,
            (SELECT list_value(*COLUMNS(*)) FROM (SELECT typeof(COLUMNS(*)) FROM __head)) AS types
        FROM __head
    ),
    __plan AS (
        SELECT CASE
            WHEN len(cols) = 0 THEN error({{rows_text}} || ': no columns given')
            WHEN len(list_distinct(list_transform(cols, lambda c: lower(c)))) < len(cols)
                THEN error({{rows_text}} || ': a column is given more than once in ' || array_to_string(cols, ', '))
            WHEN len(list_filter(cols, lambda c: NOT regexp_full_match(types[list_position(lowered, lower(c))], {{numeric_types}}))) > 0
                THEN error({{rows_text}} || ': column(s) '
                           || array_to_string(list_filter(cols, lambda c: NOT regexp_full_match(types[list_position(lowered, lower(c))], {{numeric_types}})), ', ')
                           || ' of ' || tbl || ' are not numbers; choose numeric columns')
            -- COLUMNS(cols) yields the columns in table order; perm puts them in the order of cols
            ELSE list_transform(cols, lambda c: list_position(lowered, lower(c)))
        END AS perm
        FROM __described
    ),
    __wide AS (
        SELECT list_value(*COLUMNS(*)) AS x_table_order
        FROM (SELECT TRY_CAST(COLUMNS(cols) AS DOUBLE) FROM query_table(tbl))
    ),
    __ordered AS (
        SELECT list_select(w.x_table_order, p.perm) AS x
        FROM __wide AS w, __plan AS p
    )
SELECT x, coalesce(list_bool_and(list_transform(x, lambda v: coalesce(isfinite(v), false))), false) AS ok
FROM __ordered;
