"""The pipeline on a real PostgreSQL server equals the DuckDB path.

A throwaway server is made with initdb/pg_ctl in a temporary directory (as an
unprivileged user when the tests run as root) and loaded with the same rows as
a DuckDB file.  Reference for every equality: DuckDB running the same sqlgen
tree, an independent SQL engine; where stated, numpy on the raw rows.  The
tests skip loudly when no server can start, and fail instead when CI=true.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner
from sqlglot import exp

from tillite import sqlgen
from tillite.cli import main
from tillite.engines import DuckDBEngine, EngineError, MissingExtraError, PostgresEngine, SourceError, open_source
from tillite.pipeline import (
    InputError,
    Settings,
    cell_map_table,
    existing_relation_kind,
    grid_for_profile,
    label,
    run_cell_pass,
    run_profile,
    run_refine_pass,
    segment,
    temporary_cell_map,
)
from tillite.sqlgen import Source

from engine_checks import (
    write_postgres,
    every_third_cell,
    COLUMNS,
    TABLE,
    assert_same_cell_pass,
    assert_same_labels,
    assert_same_model,
    assert_same_refine,
    ordered_rows,
    write_duckdb,
)

SETTINGS = dict(k=5, width=0.5, seed=0, cell_budget=2_000)


@pytest.fixture(scope="module")
def loaded(server, engine_rows, tmp_path_factory):
    """The rows in PostgreSQL table points and in a DuckDB file; returns the DuckDB path."""
    import psycopg
    from psycopg import sql

    with psycopg.connect(server.conninfo, autocommit=True) as con:
        write_postgres(con, engine_rows)
        con.execute(sql.SQL("CREATE SCHEMA {}").format(sql.Identifier("field data")))
        con.execute(sql.SQL("CREATE VIEW {}.{} AS SELECT * FROM {}").format(
            sql.Identifier("field data"), sql.Identifier("points view"), sql.Identifier(TABLE)))
    return write_duckdb(tmp_path_factory.mktemp("pg") / "points.duckdb", engine_rows)


@pytest.fixture
def pg_and_duck(server, loaded):
    pg = PostgresEngine(server.conninfo)
    duck = DuckDBEngine(str(loaded), read_only=True)
    yield pg, duck
    pg.close()
    duck.close()


SRC = Source.of_table(TABLE)


def test_profile_sees_the_same_rows_as_duckdb(pg_and_duck, engine_rows):
    pg, duck = pg_and_duck
    settings = Settings(**SETTINGS)
    got, ref = run_profile(pg, SRC, COLUMNS, settings), run_profile(duck, SRC, COLUMNS, settings)
    # reference: DuckDB on the same rows, and numpy's count of finite rows
    assert got.rows == ref.rows == len(engine_rows.ids)
    assert len(got.sample) == len(ref.sample) == int(engine_rows.usable.sum())
    np.testing.assert_allclose(got.center, ref.center, rtol=1e-12)
    np.testing.assert_allclose(got.center, engine_rows.x[engine_rows.usable].mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(got.scale, ref.scale, rtol=1e-12)


def test_sampled_profile_uses_tablesample_and_stays_bounded(pg_and_duck):
    pg, _ = pg_and_duck
    prof = run_profile(pg, SRC, COLUMNS, Settings(k=5, sample_rows=2_000))
    # reference: the table has 20,000 rows, so a 2,000-row target samples 15% with TABLESAMPLE SYSTEM
    assert prof.rows == 20_000 and 0 < len(prof.sample) <= 2_000


def test_cell_pass_cfs_equal_duckdb_on_the_same_grid(pg_and_duck):
    pg, duck = pg_and_duck
    settings = Settings(**SETTINGS)
    grid = grid_for_profile(run_profile(duck, SRC, COLUMNS, settings), settings)
    # reference: DuckDB running the same cells tree over the same rows
    assert_same_cell_pass(run_cell_pass(pg, SRC, COLUMNS, grid), run_cell_pass(duck, SRC, COLUMNS, grid))


def test_refine_pass_equals_duckdb_from_the_same_centroids(pg_and_duck):
    pg, duck = pg_and_duck
    model = segment(duck, SRC, COLUMNS, Settings(**SETTINGS))
    assign = model.assignment()
    # reference: DuckDB running the same refine tree from the same centroids
    assert_same_refine(run_refine_pass(pg, SRC, COLUMNS, assign), run_refine_pass(duck, SRC, COLUMNS, assign))


def test_segment_gives_the_duckdb_model(pg_and_duck):
    pg, duck = pg_and_duck
    # reference: DuckDB; both read the whole table as the sample (20,000 rows <= 2 x 50,000)
    assert_same_model(segment(pg, SRC, COLUMNS, Settings(**SETTINGS)), segment(duck, SRC, COLUMNS, Settings(**SETTINGS)))


def test_labels_view_equals_duckdb_row_for_row(server, loaded, engine_rows):
    pg = PostgresEngine(server.conninfo)
    duck = DuckDBEngine(str(loaded))
    try:
        model = segment(duck, SRC, COLUMNS, Settings(**SETTINGS))
        assert label(pg, SRC, model, "point_segments") == "view point_segments"
        label(duck, SRC, model, "point_segments")
        # reference: DuckDB's labels view over the same rows
        assert_same_labels(ordered_rows(pg, "point_segments"), ordered_rows(duck, "point_segments"), engine_rows)
        assert existing_relation_kind(pg, "point_segments") == "view"
        assert existing_relation_kind(pg, "public.point_segments") == "view"
        assert existing_relation_kind(pg, "Point_Segments") is None  # quoted names keep their case in PostgreSQL
        label(pg, SRC, model, "point_segments")  # CREATE OR REPLACE VIEW over itself
    finally:
        pg.close()
        duck.close()


def test_labels_view_reading_its_cell_map_table_equals_duckdb_row_for_row(server, loaded, engine_rows):
    from engine_checks import with_every_third_cell_mapped

    from tillite.pipeline import OWNED_MARK

    pg = PostgresEngine(server.conninfo)
    duck = DuckDBEngine(str(loaded))
    try:
        model = with_every_third_cell_mapped(duck, SRC, segment(duck, SRC, COLUMNS, Settings(**SETTINGS)))
        for _ in range(2):  # made, then replaced: the view is dropped before the map table it reads
            assert label(pg, SRC, model, "mapped_segments") == "view mapped_segments"
        label(duck, SRC, model, "mapped_segments")
        # reference: DuckDB's labels view over the same rows, reading its own map table
        assert_same_labels(ordered_rows(pg, "mapped_segments"), ordered_rows(duck, "mapped_segments"), engine_rows)
        assert pg.relation_comment(cell_map_table("mapped_segments")).startswith(OWNED_MARK)
        label(pg, SRC, model, "mapped_segments", materialize=True)
        assert existing_relation_kind(pg, cell_map_table("mapped_segments")) is None
    finally:
        pg.close()
        duck.close()


def test_labels_table_needs_replace_and_source_is_untouched(server, loaded):
    pg = PostgresEngine(server.conninfo)
    duck = DuckDBEngine(str(loaded), read_only=True)
    try:
        model = segment(duck, SRC, COLUMNS, Settings(**SETTINGS))
        assert label(pg, SRC, model, "segments_table", materialize=True) == "table segments_table"
        assert existing_relation_kind(pg, "segments_table") == "table"
        with pytest.raises(InputError, match="already exists"):
            label(pg, SRC, model, "segments_table", materialize=True)
        label(pg, SRC, model, "segments_table", materialize=True, replace=True)
        label(pg, SRC, model, "segments_table", replace=True)  # table -> view, one transaction
        assert existing_relation_kind(pg, "segments_table") == "view"
        with pytest.raises(InputError, match="source"):
            label(pg, SRC, model, TABLE)
        # reference: the row count the fixture loaded
        assert int(pg.query(sqlgen.count_statement(SRC))["n"][0]) == 20_000
    finally:
        pg.close()
        duck.close()


def test_schema_qualified_view_source_with_quoted_names(server, loaded):
    pg = PostgresEngine(server.conninfo)
    duck = DuckDBEngine(str(loaded), read_only=True)
    try:
        view = Source.of_table(("field data", "points view"))
        got = segment(pg, view, COLUMNS, Settings(**SETTINGS))
        # reference: DuckDB on the table the view selects from
        assert_same_model(got, segment(duck, SRC, COLUMNS, Settings(**SETTINGS)))
        made = label(pg, view, got, "field data.labelled points")
        assert made == "view field data.labelled points"
        assert existing_relation_kind(pg, "field data.labelled points") == "view"
    finally:
        pg.close()
        duck.close()


def test_sampled_profile_of_a_view_falls_back_to_a_row_filter(server, loaded):
    pg = PostgresEngine(server.conninfo, read_only=True)
    try:
        prof = run_profile(pg, Source.of_table(("field data", "points view")), COLUMNS, Settings(k=5, sample_rows=2_000))
    finally:
        pg.close()
    # reference: PostgreSQL refuses TABLESAMPLE on views; random() < 15% keeps about 3,000 rows, LIMIT 2,000
    assert prof.rows == 20_000 and 1_000 < len(prof.sample) <= 2_000


def test_finiteness_test_is_right_for_nan_and_infinity_float8(pg_and_duck):
    pg, _ = pg_and_duck
    values = ["1.5", "NaN", "Infinity", "-Infinity", None]
    cols = [sqlgen.is_finite(exp.cast(exp.Literal.string(v) if v else exp.Null(), "DOUBLE"), "postgres") for v in values]
    got = pg.query(exp.select(*[exp.alias_(c, f"f{i}") for i, c in enumerate(cols)]))
    # reference: IEEE 754 (NaN and the infinities are not finite); NULL stays NULL
    assert [bool(got[f"f{i}"][0]) for i in range(4)] == [True, False, False, False]
    assert np.ma.getmaskarray(got["f4"])[0]


@pytest.mark.parametrize("value", [1e9 + 0.123456789, -3.5e-300, 0.1, 123456789012345678.0, 2.0**-1074])
def test_exponent_literals_are_read_exactly_as_double_precision(pg_and_duck, value):
    pg, _ = pg_and_duck
    stmt = exp.select(exp.alias_(exp.Mul(this=sqlgen.to_double(sqlgen.num(1)), expression=sqlgen.num(value)), "v"))
    got = pg.query(stmt)["v"]
    # reference: Python float equality; PostgreSQL reads 5.0e-01 as an exact numeric constant and converts it to float8
    assert got.dtype == np.float64 and got[0] == value


def test_missing_table_names_the_tables_there(pg_and_duck):
    pg, _ = pg_and_duck
    with pytest.raises(SourceError, match=r"not found .*points"):
        pg.describe(Source.of_table("nope"))
    with pytest.raises(EngineError, match="database error"):
        pg.query(exp.select(sqlgen.col("no such column")).from_(sqlgen.table_name(TABLE)))


def test_segment_connection_is_read_only(server):
    engine, src = open_source(server.url, TABLE)
    try:
        with pytest.raises(EngineError, match="read-only"):
            engine.execute(sqlgen.create_relation_statement("not_allowed", sqlgen.count_statement(src), False))
    finally:
        engine.close()


def test_cli_segment_and_label_on_a_postgresql_url(server, loaded, tmp_path):
    runner = CliRunner()
    out = tmp_path / "model.json"
    args = ["--table", TABLE, "--columns", ",".join(COLUMNS), "--k", "5", "--width", "0.5", "--cell-budget", "2000"]
    done = runner.invoke(main, ["segment", server.url, *args, "--out", str(out), "--quiet"])
    assert done.exit_code == 0, done.output
    ref = runner.invoke(main, ["segment", str(loaded), *args, "--out", str(tmp_path / "ref.json"), "--quiet"])
    assert ref.exit_code == 0, ref.output
    # reference: the model DuckDB writes for the same table
    assert json.loads(out.read_text())["sizes"] == json.loads((tmp_path / "ref.json").read_text())["sizes"]
    done = runner.invoke(main, ["label", server.conninfo, "--engine", "postgres", "--table", TABLE, "--model", str(out),
                                "--into", "cli_segments", "--quiet"])
    assert done.exit_code == 0, done.output
    assert "view cli_segments" in done.output
    bad = runner.invoke(main, ["segment", server.url, *args, "--table", "missing_table", "--quiet"])
    assert bad.exit_code == 1 and "tables there" in bad.output


def test_missing_driver_names_the_extra(monkeypatch):
    import sys

    monkeypatch.setitem(sys.modules, "psycopg", None)
    with pytest.raises(MissingExtraError, match=r"pip install 'tillite\[postgres\]'"):
        PostgresEngine("postgresql://nobody@/nothing")


def test_labels_carry_tillites_mark_and_a_users_view_or_table_is_refused(server, loaded):
    """The ownership mark is a COMMENT ON VIEW/TABLE; PostgreSQL's obj_description reads it back."""
    import psycopg
    from psycopg import sql

    from tillite.pipeline import OWNED_MARK

    with psycopg.connect(server.conninfo, autocommit=True) as con:
        con.execute(sql.SQL("CREATE VIEW {} AS SELECT 1 AS one").format(sql.Identifier("Users View")))
        con.execute(sql.SQL("CREATE TABLE {} AS SELECT 2 AS two").format(sql.Identifier("users_table")))
    pg = PostgresEngine(server.conninfo)
    duck = DuckDBEngine(str(loaded), read_only=True)
    try:
        model = segment(duck, SRC, COLUMNS, Settings(**SETTINGS))
        for name in ("Users View", "users_table"):
            for materialize in (False, True):
                with pytest.raises(InputError, match="not made by tillite"):
                    label(pg, SRC, model, name, materialize=materialize)
        # reference: PostgreSQL's own catalog (pg_class, pg_description) read directly
        with psycopg.connect(server.conninfo, autocommit=True) as con:
            kinds = con.execute("SELECT relname, relkind, obj_description(oid, 'pg_class') FROM pg_class "
                                "WHERE relname IN ('Users View', 'users_table') ORDER BY relname").fetchall()
        assert kinds == [("Users View", "v", None), ("users_table", "r", None)]
        assert pg.relation_comment("Users View") is None and pg.relation_comment("missing") is None
        label(pg, SRC, model, "Marked Labels")
        assert pg.relation_comment("Marked Labels").startswith(OWNED_MARK)
        label(pg, SRC, model, "Marked Labels", materialize=True)  # a view tillite made: no --replace needed
        assert existing_relation_kind(pg, "Marked Labels") == "table"
        assert pg.relation_comment("public.Marked Labels").startswith(OWNED_MARK)
        label(pg, SRC, model, "Users View", replace=True)  # asked for: taken over and marked
        assert pg.relation_comment("Users View").startswith(OWNED_MARK)
    finally:
        pg.close()
        duck.close()
