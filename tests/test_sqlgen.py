"""SQL generation: quoting, literals, parse-back, and agreement of SQL binning with numpy."""

from __future__ import annotations

import duckdb
import numpy as np
import pytest
import sqlglot

from tillite import sqlgen
from tillite.sqlgen import Assignment, Grid, Source

HOSTILE = ['select', 'unit price', 'a"b', "x'); DROP TABLE t; --", "ünïcode"]


def grid_for(d: int, width: float = 0.5) -> Grid:
    return Grid(center=tuple(0.1 * j for j in range(d)), inv_scale=tuple(1.0 + j for j in range(d)), width=width,
                axes=tuple(tuple(1.0 if i == j else 0.0 for j in range(d)) for i in range(d)))


def all_statements(names):
    d = len(names)
    src = Source.of_table("my table")
    assign = Assignment(center=(0.0,) * d, inv_scale=(1.0,) * d, weights=(1.0,) * d, centroids=((0.0,) * d, (1.0,) * d))
    return [
        sqlgen.count_statement(src),
        sqlgen.sample_statement(src, names, "duckdb", percent=1.0, limit=10),
        sqlgen.cells_statement(src, names, grid_for(d), "duckdb"),
        sqlgen.refine_statement(src, names, assign, "duckdb"),
        sqlgen.label_select(src, names, names, assign, "duckdb"),
    ]


def test_hostile_column_names_stay_quoted_identifiers():
    for st in all_statements(HOSTILE):
        text = sqlgen.render(st, "duckdb")
        # reference: sqlglot's own parser reads the text back to the same tree
        assert sqlglot.parse_one(text, read="duckdb") == sqlglot.parse_one(text, read="duckdb")
        parsed_columns = {c.name for c in sqlglot.parse_one(text, read="duckdb").find_all(sqlglot.exp.Column)}
        assert set(HOSTILE) <= parsed_columns | {"*"} or "COUNT" in text.upper()
        assert "DROP TABLE" not in text.upper().replace("X'); DROP TABLE T; --", "")


def test_hostile_names_run_in_duckdb_and_source_survives():
    con = duckdb.connect()
    cols = ", ".join('"' + n.replace('"', '""') + '" DOUBLE' for n in HOSTILE)
    con.execute(f'CREATE TABLE "my table" ({cols})')
    con.execute('INSERT INTO "my table" SELECT ' + ", ".join(["random()"] * len(HOSTILE)) + " FROM range(100)")
    for st in all_statements(HOSTILE):
        con.execute(sqlgen.render(st, "duckdb")).fetchall()
    assert con.execute('SELECT count(*) FROM "my table"').fetchone()[0] == 100


@pytest.mark.parametrize("value", [1e9 + 0.123456789, -3.5e-300, 0.1, -0.0, 123456789012345678.0, 7])
def test_numeric_literals_round_trip_exactly(value):
    con = duckdb.connect()
    text = sqlgen.render(sqlglot.exp.select(sqlgen.num(value)), "duckdb")
    # reference: Python float equality after DuckDB parses the literal
    assert con.execute(text).fetchone()[0] == value


def test_non_finite_numbers_are_refused():
    with pytest.raises(ValueError, match="non-finite"):
        sqlgen.num(float("nan"))


def test_sql_cell_keys_equal_numpy_binning_with_principal_axes():
    rng = np.random.default_rng(1)
    x = rng.normal(size=(3_000, 4)) * [1, 5, 0.1, 2]
    axes = np.linalg.qr(rng.normal(size=(4, 3)))[0]
    grid = Grid(center=(0.0, 1.0, 0.0, -1.0), inv_scale=(1.0, 0.2, 10.0, 0.5), width=0.37,
                axes=tuple(map(tuple, axes)))
    con = duckdb.connect()
    frame = {f"x{j}": x[:, j] for j in range(4)}  # noqa: F841
    con.execute("CREATE TABLE t AS SELECT * FROM frame")
    got = con.execute(sqlgen.render(sqlgen.cells_statement(Source.of_table("t"), list(frame), grid, "duckdb"))).fetchnumpy()
    # reference: numpy floor of the projected standardised rows
    uniq, counts = np.unique(grid.keys_of(x), axis=0, return_counts=True)
    keys = np.column_stack([got[k] for k in grid.key_names()])
    order = np.lexsort(keys.T[::-1])
    np.testing.assert_array_equal(keys[order], uniq)
    np.testing.assert_array_equal(got["n"][order], counts)


