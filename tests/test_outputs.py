"""Files the commands write (model files, reports) never go over the run's inputs or over files tillite did not write.

References: the file system's own view of the files (their bytes before and after, os.path.samefile for
links), DuckDB's catalog read straight from the file, and the JSON written.
"""

from __future__ import annotations

import json
import os

import pytest

from tillite import demo, model as model_module, outputs, report as report_module
from tillite.cli.segment import DEMO_ROWS
from tillite.errors import TilliteError

from conftest import assert_one_error_line, columns_of, duckdb_file, fetch_rows, run_cli, write_table

SEGMENT = ("--columns", "a,b", "--k", "2", "-q")


@pytest.fixture
def sources(tmp_path, blobs_600_4d_5c):
    """The same rows as a DuckDB table, a Parquet file and a CSV file, and a model file of the table."""
    x, _ = blobs_600_4d_5c
    db = write_table(tmp_path / "pts.duckdb", "points", columns_of(x[:, :2], ["a", "b"]))
    parquet, csv = tmp_path / "pts.parquet", tmp_path / "pts.csv"
    with duckdb_file(db) as con:
        con.execute(f"COPY points TO '{parquet}' (FORMAT parquet)")
        con.execute(f"COPY points TO '{csv}' (FORMAT csv)")
    model = tmp_path / "pts.model.json"
    assert run_cli("segment", db, "-t", "points", *SEGMENT, "--out", model).exit_code == 0
    return {"db": db, "parquet": parquet, "csv": csv, "model": model}


def unchanged(files):
    """The bytes of each file now, to compare with after a refused command."""
    return {p: p.read_bytes() for p in files}


# ----------------------------------------------------------------------------- segment --out


@pytest.mark.parametrize("kind, what", [("parquet", "a source file"), ("csv", "a source file"), ("db", "the database")])
def test_segment_out_refuses_the_source_it_reads(sources, kind, what):
    source = sources[kind]
    before = unchanged([source])
    table = ("-t", "points") if kind == "db" else ()
    result = run_cli("segment", source, *table, *SEGMENT, "--out", source)
    assert_one_error_line(result, "--out", str(source), what)
    assert unchanged([source]) == before


def test_segment_out_refuses_a_file_the_source_glob_reads_and_a_link_to_the_source(sources, tmp_path):
    before = unchanged([sources["parquet"]])
    glob = str(tmp_path / "*.parquet")
    assert_one_error_line(run_cli("segment", glob, *SEGMENT, "--out", sources["parquet"]), "--out", "a source file", glob)
    link = tmp_path / "elsewhere.json"
    os.link(sources["parquet"], link)  # another name for the same file (os.path.samefile says so)
    assert os.path.samefile(link, sources["parquet"])
    assert_one_error_line(run_cli("segment", sources["parquet"], *SEGMENT, "--out", link), "--out", str(link), "a source file")
    assert unchanged([sources["parquet"]]) == before


def test_segment_out_refuses_a_report_a_folder_and_a_missing_folder_and_replaces_an_empty_file(sources, tmp_path):
    page = tmp_path / "page.html"
    assert run_cli("report", sources["db"], "-t", "points", "--model", sources["model"], "--out", page, "-q").exit_code == 0
    assert_one_error_line(run_cli("segment", sources["db"], "-t", "points", *SEGMENT, "--out", page),
                          "--out", str(page), "is a tillite report")
    assert_one_error_line(run_cli("segment", sources["db"], "-t", "points", *SEGMENT, "--out", tmp_path),
                          "--out", "is a folder")
    assert_one_error_line(run_cli("segment", sources["db"], "-t", "points", *SEGMENT, "--out", tmp_path / "no" / "m.json"),
                          "--out", "does not exist")
    empty = tmp_path / "empty.json"
    empty.touch()  # nothing in it to lose
    assert run_cli("segment", sources["db"], "-t", "points", *SEGMENT, "--out", empty).exit_code == 0
    assert json.loads(empty.read_text())["format"] == "tillite-model"


