"""Model and label files: named after their source by default, replaced with a word, readable by colleagues.

References: the file system's own view of the files (os.stat modes against
0666 less the umask that was set, as open(2) documents), and the JSON written.
"""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path

import numpy as np
import pytest
from sklearn.datasets import make_blobs

from tillite.model import Model, default_model_path

from conftest import assert_one_error_line, columns_of, run_cli, write_table


@pytest.fixture
def two_tables_db(tmp_path):
    x, _ = make_blobs(n_samples=2_000, centers=3, n_features=3, random_state=5)
    path = write_table(tmp_path / "pts.duckdb", "meter_days", columns_of(x, ["a", "b", "c"]))
    write_table(path, "other_table", columns_of(x, ["a", "b", "c"]))
    return path


@pytest.fixture
def umask_027():
    old = os.umask(0o027)
    yield 0o027
    os.umask(old)


def mode(path: Path) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


@pytest.mark.parametrize("source, table, expected", [
    ("w.duckdb", "meter_days", "meter_days.model.json"),
    ("w.duckdb", "warehouse.meter days", "warehouse.meter_days.model.json"),
    ("exports/meter_days.parquet", None, "meter_days.model.json"),
    ("exports/*.parquet", None, "exports.model.json"),
    ("exports/", None, "exports.model.json"),
])
def test_default_model_file_is_named_after_the_source(source, table, expected):
    assert default_model_path(source, table) == expected


def test_segment_without_out_writes_source_model_json_and_says_where(two_tables_db, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    result = run_cli("segment", two_tables_db, "-t", "meter_days", "-c", "a,b,c", "--k", "3")
    assert result.exit_code == 0, result.output
    assert (tmp_path / "meter_days.model.json").exists() and not (tmp_path / "model.json").exists()
    assert sum("written to meter_days.model.json" in ln for ln in result.stderr.splitlines()) == 1, result.stderr
    assert json.loads((tmp_path / "meter_days.model.json").read_text())["source"] == "meter_days"


def test_replacing_the_model_of_another_source_or_columns_is_said_in_one_warning(two_tables_db, tmp_path):
    out = tmp_path / "shared.json"
    assert run_cli("segment", two_tables_db, "-t", "meter_days", "-c", "a,b,c", "--k", "3", "-o", out, "-q").exit_code == 0
    same = run_cli("segment", two_tables_db, "-t", "meter_days", "-c", "a,b,c", "--k", "3", "-o", out, "-q")
    assert same.exit_code == 0 and same.stderr == ""  # the same source and columns again: no warning
    for args in (["-t", "other_table", "-c", "a,b,c"], ["-t", "other_table", "-c", "a,b"]):
        result = run_cli("segment", two_tables_db, *args, "--k", "3", "-o", out, "-q")
        assert result.exit_code == 0, result.output
        warned = [ln for ln in result.stderr.splitlines() if ln.startswith("warning:")]
        assert len(warned) == 1 and str(out) in warned[0] and "another source or column list" in warned[0], result.stderr
    assert json.loads(out.read_text())["columns"] == ["a", "b"]


def test_segment_refuses_to_replace_a_file_that_is_not_a_model(two_tables_db, tmp_path):
    out = tmp_path / "notes.json"
    out.write_text("my notes\n")
    result = run_cli("segment", two_tables_db, "-t", "meter_days", "-c", "a,b,c", "--k", "3", "-o", out, "-q")
    assert_one_error_line(result, "--out", str(out), "not a model file tillite wrote")
    assert out.read_text() == "my notes\n"


def test_default_model_file_of_a_glob_in_the_current_folder_is_named_after_the_folder(tmp_path, monkeypatch):
    folder = tmp_path / "exports"
    folder.mkdir()
    monkeypatch.chdir(folder)
    assert default_model_path("*.parquet", None) == default_model_path("./*.parquet", None) == "exports.model.json"
    assert default_model_path(".", None) == "exports.model.json"


def test_model_files_get_the_usual_mode_not_0600(two_tables_db, tmp_path, umask_027):
    out = tmp_path / "m.json"
    assert run_cli("segment", two_tables_db, "-t", "meter_days", "-c", "a,b,c", "--k", "3", "-o", out, "-q").exit_code == 0
    # reference: open(2) gives a new file 0666 & ~umask
    assert mode(out) == 0o666 & ~umask_027 == 0o640
    os.umask(0o002)
    Model.read(out).write(out)  # replaced atomically, with the mode of the umask now in force
    assert mode(out) == 0o664
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".m.json.")]  # no temporary left behind


def test_label_files_get_the_usual_mode(tmp_path, umask_027):
    x, _ = make_blobs(n_samples=1_000, centers=2, n_features=2, random_state=6)
    data = tmp_path / "pts.csv"
    np.savetxt(data, x, delimiter=",", header="a,b", comments="", fmt="%.17g")
    model = tmp_path / "pts.model.json"
    assert run_cli("segment", data, "-c", "a,b", "--k", "2", "-o", model, "-q").exit_code == 0
    out = tmp_path / "labelled.parquet"
    assert run_cli("label", data, "-m", model, "--into", out, "-q").exit_code == 0
    # reference: open(2) gives a new file 0666 & ~umask
    assert mode(out) == 0o640


@pytest.mark.parametrize("table, expected", [('"my.table"', "my.table.model.json"),
                                             ('public."My Tab"', "public.My_Tab.model.json")])
def test_default_model_file_of_a_quoted_table_name_leaves_the_quotes_out(table, expected):
    assert default_model_path("w.duckdb", table) == expected
