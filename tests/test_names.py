"""Names end to end: tables, columns and --into are read as the engine reads them, and the label columns
never shadow a source's own.

References: DuckDB's own catalog (information_schema, duckdb_views) and its own name resolution (a query
naming a column in another case reads the same values); DuckDB's documented rule that identifiers are
case-insensitive, PostgreSQL's (its manual, section 4.1.1) that unquoted names fold to lower case and
Spark's default spark.sql.caseSensitive=false (recalled from their documentation).
"""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pytest

from tillite import pipeline
from tillite.engines import DuckDBEngine
from tillite.errors import ParameterError, SourceError
from tillite.settings import Settings
from tillite.sqlgen import Source
from tillite.targets import DuckDB, PostgreSQL, Spark, Target

from conftest import assert_one_error_line, duckdb_file, fetch_rows, run_cli, write_table


@pytest.fixture
def named_db(tmp_path, blobs_3k_3d_3c):
    """Blobs as table points (a, b, c, district) plus a copy with a text district code and one whose columns clash
    with the label columns (segment, distance, segment_name)."""
    x, _ = blobs_3k_3d_3c
    district = np.array(["north", "south", "east"])[np.arange(len(x)) % 3]
    path = write_table(tmp_path / "named.duckdb", "points", {"a": x[:, 0], "b": x[:, 1], "c": x[:, 2], "district": district})
    with duckdb_file(path) as con:
        con.execute("ALTER TABLE points ADD COLUMN code INTEGER")
        con.execute("UPDATE points SET code = CAST(round(c) AS INTEGER) % 4")
        con.execute("CREATE TABLE points_text AS SELECT * REPLACE (CAST(code AS VARCHAR) AS code) FROM points")
        con.execute("CREATE TABLE points_big AS SELECT * REPLACE (CAST(code AS BIGINT) AS code) FROM points")
        con.execute("CREATE TABLE clash AS SELECT *, 1 AS segment, 2.0 AS distance, 'mine' AS segment_name FROM points")
        con.execute('CREATE TABLE "Mixed Case" AS SELECT a AS "Unit Price", b AS "Night Share" FROM points')
    return path


def segment_cli(path, out, *args):
    return run_cli("segment", path, "--k", "3", "-o", out, "-q", *args)


# ----------------------------------------------------------------------------- label columns


def test_label_refuses_a_source_with_columns_named_as_the_label_columns(named_db, tmp_path):
    model = tmp_path / "m.json"
    assert segment_cli(named_db, model, "-t", "points", "-c", "a,b").exit_code == 0
    line = assert_one_error_line(run_cli("label", named_db, "-t", "clash", "-m", model, "--into", "clash_labels"),
                                 "clash", "segment, distance", "renames")
    assert "segment_name" not in line.split("(")[0]  # the model has no names: no segment_name column is added
    assert run_cli("name", model, "0", "calm").exit_code == 0
    assert_one_error_line(run_cli("label", named_db, "-t", "clash", "-m", model, "--into", "clash_labels"),
                          "segment, distance, segment_name")
    # reference: DuckDB's catalog holds no such view (nothing was made)
    assert fetch_rows(named_db, "SELECT * FROM duckdb_views() WHERE view_name = 'clash_labels'") == []


def test_report_labels_must_be_a_labels_table_tillite_made(named_db, tmp_path):
    model = tmp_path / "m.json"
    assert segment_cli(named_db, model, "-t", "points", "-c", "a,b").exit_code == 0
    got = run_cli("report", named_db, "-t", "points", "-m", model, "--labels", "clash", "-o", tmp_path / "r.html", "-q")
    assert_one_error_line(got, "--labels clash", "not made by `tillite label`")
    assert run_cli("label", named_db, "-t", "points", "-m", model, "--into", "made", "--materialize").exit_code == 0
    got = run_cli("report", named_db, "-t", "points", "-m", model, "--labels", "made", "-o", tmp_path / "r.html", "-q")
    assert got.exit_code == 0, got.output