def test_label_into_refuses_the_source_file_even_with_replace(sources, tmp_path):
    model = tmp_path / "files.model.json"
    assert run_cli("segment", sources["parquet"], *SEGMENT, "--out", model).exit_code == 0
    before = unchanged([sources["parquet"]])
    for replace in ((), ("--replace",)):
        result = run_cli("label", sources["parquet"], "--model", model, "--into", sources["parquet"], *replace)
        assert_one_error_line(result, "--into", str(sources["parquet"]), "is a source file")
    assert unchanged([sources["parquet"]]) == before


# ----------------------------------------------------------------------------- report --out


@pytest.mark.parametrize("target, what", [("db", "the database"), ("model", "the model file (--model)")])
def test_report_out_refuses_the_database_and_the_model_it_reads(sources, target, what):
    before = unchanged([sources["db"], sources["model"]])
    result = run_cli("report", sources["db"], "-t", "points", "--model", sources["model"], "--out", sources[target])
    assert_one_error_line(result, "--out", str(sources[target]), what)
    assert unchanged([sources["db"], sources["model"]]) == before


def test_report_out_refuses_a_file_it_did_not_write_and_another_tillite_model(sources, tmp_path):
    notes = tmp_path / "notes.md"
    notes.write_text("# my notes\n")
    other_model = tmp_path / "other.model.json"
    other_model.write_bytes(sources["model"].read_bytes())
    for target, said in ((notes, "not a report tillite wrote"), (other_model, "is a tillite model file")):
        result = run_cli("report", sources["db"], "-t", "points", "--model", sources["model"], "--out", target)
        assert_one_error_line(result, "--out", str(target), said)
    assert notes.read_text() == "# my notes\n"


@pytest.mark.parametrize("fmt", ["html", "md", "json"])
def test_report_out_replaces_its_own_earlier_report_in_any_format(sources, tmp_path, fmt):
    page = tmp_path / "segments.out"
    for first in ("html", "md", "json"):
        assert run_cli("report", sources["db"], "-t", "points", "--model", sources["model"], "--out", page,
                       "--format", first, "-q").exit_code == 0
        got = run_cli("report", sources["db"], "-t", "points", "--model", sources["model"], "--out", page, "--format", fmt, "-q")
        assert got.exit_code == 0, got.output
        assert outputs.kind_of_file(page) == outputs.REPORT


def test_reports_written_before_the_marker_are_recognised_as_reports(sources, tmp_path):
    """A report without the marker (as written before it): its fixed HTML head and footer, its Markdown section."""
    for fmt in ("html", "md"):
        page = tmp_path / f"old.{fmt}"
        assert run_cli("report", sources["db"], "-t", "points", "--model", sources["model"], "--out", page,
                       "--format", fmt, "-q").exit_code == 0
        text = page.read_text()
        assert outputs.REPORT_MARKER in text
        page.write_text(text.replace(outputs.REPORT_MARKER + "\n", ""))
        assert outputs.REPORT_MARKER not in page.read_text()
        assert outputs.kind_of_file(page) == outputs.REPORT
    page = tmp_path / "mine.html"
    page.write_text('<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><title>mine</title></head></html>\n')
    assert outputs.kind_of_file(page) is None


def test_the_formats_recognised_are_the_model_and_report_formats():
    assert outputs._JSON_FORMATS == {model_module.FORMAT_NAME: outputs.MODEL_FILE, report_module.REPORT_FORMAT: outputs.REPORT}


# ----------------------------------------------------------------------------- store build --out


def test_store_build_out_refuses_the_database_and_the_db_file(sources, tmp_path):
    db_copy = tmp_path / "copy.duckdb"
    db_copy.write_bytes(sources["db"].read_bytes())
    before = unchanged([db_copy])
    result = run_cli("store", "build", db_copy, "-t", "points", "--columns", "a,b", "--k", "2", "-q", "--out", db_copy)
    assert_one_error_line(result, "--out", str(db_copy), "the database")
    assert unchanged([db_copy]) == before
    store_db = tmp_path / "store.duckdb"
    result = run_cli("store", "build", sources["parquet"], "--db", store_db, "--columns", "a,b", "--k", "2", "-q", "--out", store_db)
    assert_one_error_line(result, "--out", str(store_db), "--db")
    assert not store_db.exists()  # refused before anything was made