@pytest.mark.parametrize("method", ["kmeans", "ward", "density"])
def test_three_runs_on_postgres_with_one_seed_write_the_same_model_file(pg_and_duck, method):
    """Trust rule: same data, options and seed give the same model file apart from timings,
    with the profile sampled (TABLESAMPLE ... REPEATABLE (seed)), not read whole."""
    from test_trust import comparable

    pg, _ = pg_and_duck
    settings = dict(kmeans=dict(k=5), ward=dict(k=5, method="ward"), density=dict(k=0, method="density"))[method]
    runs = [comparable(segment(pg, SRC, COLUMNS, Settings(**settings, seed=3, sample_rows=2_000))) for _ in range(3)]
    assert runs[0] == runs[1] == runs[2]
    assert json.loads(runs[0])["params"]["sample_repeats"] == "yes"
def test_refine_pass_through_an_inline_cell_map_equals_duckdb(pg_and_duck):
    pg, duck = pg_and_duck
    model = segment(duck, SRC, COLUMNS, Settings(**SETTINGS))
    cell_map = every_third_cell(duck, SRC, model)
    with temporary_cell_map(pg, cell_map) as held:
        assert held.table is None  # a read-only session cannot create one: the map stays inline
        # reference: DuckDB running the same refine tree with the map inline
        assert_same_refine(run_refine_pass(pg, SRC, COLUMNS, model.assignment(), held),
                           run_refine_pass(duck, SRC, COLUMNS, model.assignment(), cell_map))


