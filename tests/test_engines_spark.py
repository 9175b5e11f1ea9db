"""The pipeline on Spark (a local SparkSession) equals the DuckDB path.

Spark reads a Parquet copy of the DuckDB table in place, and the same rows as a
table registered in its catalog.  Reference for every equality: DuckDB running
the same sqlgen tree, an independent SQL engine; where stated, numpy on the raw
rows.  The tests skip loudly when Spark cannot start, and fail when CI=true.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner
from sqlglot import exp

from tillite import sqlgen
from tillite.cli import main
from tillite.engines import DuckDBEngine, EngineError, MissingExtraError, SourceError, SparkEngine, open_source
from tillite.pipeline import (
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
    every_third_cell,
    COLUMNS,
    NAN_IDS,
    NULL_IDS,
    TABLE,
    assert_same_cell_pass,
    assert_same_labels,
    assert_same_model,
    assert_same_refine,
    ordered_rows,
    write_duckdb,
    write_parquet,
)
from conftest import assert_one_error_line, run_cli
from throwaway_servers import start_spark, unavailable

SETTINGS = dict(k=5, width=0.5, seed=0, cell_budget=2_000)
REGISTERED = "points_table"


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return tmp_path_factory.mktemp("spark")


@pytest.fixture(scope="module")
def spark(folder):
    session = start_spark(folder)
    yield session
    session.stop()


@pytest.fixture(scope="module")
def data(folder, engine_rows, spark):
    """(DuckDB file, Parquet copy); the Parquet rows are also a catalog table and a temporary view."""
    db = write_duckdb(folder / "points.duckdb", engine_rows)
    parquet = write_parquet(db, folder / "points.parquet")
    frame = spark.read.parquet(str(parquet))
    frame.write.saveAsTable(REGISTERED)
    frame.createOrReplaceTempView("points_temp")
    return db, parquet


@pytest.fixture(scope="module")
def duck(data):
    engine = DuckDBEngine(str(data[0]), read_only=True)
    yield engine
    engine.close()


@pytest.fixture(scope="module")
def sparks(spark, data):
    return SparkEngine(session=spark)


def sources(data):
    """The Parquet copy read in place, and the registered table."""
    return [Source.of_files(str(data[1]), "parquet"), Source.of_table(REGISTERED)]


DUCK_SRC = Source.of_table(TABLE)


def duckdb_labels(duck: DuckDBEngine, model) -> dict[str, np.ndarray]:
    """DuckDB's labels of the same rows, ordered by id: the reference for Spark's."""
    select = sqlgen.label_select(DUCK_SRC, COLUMNS, ["id", *COLUMNS, "kind"], model.assignment(), "duckdb")
    return duck.query(exp.select(exp.Star()).from_(sqlgen.subquery(select, "l")).order_by(sqlgen.col("id")))


def test_profile_sees_the_same_rows_as_duckdb(sparks, duck, data, engine_rows):
    settings = Settings(**SETTINGS)
    ref = run_profile(duck, DUCK_SRC, COLUMNS, settings)
    for src in sources(data):
        got = run_profile(sparks, src, COLUMNS, settings)
        # reference: DuckDB on the same rows, and numpy's count and mean of the finite rows
        assert got.rows == ref.rows == len(engine_rows.ids)
        assert len(got.sample) == int(engine_rows.usable.sum())
        np.testing.assert_allclose(got.center, ref.center, rtol=1e-12)
        np.testing.assert_allclose(got.center, engine_rows.x[engine_rows.usable].mean(axis=0), rtol=1e-12)


def test_sampled_profile_uses_tablesample_percent_and_stays_bounded(sparks, data):
    for src in sources(data):
        prof = run_profile(sparks, src, COLUMNS, Settings(k=5, sample_rows=2_000))
        # reference: 20,000 rows and a 2,000-row target: TABLESAMPLE (15 PERCENT), then LIMIT 2,000
        assert prof.rows == 20_000 and 0 < len(prof.sample) <= 2_000


def test_cell_pass_cfs_equal_duckdb_on_the_same_grid(sparks, duck, data):
    settings = Settings(**SETTINGS)
    grid = grid_for_profile(run_profile(duck, DUCK_SRC, COLUMNS, settings), settings)
    ref = run_cell_pass(duck, DUCK_SRC, COLUMNS, grid)
    for src in sources(data):
        # reference: DuckDB running the same cells tree (Spark's floor is built without FLOOR there)
        assert_same_cell_pass(run_cell_pass(sparks, src, COLUMNS, grid), ref)


def test_refine_pass_equals_duckdb_from_the_same_centroids(sparks, duck, data):
    assign = segment(duck, DUCK_SRC, COLUMNS, Settings(**SETTINGS)).assignment()
    ref = run_refine_pass(duck, DUCK_SRC, COLUMNS, assign)
    for src in sources(data):
        # reference: DuckDB running the same refine tree from the same centroids
        assert_same_refine(run_refine_pass(sparks, src, COLUMNS, assign), ref)


def test_segment_gives_the_duckdb_model(sparks, duck, data):
    ref = segment(duck, DUCK_SRC, COLUMNS, Settings(**SETTINGS))
    for src in sources(data):
        # reference: DuckDB; both read the whole table as the sample (20,000 rows <= 2 x 50,000)
        assert_same_model(segment(sparks, src, COLUMNS, Settings(**SETTINGS)), ref)


def test_labels_equal_duckdb_row_for_row_as_view_and_table(sparks, duck, data, engine_rows):
    model = segment(duck, DUCK_SRC, COLUMNS, Settings(**SETTINGS))
    ref = duckdb_labels(duck, model)
    src = Source.of_table(REGISTERED)
    assert label(sparks, src, model, "point_segments") == "view point_segments"
    assert existing_relation_kind(sparks, "point_segments") == "view"
    assert not sparks.spark.catalog.getTable("point_segments").isTemporary  # a catalog view over a catalog table
    # reference: DuckDB's labels over the same rows
    assert_same_labels(ordered_rows(sparks, "point_segments"), ref, engine_rows)
    assert label(sparks, src, model, "segments_table", materialize=True) == "table segments_table"
    assert existing_relation_kind(sparks, "segments_table") == "table"
    label(sparks, src, model, "segments_table", materialize=True, replace=True)
    assert_same_labels(ordered_rows(sparks, "segments_table"), ref, engine_rows)


def test_labels_view_reading_its_cell_map_table_equals_duckdb_row_for_row(sparks, duck, data, engine_rows):
    from engine_checks import with_every_third_cell_mapped

    from tillite.pipeline import OWNED_MARK

    model = with_every_third_cell_mapped(duck, DUCK_SRC, segment(duck, DUCK_SRC, COLUMNS, Settings(**SETTINGS)))
    # reference: DuckDB's labels over the same rows with the map inline
    select = sqlgen.label_select(DUCK_SRC, COLUMNS, ["id", *COLUMNS, "kind"], model.assignment(), "duckdb",
                                 cell_map=model.cell_map_spec())
    ref = duck.query(exp.select(exp.Star()).from_(sqlgen.subquery(select, "l")).order_by(sqlgen.col("id")))
    for src, into in ((Source.of_table(REGISTERED), "mapped_segments"), (Source.of_table("points_temp"), "mapped_temp")):
        for again in (False, True):  # made, then replaced with its map table (a temporary view keeps no mark)
            label(sparks, src, model, into, replace=again)
        assert_same_labels(ordered_rows(sparks, into), ref, engine_rows)
        assert existing_relation_kind(sparks, cell_map_table(into)) == "table"
        assert sparks.relation_comment(cell_map_table(into)).startswith(OWNED_MARK)
    label(sparks, Source.of_table(REGISTERED), model, "mapped_segments", materialize=True)
    assert existing_relation_kind(sparks, cell_map_table("mapped_segments")) is None


def test_labels_over_a_temporary_view_are_a_temporary_view(sparks, duck, data, engine_rows):
    model = segment(duck, DUCK_SRC, COLUMNS, Settings(**SETTINGS))
    label(sparks, Source.of_table("points_temp"), model, "temp_segments")
    assert sparks.spark.catalog.getTable("temp_segments").isTemporary
    assert existing_relation_kind(sparks, "temp_segments") == "view"
    # reference: DuckDB's labels over the same rows
    assert_same_labels(ordered_rows(sparks, "temp_segments"), duckdb_labels(duck, model), engine_rows)


def test_labels_of_a_parquet_source_go_to_one_parquet_file(sparks, duck, data, engine_rows, folder):
    model = segment(duck, DUCK_SRC, COLUMNS, Settings(**SETTINGS))
    out = folder / "labelled.parquet"
    assert label(sparks, Source.of_files(str(data[1]), "parquet"), model, str(out)) == f"file {out}"
    assert out.is_file()
    con = duckdb.connect()
    got = con.execute(f"SELECT * FROM read_parquet('{out}') ORDER BY id").fetchnumpy()
    con.close()
    # reference: DuckDB reading Spark's file, against DuckDB's own labels
    assert_same_labels(got, duckdb_labels(duck, model), engine_rows)


def test_nan_is_nan_and_null_is_masked_in_results(sparks, data):
    got = ordered_rows(sparks, REGISTERED)
    # reference: the rows the fixture wrote (numpy NaN, SQL NULL)
    assert np.ma.getmaskarray(got["litres"])[list(NULL_IDS)].all()
    assert not np.ma.getmaskarray(got["unit price"]).any()
    assert np.isnan(np.asarray(got["unit price"])[list(NAN_IDS)]).all()


def test_floor_built_for_spark_equals_numpy_floor(sparks):
    values = [-2.5, -1e-20, -0.0, 0.0, 2.5, 1e300, -1e300, 2.0**53 + 2, -(2.0**52) - 0.5, 7.0]
    stmt = exp.select(*[exp.alias_(sqlgen.floor_of(sqlgen.num(v), "spark"), f"f{i}") for i, v in enumerate(values)])
    got = sparks.query(stmt)
    # reference: numpy.floor (Spark's own FLOOR would overflow a BIGINT at 1e300)
    assert [float(got[f"f{i}"][0]) for i in range(len(values))] == [float(np.floor(v)) for v in values]


def test_finiteness_test_and_exponent_literals_in_spark(sparks):
    cells = [sqlgen.is_finite(exp.cast(exp.Literal.string(v), "DOUBLE"), "spark") for v in ("1.5", "NaN", "Infinity", "-Infinity")]
    got = sparks.query(exp.select(*[exp.alias_(c, f"f{i}") for i, c in enumerate(cells)], exp.alias_(sqlgen.num(1e9 + 0.123456789), "lit")))
    # reference: IEEE 754 (NaN and infinities are not finite); Python float equality for the literal
    assert [bool(got[f"f{i}"][0]) for i in range(4)] == [True, False, False, False]
    assert got["lit"].dtype == np.float64 and got["lit"][0] == 1e9 + 0.123456789


def test_missing_table_names_the_tables_there(sparks):
    with pytest.raises(SourceError, match=r"not found.*points_table"):
        sparks.describe(Source.of_table("nope"))
    with pytest.raises(EngineError, match="database error"):
        sparks.query(exp.select(sqlgen.col("no such column")).from_(sqlgen.table_name(REGISTERED)))


def test_open_source_reads_parquet_with_spark_and_refuses_csv(spark, data, tmp_path):
    engine, src = open_source(str(data[1]), None, engine="spark")
    try:
        assert isinstance(engine, SparkEngine) and src.files == (str(data[1]),)
    finally:
        engine.close()
    csv = tmp_path / "x.csv"
    csv.write_text("a\n1\n")
    with pytest.raises(SourceError, match="Parquet"):
        open_source(str(csv), None, engine="spark")


def test_cli_segment_on_a_local_master_equals_duckdb(spark, data, tmp_path):
    runner = CliRunner()
    args = ["--columns", ",".join(COLUMNS), "--k", "5", "--width", "0.5", "--cell-budget", "2000", "--quiet"]
    done = runner.invoke(main, ["segment", "local[2]", "--table", REGISTERED, *args, "--out", str(tmp_path / "m.json"),
                                "--spark-conf", "spark.sql.shuffle.partitions=2"])
    assert done.exit_code == 0, done.output
    ref = runner.invoke(main, ["segment", str(data[0]), "--table", TABLE, *args, "--out", str(tmp_path / "ref.json")])
    assert ref.exit_code == 0, ref.output
    # reference: the model DuckDB writes for the same rows
    assert json.loads((tmp_path / "m.json").read_text())["sizes"] == json.loads((tmp_path / "ref.json").read_text())["sizes"]


def test_partition_fingerprints_ignore_row_order_and_tell_null_from_values(spark, sparks):
    # partitions 1 and 2: the same rows in another order; 3: the NULL in the other column;
    # 4: the NULL moved to the other row (same column sums); 5: 0.3 where 6 has the double just above it
    probe = [(1, 1.5, None), (1, 2.0, 3.0), (2, 2.0, 3.0), (2, 1.5, None), (3, None, 1.5), (3, 2.0, 3.0),
             (4, 1.5, 3.0), (4, 2.0, None), (5, 0.3, 0.0), (5, 2.0, 3.0), (6, 0.30000000000000004, 0.0), (6, 2.0, 3.0)]
    spark.createDataFrame(probe, "part INT, a DOUBLE, b DOUBLE").createOrReplaceTempView("fingerprint_probe")
    partitioning = sqlgen.Partitioning.of_columns(["part"])
    got = sparks.query(sqlgen.fingerprint_statement(Source.of_table("fingerprint_probe"), ["a", "b"], partitioning, "spark"))
    fp = dict(zip(got["pv0"], got["fingerprint"]))  # keyed by the partition value as text
    # reference: the definition of the fingerprint (a sum over rows: order-free; a hash of each row's
    # values and NULL flags: NULLs and every bit of a double count), and Python's count of the probe rows
    assert fp["1"] == fp["2"] and isinstance(fp["1"], str)
    assert len({fp["1"], fp["3"], fp["4"], fp["5"], fp["6"]}) == 5
    assert all(int(r) == 2 for r in got["rows"])


def test_missing_driver_names_the_extra(monkeypatch):
    import sys

    monkeypatch.setitem(sys.modules, "pyspark.sql", None)
    with pytest.raises(MissingExtraError, match=r"pip install 'tillite\[spark\]'"):
        SparkEngine(master="local[1]")


def test_labels_carry_tillites_mark_in_sparks_catalog_and_a_users_view_is_refused(sparks, duck, data):
    """Catalog views take the mark as their 'comment' property, tables as COMMENT ON TABLE; temporary
    views keep no comment, so an existing temporary view is replaced only with replace=True."""
    from tillite.pipeline import OWNED_MARK, InputError

    model = segment(duck, DUCK_SRC, COLUMNS, Settings(**SETTINGS))
    src = Source.of_table(REGISTERED)
    sparks.spark.sql(f"CREATE VIEW users_view AS SELECT * FROM {REGISTERED}")
    with pytest.raises(InputError, match="not made by tillite"):
        label(sparks, src, model, "users_view")
    # reference: Spark's own catalog entry of the user's view
    assert sparks.spark.catalog.getTable("users_view").description is None
    label(sparks, src, model, "marked_view")
    assert sparks.spark.catalog.getTable("marked_view").description.startswith(OWNED_MARK)
    label(sparks, src, model, "marked_view")  # a view tillite made: replaced without replace=True
    label(sparks, src, model, "marked_table", materialize=True)
    assert sparks.spark.catalog.getTable("marked_table").description.startswith(OWNED_MARK)
    label(sparks, Source.of_table("points_temp"), model, "temp_marked")
    with pytest.raises(InputError, match="not made by tillite"):
        label(sparks, Source.of_table("points_temp"), model, "temp_marked")
    label(sparks, Source.of_table("points_temp"), model, "temp_marked", replace=True)
def test_two_seeded_runs_on_spark_write_the_same_model_file(sparks, data):
    """Trust rule on Spark: the profile sample is a rand(seed) filter, repeatable for the same
    input partitioning, and the model says so."""
    from test_trust import comparable

    for src in sources(data):
        runs = [comparable(segment(sparks, src, COLUMNS, Settings(k=5, seed=3, sample_rows=2_000))) for _ in range(2)]
        assert runs[0] == runs[1]
        assert json.loads(runs[0])["params"]["sample_repeats"] == "for the same input partitioning"
def test_refine_pass_through_a_cell_map_held_as_a_temporary_view_equals_duckdb(sparks, duck, data):
    model = segment(duck, DUCK_SRC, COLUMNS, Settings(**SETTINGS))
    cell_map = every_third_cell(duck, DUCK_SRC, model)
    # reference: DuckDB running the same refine tree with the map inline
    ref = run_refine_pass(duck, DUCK_SRC, COLUMNS, model.assignment(), cell_map)
    with temporary_cell_map(sparks, cell_map) as held:
        assert held.table is not None and sparks.spark.catalog.getTable(held.table).isTemporary
        for src in sources(data):
            assert_same_refine(run_refine_pass(sparks, src, COLUMNS, model.assignment(), held), ref)
    assert all(t.name != held.table for t in sparks.spark.catalog.listTables())


def test_segment_within_and_its_labels_equal_duckdb(sparks, duck, data, engine_rows):
    from engine_checks import assert_same_within_labels, assert_same_within_model

    from tillite.within import label_within_select

    settings = dict(SETTINGS, k=2)
    with pytest.warns(UserWarning, match="group NULL"):  # one row: every column constant there, one segment
        ref = segment(duck, DUCK_SRC, COLUMNS, Settings(**settings, within="kind"))
    select = label_within_select(duck, DUCK_SRC, ref, ["id", *COLUMNS, "kind"], materialize=False)
    want = duck.query(exp.select(exp.Star()).from_(sqlgen.subquery(select, "l")).order_by(sqlgen.col("id")))
    for src in sources(data):
        with pytest.warns(UserWarning, match="group NULL"):
            got = segment(sparks, src, COLUMNS, Settings(**settings, within="kind"))
        # reference: DuckDB running the same trees
        assert_same_within_model(got, ref)
    label(sparks, Source.of_table(REGISTERED), ref, "point_groups")
    assert_same_within_labels(ordered_rows(sparks, "point_groups"), want, engine_rows)


def test_categorical_segment_and_labels_equal_duckdb(sparks, duck, data, engine_rows):
    from tillite import categorical as cat
    from tillite.stages import code_assignment, model_source

    settings = dict(SETTINGS, categorical=("kind",))
    ref = segment(duck, DUCK_SRC, COLUMNS, Settings(**settings))
    for src in sources(data):
        # reference: DuckDB running the same trees (codes by array_position, lookups by element_at here)
        assert_same_model(segment(sparks, src, COLUMNS, Settings(**settings)), ref)
    specs = cat.specs_of(ref.categorical)
    cols, assign, lookups = code_assignment(ref.columns, ref.assignment(), cat.indicator_positions(ref.columns, specs),
                                            cat.code_names(specs))
    select = sqlgen.label_select(model_source(duck, DUCK_SRC, ref), cols, ["id", *COLUMNS, "kind"], assign, "duckdb", lookups=lookups)
    expected = duck.query(exp.select(exp.Star()).from_(sqlgen.subquery(select, "l")).order_by(sqlgen.col("id")))
    label(sparks, Source.of_table(REGISTERED), ref, "kind_segments", materialize=True)
    # reference: DuckDB's labels over the same rows
    assert_same_labels(ordered_rows(sparks, "kind_segments"), expected, engine_rows)


def test_segment_within_with_a_categorical_column_and_its_labels_equal_duckdb(spark, sparks, data, engine_rows, tmp_path):
    import warnings

    from engine_checks import assert_same_within_labels, assert_same_within_model

    from tillite.within import label_within_select

    band = "CASE WHEN id % 3 = 0 THEN 'east' WHEN id % 3 = 1 THEN 'west' END"  # a category column beside kind
    spark.sql(f"CREATE OR REPLACE TEMPORARY VIEW points_banded AS SELECT *, {band} AS band FROM {REGISTERED}")
    copy = tmp_path / "banded.duckdb"
    copy.write_bytes(data[0].read_bytes())
    with duckdb.connect(str(copy)) as con:
        con.execute(f'CREATE VIEW points_banded AS SELECT *, {band} AS band FROM "{TABLE}"')
    src = Source.of_table("points_banded")
    settings = Settings(**{**SETTINGS, "k": 2}, within="kind", categorical=("band",))
    with DuckDBEngine(str(copy)) as duck, warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the NULL group: one row, one segment
        ref = segment(duck, src, COLUMNS, settings)
        from tillite.stages import model_source

        banded = model_source(duck, src, ref)
        select = label_within_select(duck, banded, ref, ["id", *COLUMNS, "kind", "band"], materialize=False)
        want = duck.query(exp.select(exp.Star()).from_(sqlgen.subquery(select, "l")).order_by(sqlgen.col("id")))
        got = segment(sparks, src, COLUMNS, settings)
    # reference: DuckDB running the same trees ((group, cell, code) cell pass, joined refine passes)
    assert_same_within_model(got, ref)
    label(sparks, src, ref, "band_groups")
    assert_same_within_labels(ordered_rows(sparks, "band_groups"), want, engine_rows)


@pytest.mark.parametrize("source, said", [
    ("duckdb-file", "is a DuckDB database file"),
    ("postgresql://me@db.example/warehouse", "is a PostgreSQL URL"),
    ("no-such-master", "neither a Spark master URL nor a Parquet/JSON path"),
])
def test_engine_spark_refuses_a_source_that_is_no_master_or_file_source_before_starting_java(
        source, said, tmp_path, monkeypatch):
    if source == "duckdb-file":
        source = str(duckdb_file_with_one_table(tmp_path / "t.duckdb"))
    started = []
    monkeypatch.setattr("tillite.engines.SparkEngine", lambda *a, **k: started.append(1))
    result = run_cli("segment", "--engine", "spark", source, "--table", "t", "--columns", "x", "--k", "2")
    assert_one_error_line(result, source, said, "--engine spark", "master URL")
    assert not started


def duckdb_file_with_one_table(path):
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE t AS SELECT range::DOUBLE AS x FROM range(10)")
    con.close()
    return path


def test_a_spark_session_tillite_starts_is_quiet_and_leaves_no_warehouse_folder(tmp_path):
    """--quiet: stderr holds at most the JVM launcher's own module notice; the warehouse was a scratch folder."""
    pytest.importorskip("pyspark", reason="pyspark is not installed")
    if not os.environ.get("JAVA_HOME") and not __import__("shutil").which("java"):
        unavailable("no Java runtime (java on PATH or JAVA_HOME) for Spark")
    con = duckdb.connect()
    con.execute(f"COPY (SELECT range::DOUBLE AS x, (range % 7)::DOUBLE AS y FROM range(200)) TO '{tmp_path / 'p.parquet'}' (FORMAT PARQUET)")
    con.close()
    scratch = tmp_path / "tmp"
    scratch.mkdir()
    env = {**os.environ, "TMPDIR": str(scratch), "PYTHONPATH": os.pathsep.join(sys.path)}
    done = subprocess.run([sys.executable, "-m", "tillite.cli", "segment", "--engine", "spark", "p.parquet",
                           "--columns", "x,y", "--k", "2", "--quiet", "--out", "m.json",
                           "--spark-conf", "spark.master=local[1]"],
                          cwd=tmp_path, env=env, capture_output=True, text=True, timeout=600)
    if done.returncode != 0 and "cannot start Spark" in done.stderr:
        unavailable(f"cannot start a local SparkSession: {done.stderr.strip()}")
    assert done.returncode == 0, done.stderr
    # the JVM launcher's notice about incubator modules is not a log line; nothing else may show
    lines = [ln for ln in done.stderr.splitlines() if ln.strip() and not ln.startswith("WARNING: Using incubator modules")]
    assert lines == []
    assert not (tmp_path / "spark-warehouse").exists()
    assert list(scratch.glob("tillite-spark-*")) == []  # the scratch folder (log settings, warehouse) went with the session


def test_spark_finds_table_and_columns_in_any_case_and_the_model_keeps_their_own_names(sparks, duck, data):
    """Spark resolves names case-insensitively by default (spark.sql.caseSensitive=false, from its documentation)."""
    got = segment(sparks, Source.of_table(REGISTERED.upper()), [c.upper() for c in COLUMNS], Settings(**SETTINGS))
    assert got.source == REGISTERED and list(got.columns) == COLUMNS
    # reference: DuckDB on the same rows under their own names
    assert_same_model(got, segment(duck, DUCK_SRC, COLUMNS, Settings(**SETTINGS)))