def test_outputs_refuse_a_pipe_and_a_device_without_opening_them(sources, tmp_path):
    pipe = tmp_path / "pipe"
    os.mkfifo(pipe)
    result = run_cli("segment", sources["db"], "-t", "points", *SEGMENT, "--out", pipe)  # opening it would block
    assert_one_error_line(result, "--out", str(pipe), "not a regular file")
    assert_one_error_line(run_cli("report", sources["db"], "-t", "points", "--model", sources["model"], "--out", pipe),
                          "--out", str(pipe), "not a regular file")
    with pytest.raises(outputs.OutputRefused, match="not a regular file"):
        outputs.check_output("/dev/null", "--out", outputs.MODEL_FILE)  # refused before anything touches it
    assert os.path.exists("/dev/null") and not os.path.isfile("/dev/null")


def test_store_build_db_refuses_a_file_that_is_not_duckdb(sources):
    for not_duckdb in (sources["parquet"], sources["csv"]):
        before = unchanged([not_duckdb])
        result = run_cli("store", "build", sources["parquet"], "--db", not_duckdb, "--columns", "a,b", "--k", "2", "-q")
        assert_one_error_line(result, "--db", str(not_duckdb), "not a DuckDB database")
        assert unchanged([not_duckdb]) == before


# ----------------------------------------------------------------------------- demo


DEMO = ("--rows", 2_000, "--days", 10, "-q")


def test_demo_out_and_report_refuse_the_database_and_each_other(tmp_path):
    db = tmp_path / "demo.duckdb"
    assert run_cli("demo", "--db", db, *DEMO, "--out", tmp_path / "m.json").exit_code == 0
    before = unchanged([db])
    assert_one_error_line(run_cli("demo", "--db", db, *DEMO, "--out", db), "--out", str(db), "the database (--db)")
    assert_one_error_line(run_cli("demo", "--db", db, *DEMO, "--report", db), "--report", str(db), "the database (--db)")
    same = tmp_path / "both.html"
    assert_one_error_line(run_cli("demo", "--db", db, *DEMO, "--out", same, "--report", same), "--report", str(same), "--out")
    assert unchanged([db]) == before
    new_db = tmp_path / "new.duckdb"
    assert_one_error_line(run_cli("demo", "--db", new_db, *DEMO, "--out", new_db), "--out", str(new_db))
    assert not new_db.exists()


def test_demo_report_refuses_a_file_it_did_not_write_and_reruns_replace_its_own(tmp_path):
    db, page = tmp_path / "demo.duckdb", tmp_path / "tillite-demo-report.html"
    page.write_text("<html>my page</html>\n")
    assert_one_error_line(run_cli("demo", "--db", db, *DEMO, "--out", tmp_path / "m.json"), "--report", str(page), "not a report")
    assert page.read_text() == "<html>my page</html>\n" and not db.exists()  # refused before the build
    page.unlink()
    for _ in range(2):  # the rerun replaces the demo's own model file and report
        assert run_cli("demo", "--db", db, *DEMO, "--out", tmp_path / "m.json").exit_code == 0
    assert outputs.kind_of_file(page) == outputs.REPORT and outputs.kind_of_file(tmp_path / "m.json") == outputs.MODEL_FILE


def test_demo_rebuild_refuses_a_users_table_naming_it_and_keeps_its_row(tmp_path):
    db = tmp_path / "user.duckdb"
    with duckdb_file(db) as con:
        con.execute("CREATE TABLE meter_days (precious INTEGER); INSERT INTO meter_days VALUES (1)")
    result = run_cli("demo", "--db", db, *DEMO, "--rebuild", "--out", tmp_path / "m.json")
    assert_one_error_line(result, "--db", str(db), "table meter_days", "not made by the demo")
    assert fetch_rows(db, "SELECT * FROM meter_days") == [(1,)]  # DuckDB read straight from the file