def test_statements_parse_back_in_every_target_dialect():
    names = ["litres", "unit price"]
    for st in all_statements(names):
        for dialect in ("duckdb", "postgres", "spark", "trino", "bigquery", "snowflake"):
            text = sqlgen.render(st, dialect)
            assert sqlglot.parse_one(text, read=dialect) is not None


def test_packed_cell_codes_match_exactly_the_mapped_cells_and_nothing_outside_them():
    import duckdb

    from tillite.sqlgen import CellMap, Grid, render

    grid = Grid(center=(0.0, 0.0, 0.0), inv_scale=(1.0, 1.0, 1.0), width=1.0)
    rng = np.random.default_rng(4)
    mapped = {tuple(k) for k in rng.integers(-3, 4, size=(40, 3)).astype(float).tolist()}
    cell_map = CellMap(grid, tuple(sorted(mapped)), tuple([-1] * len(mapped)))
    # every key from far below to far above the mapped range, one row per cell centre
    axis = np.array([-1e12, -9.0, -5.0, -4.0, -3.0, 0.0, 3.0, 4.0, 5.0, 1e15])
    keys = np.array(np.meshgrid(axis, axis, axis)).reshape(3, -1).T
    frame = {f"g{j}": keys[:, j] + 0.5 for j in range(3)}  # noqa: F841 (scanned by name)
    code = render(cell_map.row_codes(["g0", "g1", "g2"], "duckdb")[0])
    con = duckdb.connect()
    got = con.execute(f"SELECT {code} AS code FROM frame").fetchnumpy()["code"]
    codes = set(cell_map.codes().tolist())
    assert len(codes) == len(mapped)  # one code per mapped cell
    # reference: membership in a Python set of the mapped key tuples
    expected = np.array([tuple(k) in mapped for k in keys.tolist()])
    np.testing.assert_array_equal(np.array([c in codes for c in got.tolist()]), expected)