def test_segment_within_and_its_labels_equal_duckdb(server, loaded, engine_rows):
    from engine_checks import assert_same_within_labels, assert_same_within_model

    pg = PostgresEngine(server.conninfo)
    duck = DuckDBEngine(str(loaded))
    try:
        with pytest.warns(UserWarning, match="group NULL"):  # one row: every column constant there, one segment
            got = segment(pg, SRC, COLUMNS, Settings(**{**SETTINGS, "k": 2}, within="kind"))
        with pytest.warns(UserWarning, match="group NULL"):
            ref = segment(duck, SRC, COLUMNS, Settings(**{**SETTINGS, "k": 2}, within="kind"))
        # reference: DuckDB running the same trees (one cell pass keyed by (kind, cell), joined refine passes)
        assert_same_within_model(got, ref)
        assert [g["name"] for g in ref.within["groups"]][-1] == "NULL"
        label(pg, SRC, ref, "point_groups")
        label(duck, SRC, ref, "point_groups")
        assert_same_within_labels(ordered_rows(pg, "point_groups"), ordered_rows(duck, "point_groups"), engine_rows)
        label(pg, SRC, ref, "point_groups_table", materialize=True)  # the fenced form
        assert_same_within_labels(ordered_rows(pg, "point_groups_table"), ordered_rows(duck, "point_groups"), engine_rows)
    finally:
        pg.close()
        duck.close()