def test_demo_without_rebuild_refuses_a_users_table_instead_of_reusing_it(tmp_path):
    db = tmp_path / "user.duckdb"
    with duckdb_file(db) as con:
        con.execute("CREATE TABLE meter_days (precious INTEGER); INSERT INTO meter_days VALUES (1)")
    result = run_cli("demo", "--db", db, *DEMO, "--out", tmp_path / "m.json")
    assert_one_error_line(result, "--db", str(db), "table meter_days", "not made by the demo")
    assert fetch_rows(db, "SELECT * FROM meter_days") == [(1,)]


def test_demo_builds_its_tables_in_a_database_that_holds_neither(tmp_path):
    db = tmp_path / "other.duckdb"
    with duckdb_file(db) as con:
        con.execute("CREATE SCHEMA s; CREATE TABLE s.meter_days (a INTEGER)")
    assert run_cli("demo", "--db", db, *DEMO, "--out", tmp_path / "m.json").exit_code == 0
    assert fetch_rows(db, "SELECT count(*) FROM meter_days") == [(2_000,)]
    assert fetch_rows(db, "SELECT count(*) FROM s.meter_days") == [(0,)]  # the user's table in another schema untouched


def test_demo_rebuild_replaces_its_own_tables(tmp_path):
    db = tmp_path / "demo.duckdb"
    assert run_cli("demo", "--db", db, *DEMO, "--out", tmp_path / "m.json").exit_code == 0
    got = run_cli("demo", "--db", db, "--rows", 3_000, "--days", 10, "-q", "--rebuild", "--out", tmp_path / "m.json")
    assert got.exit_code == 0, got.output
    assert fetch_rows(db, "SELECT count(*) FROM meter_days") == [(3_000,)]
    assert dict(fetch_rows(db, "SELECT table_name, comment FROM duckdb_tables() WHERE table_name LIKE 'meter%'")) == {
        "meter_days": demo.DEMO_MARK, "meters": demo.DEMO_MARK}


@pytest.mark.parametrize("option, value", [("--rows", 999), ("--rows", 100_000_001), ("--days", 0), ("--seed", 2**63)])
def test_demo_sizes_out_of_range_are_one_error_line_naming_the_option(tmp_path, option, value):
    result = run_cli("demo", "--db", tmp_path / "d.duckdb", option, value)
    assert_one_error_line(result, option, str(value), code=2)
    assert not (tmp_path / "d.duckdb").exists()


def test_demo_rows_range_is_the_generators():
    assert DEMO_ROWS == (demo.MIN_ROWS, demo.MAX_ROWS)


@pytest.mark.parametrize("rebuild", [(), ("--rebuild",)])
def test_demo_over_a_file_that_is_not_duckdb_is_one_line_naming_it(tmp_path, rebuild):
    db = tmp_path / "notes.duckdb"
    db.write_text("a,b\n1,2\n")
    result = run_cli("demo", "--db", db, *DEMO, *rebuild, "--out", tmp_path / "m.json")
    assert_one_error_line(result, "--db", str(db), "not a DuckDB database")
    assert db.read_text() == "a,b\n1,2\n"


# ----------------------------------------------------------------------------- writing


def test_a_failed_write_leaves_the_earlier_file_whole_and_no_temporary(sources, tmp_path, monkeypatch):
    page = tmp_path / "r.json"
    page.write_text('{"format": "tillite-report", "earlier": true}\n')

    def refuse(*args):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(model_module.os, "replace", refuse)
    with pytest.raises(TilliteError, match="No space left on device"):
        report_module.write_report({"format": "tillite-report"}, page, "json")
    assert json.loads(page.read_text()) == {"format": "tillite-report", "earlier": True}
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".r.json.")] == []