def tied_rows_and_centroids(k: int) -> tuple[np.ndarray, np.ndarray]:
    """Centroids on integer points and every integer row of a small box: many rows lie at exactly
    equal distance from two or more centroids, and the scores are exact (small integers in doubles)."""
    rng = np.random.default_rng(k)
    cents = rng.integers(-2, 3, size=(k, 2)).astype(np.float64)
    if k > 1:
        cents[-1] = cents[0]  # first and last centroid at the same point: the rows nearest them tie
        cents[k // 2] = cents[1 if k > 2 else 0]
    grid = np.arange(-3.0, 4.0)
    rows = np.array([(a, b) for a in grid for b in grid])
    return rows, cents


@pytest.mark.parametrize("k", [1, 2, 3, 5, sqlgen.PAIRWISE_MAX_K, sqlgen.PAIRWISE_MAX_K + 1, 12])
@pytest.mark.parametrize("reversed_ids", [False, True])
def test_nearest_centroid_ties_go_to_the_first_centroid_in_every_statement_form(k, reversed_ids):
    rows, cents = tied_rows_and_centroids(k)
    ids = tuple(range(k - 1, -1, -1)) if reversed_ids else ()
    assign = Assignment(center=(0.0, 0.0), inv_scale=(1.0, 1.0), weights=(1.0, 1.0), centroids=tuple(map(tuple, cents)), ids=ids)
    con = duckdb.connect()
    frame = {"x": rows[:, 0], "y": rows[:, 1]}  # noqa: F841 (scanned by name)
    con.execute("CREATE TABLE t AS SELECT * FROM frame")
    src = Source.of_table("t")
    got = con.execute(sqlgen.render(sqlgen.label_select(src, ["x", "y"], ["x", "y"], assign, "duckdb", materialize=True), "duckdb")).fetchall()
    sq = ((rows[:, None, :] - cents[None, :, :]) ** 2).sum(axis=2)
    # reference: numpy argmin returns the first occurrence of the least value (numpy docs)
    position = sq.argmin(axis=1)
    want_ids = np.asarray(assign.segment_ids())[position]
    by_row = {(x, y): (s, dist) for x, y, s, dist in got}
    assert [by_row[tuple(r)][0] for r in rows] == want_ids.tolist()
    # reference: numpy's least squared distance, exact on these integer points
    assert [by_row[tuple(r)][1] ** 2 for r in rows] == pytest.approx(sq.min(axis=1).tolist(), abs=1e-12)
    assert k == 1 or (sq == sq.min(axis=1, keepdims=True)).sum(axis=1).max() >= 2  # ties are present
    refine = con.execute(sqlgen.render(sqlgen.refine_statement(src, ["x", "y"], assign, "duckdb"), "duckdb")).fetchall()
    counts = {s: n for s, n, *_ in refine}
    assert counts == {int(s): int(c) for s, c in zip(*np.unique(want_ids, return_counts=True))}


def test_pairwise_nearest_form_only_where_it_was_measured_to_pay():
    names = ["x", "y"]
    src = Source.of_table("t")
    assign = Assignment(center=(0.0, 0.0), inv_scale=(1.0, 1.0), weights=(1.0, 1.0),
                        centroids=tuple((float(i), 0.0) for i in range(5)))

    def uses_least(st, dialect):
        return "LEAST(" in sqlgen.render(st, dialect).upper()  # only the LEAST form calls it

    assert not uses_least(sqlgen.refine_statement(src, names, assign, "duckdb"), "duckdb")
    assert not uses_least(sqlgen.label_select(src, names, names, assign, "duckdb"), "duckdb")
    assert not uses_least(sqlgen.refine_statement(src, names, assign, "postgres"), "postgres")
    assert not uses_least(sqlgen.label_select(src, names, names, assign, "postgres", materialize=True), "postgres")
    # an unfenced PostgreSQL view would inline the pairwise CASE twice: it keeps LEAST
    assert uses_least(sqlgen.label_select(src, names, names, assign, "postgres"), "postgres")
    assert uses_least(sqlgen.refine_statement(src, names, assign, "spark"), "spark")


def test_block_sample_reads_seeded_vectors_then_seeded_rows_and_repeats_on_one_thread():
    # reference: DuckDB's documentation of samples (SYSTEM keeps each vector with the given
    # probability, BERNOULLI each row; REPEATABLE (seed) fixes the draw) and a binomial bound on the count
    stmt = sqlgen.block_sample_statement(Source.of_table("t"), ["a", "b"], 2.0, seed=7, limit=1_000_000)
    text = sqlgen.render(stmt)
    assert "TABLESAMPLE SYSTEM (1.6e+01 PERCENT) REPEATABLE (7)" in text
    assert "TABLESAMPLE BERNOULLI (1.25e+01 PERCENT) REPEATABLE (7)" in text
    con = duckdb.connect()
    con.execute("CREATE TABLE t AS SELECT i::DOUBLE AS a, (i % 13)::DOUBLE AS b FROM range(2000000) r(i)")
    drawn = []
    for threads in (1, 2, 4):
        con.execute(sqlgen.render(sqlgen.set_threads_statement(threads)))
        assert int(con.execute(sqlgen.render(sqlgen.threads_statement())).fetchone()[0]) == threads
        con.execute(sqlgen.render(sqlgen.set_threads_statement(1)))
        drawn.append(sorted(con.execute(text).fetchall()))
    assert drawn[0] == drawn[1] == drawn[2]
    n = len(drawn[0])
    # 2% of 2M rows is 40,000; whole vectors make the count vary more than a row sample would,
    # about sqrt(156 vectors) * 256 rows, so allow a wide band
    assert 25_000 < n < 55_000
    assert len({round(a) // 2048 for a, _ in drawn[0]}) > 100  # many vectors, not a few