# ----------------------------------------------------------------------------- --into


def test_into_reads_double_quotes_as_table_does(named_db, tmp_path):
    model = tmp_path / "m.json"
    assert segment_cli(named_db, model, "-t", "points", "-c", "a,b").exit_code == 0
    got = run_cli("label", named_db, "-t", "points", "-m", model, "--into", '"my.view"', "-q")
    assert got.exit_code == 0 and got.stdout.strip() == 'view "my.view"', got.output
    got = run_cli("label", named_db, "-t", "points", "-m", model, "--into", '"plain"', "-q")
    assert got.exit_code == 0 and got.stdout.strip() == "view plain", got.output
    # reference: DuckDB's catalog names the views without the quote marks, the dot kept inside one name
    names = {r[0] for r in fetch_rows(named_db, "SELECT view_name FROM duckdb_views() WHERE NOT internal")}
    assert {"my.view", "plain"} <= names and not any('"' in n for n in names)
    assert fetch_rows(named_db, 'SELECT count(*) FROM "my.view"') == [(3000,)]
    assert_one_error_line(run_cli("label", named_db, "-t", "points", "-m", model, "--into", '"points"'),
                          "--into points is the source table")


def test_labels_of_a_database_table_into_a_file_name_say_only_file_sources_label_to_files(named_db, tmp_path):
    model = tmp_path / "m.json"
    assert segment_cli(named_db, model, "-t", "points", "-c", "a,b").exit_code == 0
    assert_one_error_line(run_cli("label", named_db, "-t", "points", "-m", model, "--into", "out.parquet"),
                          "--into out.parquet", "only Parquet/CSV sources label to files")


# ----------------------------------------------------------------------------- categorical column types


def test_a_categorical_column_of_another_type_in_the_table_is_one_error_line(named_db, tmp_path):
    model = tmp_path / "m.json"
    assert segment_cli(named_db, model, "-t", "points", "-c", "a,b", "--categorical", "code").exit_code == 0
    assert_one_error_line(run_cli("label", named_db, "-t", "points_text", "-m", model, "--into", "x"),
                          "categorical column code", "INTEGER", "VARCHAR", "points_text")
    assert_one_error_line(run_cli("report", named_db, "-t", "points_text", "-m", model, "-o", tmp_path / "r.html", "-q"),
                          "categorical column code", "INTEGER", "VARCHAR")
    # another integer type compares: the labels equal those of the table the model was built on (reference: DuckDB
    # reading both views)
    for table in ("points", "points_big"):
        assert run_cli("label", named_db, "-t", table, "-m", model, "--into", f"{table}_labels", "-q").exit_code == 0
    assert (fetch_rows(named_db, "SELECT segment FROM points_labels ORDER BY a, b")
            == fetch_rows(named_db, "SELECT segment FROM points_big_labels ORDER BY a, b"))


# ----------------------------------------------------------------------------- case of names