def test_categorical_segment_and_labels_equal_duckdb(server, loaded, engine_rows):
    pg = PostgresEngine(server.conninfo)
    duck = DuckDBEngine(str(loaded))
    try:
        settings = dict(SETTINGS, categorical=("kind",))
        model = segment(duck, SRC, COLUMNS, Settings(**settings))
        # reference: DuckDB running the same trees (category codes by array_position, lookups by ARRAY[...][code])
        assert_same_model(segment(pg, SRC, COLUMNS, Settings(**settings)), model)
        label(pg, SRC, model, "kind_segments")
        label(duck, SRC, model, "kind_segments")
        assert_same_labels(ordered_rows(pg, "kind_segments"), ordered_rows(duck, "kind_segments"), engine_rows)
    finally:
        pg.close()
        duck.close()


def test_segment_within_with_a_categorical_column_and_its_labels_equal_duckdb(server, loaded, engine_rows, tmp_path):
    import warnings

    import duckdb
    import psycopg

    from engine_checks import assert_same_within_labels, assert_same_within_model

    band = "CASE WHEN id % 3 = 0 THEN 'east' WHEN id % 3 = 1 THEN 'west' END"  # a category column beside kind
    with psycopg.connect(server.conninfo, autocommit=True) as con:
        con.execute(f'CREATE VIEW points_banded AS SELECT *, {band} AS band FROM "{TABLE}"')
    copy = tmp_path / "banded.duckdb"
    copy.write_bytes(loaded.read_bytes())
    with duckdb.connect(str(copy)) as con:
        con.execute(f'CREATE VIEW points_banded AS SELECT *, {band} AS band FROM "{TABLE}"')
    src = Source.of_table("points_banded")
    settings = Settings(**{**SETTINGS, "k": 2}, within="kind", categorical=("band",))
    pg, duck = PostgresEngine(server.conninfo), DuckDBEngine(str(copy))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # the NULL group: one row, one segment
            got, ref = segment(pg, src, COLUMNS, settings), segment(duck, src, COLUMNS, settings)
        # reference: DuckDB running the same trees ((group, cell, code) cell pass, joined refine passes)
        assert_same_within_model(got, ref)
        label(pg, src, ref, "band_groups")
        label(duck, src, ref, "band_groups")
        assert_same_within_labels(ordered_rows(pg, "band_groups"), ordered_rows(duck, "band_groups"), engine_rows)
    finally:
        pg.close()
        duck.close()


def test_postgres_reads_typed_names_folded_to_lower_case_and_quoted_into_parts(server, loaded):
    """PostgreSQL folds an unquoted name to lower case (its manual, 4.1.1): --table POINTS and --columns LITRES
    name points and litres, and the model records those; --into '"My Schema".labels' is schema My Schema."""
    import psycopg
    from psycopg import sql

    with psycopg.connect(server.conninfo, autocommit=True) as con:
        con.execute(sql.SQL("CREATE SCHEMA {}").format(sql.Identifier("My Schema")))
        con.execute(sql.SQL("CREATE VIEW {} AS SELECT *, 1 AS segment FROM {}").format(
            sql.Identifier("points with segment"), sql.Identifier(TABLE)))
    pg = PostgresEngine(server.conninfo)
    duck = DuckDBEngine(str(loaded), read_only=True)
    try:
        typed = [c.upper() for c in COLUMNS]
        got = segment(pg, Source.of_table(TABLE.upper()), typed, Settings(**SETTINGS))
        assert got.source == TABLE and list(got.columns) == COLUMNS
        # reference: DuckDB on the table under its own names
        assert_same_model(got, segment(duck, SRC, COLUMNS, Settings(**SETTINGS)))
        assert label(pg, SRC, got, '"My Schema".labels') == "view My Schema.labels"
        # reference: PostgreSQL's own catalog
        with psycopg.connect(server.conninfo, autocommit=True) as con:
            assert con.execute("SELECT table_schema, table_name FROM information_schema.views "
                               "WHERE table_name = 'labels'").fetchall() == [("My Schema", "labels")]
        with pytest.raises(InputError, match="points with segment already has a column segment"):
            label(pg, Source.of_table("points with segment"), got, "shadowed")
    finally:
        pg.close()
        duck.close()