def test_table_and_column_names_resolve_as_duckdb_resolves_them(named_db, tmp_path):
    ref, got = tmp_path / "ref.json", tmp_path / "got.json"
    assert segment_cli(named_db, ref, "-t", "points", "-c", "a,b", "--categorical", "district",
                       "--weights", "a=2").exit_code == 0
    done = segment_cli(named_db, got, "-t", "POINTS", "-c", "A,B", "--categorical", "District", "--weights", "A=2")
    assert done.exit_code == 0, done.output
    a, b = json.loads(ref.read_text()), json.loads(got.read_text())
    # the model records the table's and columns' own names: the same as the run that spelled them so
    assert (b["source"], b["columns"], b["categorical"]) == (a["source"], a["columns"], a["categorical"])
    assert b["sizes"] == a["sizes"]
    # no "model of another source" warning when the same table is segmented again in its own spelling
    again = segment_cli(named_db, got, "-t", "points", "-c", "a,b", "--categorical", "district", "--weights", "a=2")
    assert again.exit_code == 0 and "another source" not in again.output, again.output
    spaced = segment_cli(named_db, tmp_path / "s.json", "-t", '"mixed case"', "-c", "unit price,NIGHT SHARE")
    assert spaced.exit_code == 0, spaced.output
    s = json.loads((tmp_path / "s.json").read_text())
    assert s["source"] == "Mixed Case" and s["columns"] == ["Unit Price", "Night Share"]
    # reference: DuckDB itself reads the same column under the other spelling
    assert fetch_rows(named_db, 'SELECT sum("UNIT PRICE") = sum("Unit Price") FROM "MIXED CASE"') == [(True,)]
    by = run_cli("report", named_db, "-t", "points", "-m", ref, "--by", "DISTRICT", "-o", tmp_path / "r.json",
                 "--format", "json", "-q")
    assert by.exit_code == 0, by.output
    assert json.loads((tmp_path / "r.json").read_text())["breakdowns"][0]["column"] == "district"


def test_within_and_partition_names_resolve_as_duckdb_resolves_them(named_db, tmp_path):
    from tillite import store as S

    with DuckDBEngine(str(named_db)) as engine:
        model = pipeline.segment(engine, Source.of_table("Points"), ["A"], Settings(k=2, within="DISTRICT"))
        assert model.within["column"] == "district" and model.columns == ["a"] and model.source == "points"
        info, _ = S.build(engine, Source.of_table("POINTS"), ["B"], S.PartitionSpec(columns=("DISTRICT",)),
                          Settings(k=2), store="cased")
        assert info.columns == ["b"] and info.partition.columns == ("district",) and info.source.label == "points"


def test_engine_rules_for_names_live_in_the_targets():
    names = ["litres", "Unit Price", "LOUD"]
    # DuckDB and Spark: any case; an exact name first
    for target in (DuckDB(), Spark()):
        assert target.resolve_name("LITRES", names) == "litres"
        assert target.resolve_name("unit price", names) == "Unit Price"
        assert target.resolve_name("loud", names, typed=False) == "LOUD"
    # PostgreSQL: a typed name also as folded to lower case; a quoted one (from a model file) exactly
    pg = PostgreSQL()
    assert pg.resolve_name("LITRES", names) == "litres" and pg.resolve_name("LITRES", names, typed=False) is None
    assert pg.resolve_name("unit price", names) is None and pg.resolve_name("Unit Price", names) == "Unit Price"
    assert pg.resolve_name("loud", names) is None
    # standard SQL (render-only targets): exactly; names differing only in case are ambiguous in DuckDB
    assert Target("tsql").resolve_name("LITRES", names) is None
    assert DuckDB().resolve_name("x", ["X", "x"]) == "x" and DuckDB().resolve_name("x", ["X", "Xx"]) == "X"
    assert DuckDB().resolve_name("y", ["Y", "y "]) == "Y" and Spark().resolve_name("ab", ["AB", "Ab"]) is None


# ----------------------------------------------------------------------------- column lists


def test_api_columns_given_as_one_string_are_refused_naming_the_parameter(named_db):
    with DuckDBEngine(str(named_db)) as engine:
        with pytest.raises(ParameterError, match=r"columns must be a list of column names, e\.g\. \['a'\]"):
            pipeline.segment(engine, Source.of_table("points"), "a", Settings(k=2))


def test_a_text_column_among_the_columns_suggests_categorical(named_db, tmp_path):
    got = segment_cli(named_db, tmp_path / "m.json", "-t", "points", "-c", "a,district")
    assert_one_error_line(got, "column district", "not a number", "--categorical district")
    with DuckDBEngine(str(named_db)) as engine:
        with pytest.raises(SourceError, match="give it as categorical district"):
            pipeline.segment(engine, Source.of_table("points"), ["a", "district"], Settings(k=2))
