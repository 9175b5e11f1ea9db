"""The `tillite` command line, driven through click's CliRunner.

Each correctness check names its outside reference beside it (numpy, scikit-learn,
DuckDB run directly, sqlglot's own parser).  The rest pins the command's contract:
files written, what goes to stdout and what to stderr, exit codes and one-line
error messages that name the thing at fault and never show a Python traceback.
"""

from __future__ import annotations

import json
import re
import shutil
from functools import partial
from pathlib import Path

import duckdb
import numpy as np
import pytest
import sqlglot
from sklearn.metrics import adjusted_rand_score

from conftest import assert_one_error_line, columns_of, fetch_columns, fetch_rows, run_cli, write_table
from tillite.cli import main

NAMES = ["a", "b", "c"]
STAGE_LINES = ("[tillite] profile:", "[tillite] cells:", "[tillite] second phase:", "[tillite] refine:")


# ----------------------------------------------------------------------------- helpers


fetch = partial(fetch_columns, read_only=True)


def fingerprint(path: Path, table: str) -> list[tuple]:
    return fetch_rows(path, f'SELECT count(*), sum(hash(COLUMNS(*))) FROM "{table}"', read_only=True)


def relation_kind(path: Path, name: str) -> str | None:
    got = fetch(path, f"SELECT table_type FROM information_schema.tables WHERE table_name = '{name}'")["table_type"]
    return str(got[0]) if len(got) else None


def statements(sql_text: str) -> list[str]:
    """Split the `sql` command's output into statements (each ends with ';' at a line end)."""
    return [s.strip() for s in re.split(r";\s*$", sql_text, flags=re.M) if s.strip()]


# ----------------------------------------------------------------------------- data


@pytest.fixture(scope="module")
def base_db(tmp_path_factory, blobs_3k_3d_3c):
    x, y = blobs_3k_3d_3c
    data = columns_of(x, NAMES)
    data["truth"] = y
    data["id"] = np.arange(len(x))
    path = write_table(tmp_path_factory.mktemp("cli") / "blobs.duckdb", "points", data)
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE notes AS SELECT id, 'n' || id::VARCHAR AS note FROM points")
    con.close()
    return path


@pytest.fixture
def blobs_db_copy(tmp_path, base_db):
    """A private copy of the blobs database (labels write into it)."""
    path = tmp_path / "blobs.duckdb"
    shutil.copy(base_db, path)
    return path


@pytest.fixture(scope="module")
def model_file(tmp_path_factory, base_db):
    out = tmp_path_factory.mktemp("model") / "m.json"
    result = run_cli("segment", base_db, "--table", "points", "--columns", "a,b,c", "--k", 3, "--out", out, "--quiet")
    assert result.exit_code == 0, result.output
    return out


@pytest.fixture(scope="module")
def data_files(tmp_path_factory, blobs_3k_3d_3c):
    x, y = blobs_3k_3d_3c
    frame = columns_of(x, NAMES)
    frame["truth"] = y
    where = tmp_path_factory.mktemp("files")
    pq, csv = where / "points.parquet", where / "points.csv"
    con = duckdb.connect()
    con.register("frame", frame)
    con.execute(f"COPY (SELECT * FROM frame) TO '{pq}' (FORMAT parquet)")
    con.execute(f"COPY (SELECT * FROM frame) TO '{csv}' (FORMAT csv, HEADER)")
    con.close()
    return pq, csv


# ----------------------------------------------------------------------------- segment


def test_segment_writes_a_model_file_in_the_tillite_format(tmp_path, blobs_db_copy, blobs_3k_3d_3c):
    x, _ = blobs_3k_3d_3c
    out = tmp_path / "m.json"
    result = run_cli("segment", blobs_db_copy, "--table", "points", "--columns", "a,b,c", "--k", 3, "--out", out)
    assert result.exit_code == 0, result.output
    doc = json.loads(out.read_text())
    assert doc["format"] == "tillite-model" and doc["version"] == 1
    assert {"columns", "center", "scale", "centroids", "sizes", "sse", "rows"} <= set(doc)
    assert doc["columns"] == NAMES and doc["rows"] == len(x) and sum(doc["sizes"]) == len(x)
    # reference: numpy mean and population standard deviation of the same rows
    np.testing.assert_allclose(doc["center"], x.mean(axis=0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(doc["scale"], x.std(axis=0), rtol=1e-9)


def test_segment_prints_the_segment_table_on_stdout_and_one_progress_line_per_stage_on_stderr(tmp_path, blobs_db_copy):
    result = run_cli("segment", blobs_db_copy, "--table", "points", "--columns", "a,b,c", "--k", 3, "--out", tmp_path / "m.json")
    assert result.exit_code == 0, result.output
    assert "segment" in result.stdout and "size" in result.stdout and "radius" in result.stdout
    assert len([ln for ln in result.stdout.splitlines() if re.match(r"\s+[0-2]\s+1,000\s", ln)]) == 3
    assert "[tillite]" not in result.stdout
    err = result.stderr.splitlines()
    for stage in STAGE_LINES[:3]:
        assert sum(ln.startswith(stage) for ln in err) == 1, (stage, err)
    assert 1 <= sum(ln.startswith("[tillite] refine:") for ln in err) <= 3  # one per refine pass run (default at most 3)
    assert any(ln.startswith("[tillite] model:") and "m.json" in ln for ln in err)


def test_segment_quiet_silences_the_progress_lines(tmp_path, blobs_db_copy):
    result = run_cli("segment", blobs_db_copy, "--table", "points", "--columns", "a,b,c", "--k", 3, "--out", tmp_path / "m.json", "--quiet")
    assert result.exit_code == 0, result.output
    assert result.stderr == ""
    assert "segment" in result.stdout
    assert (tmp_path / "m.json").exists()


def test_segment_json_prints_a_parseable_summary_on_stdout_only(tmp_path, blobs_db_copy, blobs_3k_3d_3c):
    _, y = blobs_3k_3d_3c
    result = run_cli("segment", blobs_db_copy, "--table", "points", "--columns", "a,b,c", "--k", 3, "--out", tmp_path / "m.json", "--json")
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)  # nothing but JSON on stdout
    assert summary["k"] == 3 and summary["columns"] == NAMES and summary["rows"] == len(y)
    assert [s["segment"] for s in summary["segments"]] == [0, 1, 2]
    assert set(summary["segments"][0]["centroid"]) == set(NAMES)
    # reference: numpy bincount of make_blobs' generating labels (well separated, so sizes match)
    assert sorted(s["size"] for s in summary["segments"]) == sorted(np.bincount(y).tolist())
    assert "[tillite] profile:" in result.stderr


def test_columns_may_be_repeated_or_comma_separated(tmp_path, blobs_db_copy):
    one, two = tmp_path / "one.json", tmp_path / "two.json"
    r1 = run_cli("segment", blobs_db_copy, "-t", "points", "--columns", "a, b,c", "--k", 3, "-o", one, "-q")
    r2 = run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a", "--columns", "b", "-c", "c", "--k", 3, "-o", two, "-q")
    assert r1.exit_code == 0 and r2.exit_code == 0, (r1.output, r2.output)
    m1, m2 = json.loads(one.read_text()), json.loads(two.read_text())
    assert m1["columns"] == m2["columns"] == NAMES
    assert m1["sse"] == pytest.approx(m2["sse"], rel=1e-12)


def test_weights_and_scaling_none_reach_the_model(tmp_path, blobs_db_copy, blobs_3k_3d_3c):
    x, _ = blobs_3k_3d_3c
    out = tmp_path / "m.json"
    result = run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,b,c", "--k", 3, "--weights", "a=2", "--scaling", "none", "-o", out, "-q")
    assert result.exit_code == 0, result.output
    doc = json.loads(out.read_text())
    assert doc["weights"] == [2.0, 1.0, 1.0] and doc["scaling"] == "none" and doc["scale"] == [1.0, 1.0, 1.0]
    # reference: numpy mean (scaling none still centres)
    np.testing.assert_allclose(doc["center"], x.mean(axis=0), rtol=1e-9, atol=1e-12)
    assert "scaling=none" in result.stdout


@pytest.mark.parametrize("weights,named", [("a=x", "'x'"), ("a", "'a'"), ("=2", "'=2'")], ids=["not-a-number", "no-equals", "no-name"])
def test_bad_weights_value_is_a_usage_error_naming_it(tmp_path, blobs_db_copy, weights, named):
    result = run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,b,c", "--k", 3, "--weights", weights, "-o", tmp_path / "m.json")
    assert_one_error_line(result, "--weights", named, code=2)
    assert not (tmp_path / "m.json").exists()


def test_weights_on_a_column_not_segmented_is_an_error_naming_it(tmp_path, blobs_db_copy):
    result = run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,b", "--k", 3, "--weights", "c=2", "-o", tmp_path / "m.json")
    assert_one_error_line(result, "weights", "c")


# ----------------------------------------------------------------------------- label


def test_label_view_segments_agree_with_the_blob_truth(blobs_db_copy, model_file):
    result = run_cli("label", blobs_db_copy, "--table", "points", "--model", model_file, "--into", "v")
    assert result.exit_code == 0, result.output
    assert result.stdout.strip() == "view v"
    assert "[tillite] label:" in result.stderr
    assert relation_kind(blobs_db_copy, "v") == "VIEW"
    got = fetch(blobs_db_copy, 'SELECT "truth", "segment", "distance" FROM "v"')
    assert len(got["segment"]) == 3_000
    # reference: scikit-learn adjusted_rand_score against make_blobs' generating labels
    assert adjusted_rand_score(got["truth"], got["segment"]) >= 0.99
    assert (got["distance"] >= 0).all()


def test_label_materialize_makes_a_table(blobs_db_copy, model_file):
    result = run_cli("label", blobs_db_copy, "-t", "points", "-m", model_file, "--into", "labelled", "--materialize", "-q")
    assert result.exit_code == 0, result.output
    assert result.stdout.strip() == "table labelled" and result.stderr == ""
    assert relation_kind(blobs_db_copy, "labelled") == "BASE TABLE"
    # reference: DuckDB count(*) of the source run directly
    assert fetch(blobs_db_copy, 'SELECT count(*) AS n FROM "labelled"')["n"][0] == fetch(blobs_db_copy, 'SELECT count(*) AS n FROM "points"')["n"][0]


def test_second_materialize_without_replace_fails_and_keeps_the_first_table(blobs_db_copy, model_file):
    assert run_cli("label", blobs_db_copy, "-t", "points", "-m", model_file, "--into", "labelled", "--materialize").exit_code == 0
    before = fingerprint(blobs_db_copy, "labelled")
    result = run_cli("label", blobs_db_copy, "-t", "points", "-m", model_file, "--into", "labelled", "--materialize")
    assert_one_error_line(result, "labelled", "already exists", "--replace")
    assert fingerprint(blobs_db_copy, "labelled") == before
    again = run_cli("label", blobs_db_copy, "-t", "points", "-m", model_file, "--into", "labelled", "--materialize", "--replace")
    assert again.exit_code == 0, again.output
    assert fingerprint(blobs_db_copy, "labelled") == before  # same model, same rows


@pytest.mark.parametrize("into", ["points", "main.points"])
def test_label_into_the_source_name_is_refused_and_the_source_is_unchanged(blobs_db_copy, model_file, into):
    before = fingerprint(blobs_db_copy, "points")
    for extra in ([], ["--materialize"], ["--materialize", "--replace"]):
        result = run_cli("label", blobs_db_copy, "-t", "points", "-m", model_file, "--into", into, *extra)
        assert_one_error_line(result, into, "source")
    assert fingerprint(blobs_db_copy, "points") == before


def test_label_into_the_source_name_in_other_letter_case_is_refused(blobs_db_copy, model_file):
    before = fingerprint(blobs_db_copy, "points")
    result = run_cli("label", blobs_db_copy, "-t", "points", "-m", model_file, "--into", "POINTS", "--materialize")
    assert result.exit_code == 1
    assert fingerprint(blobs_db_copy, "points") == before


# ----------------------------------------------------------------------------- show


def test_show_prints_the_segment_table_of_a_model_file(model_file):
    result = run_cli("show", model_file)
    assert result.exit_code == 0, result.output
    assert "source: points" in result.stdout and "k=3" in result.stdout
    assert "centroids in original units" in result.stdout


def test_show_json_matches_the_model_file(model_file):
    result = run_cli("show", "--json", model_file)
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    doc = json.loads(Path(model_file).read_text())
    assert [s["size"] for s in summary["segments"]] == doc["sizes"]
    assert [list(s["centroid"].values()) for s in summary["segments"]] == doc["centroids"]
    assert summary["sse"] == doc["sse"]


def test_show_prints_round_off_in_a_centroid_as_zero(tmp_path, model_file):
    doc = json.loads(Path(model_file).read_text())
    doc["centroids"][0][0] = 3.5e-14  # centre + c * scale can land here for a column that is exactly 0
    path = tmp_path / "m.json"
    path.write_text(json.dumps(doc))
    result = run_cli("show", path)
    assert result.exit_code == 0, result.output
    assert "e-14" not in result.stdout


@pytest.mark.parametrize(
    "content,needle",
    [
        (None, "No such file"),
        ('{"a": 1}', "not a tillite model"),
        ('{"format": "other-tool", "a": 1}', "not a tillite model"),
        ("[1, 2]", "not a tillite model"),
        ("not json {", "not valid JSON"),
        (b"\x88\x00\xff binary", "not text"),
        ('{"format": "tillite-model", "version": "one"}', "version"),
        ('{"format": "tillite-model", "version": 1, "columns": ["a"], "center": [0], "scale": [1], "centroids_scaled": [[0]]}', "lacks"),
    ],
    ids=["missing", "other-json", "other-format", "json-list", "not-json", "binary", "bad-version", "incomplete"],
)
def test_show_on_a_file_that_is_not_a_model_is_a_one_line_error_naming_it(tmp_path, content, needle):
    path = tmp_path / "thing.json"
    if isinstance(content, bytes):
        path.write_bytes(content)
    elif content is not None:
        path.write_text(content)
    assert_one_error_line(run_cli("show", path), str(path), needle)


def test_show_on_a_damaged_model_names_what_is_wrong(tmp_path, model_file):
    doc = json.loads(Path(model_file).read_text())
    doc["centroids_scaled"][1] = doc["centroids_scaled"][1][:2]
    path = tmp_path / "m.json"
    path.write_text(json.dumps(doc))
    assert_one_error_line(run_cli("show", path), str(path), "centroids_scaled")
    assert_one_error_line(run_cli("label", "whatever.duckdb", "-m", path, "--into", "v"), str(path), "damaged")


# ----------------------------------------------------------------------------- sql


def test_sql_cells_stage_with_a_model_counts_the_cells_numpy_finds(tmp_path, blobs_db_copy, blobs_3k_3d_3c):
    x, _ = blobs_3k_3d_3c
    out = tmp_path / "m.json"
    assert run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,b,c", "--k", 3, "--cell-budget", 200, "-o", out, "-q").exit_code == 0
    grid = json.loads(out.read_text())["grid"]
    result = run_cli("sql", blobs_db_copy, "--table", "points", "--model", out, "--stage", "cells")
    assert result.exit_code == 0, result.output
    (text,) = statements(result.stdout)
    got = fetch(blobs_db_copy, text)
    # reference: numpy binning of the rows on the model's grid
    axes = np.asarray(grid["axes"]) if grid["axes"] else np.eye(3)
    coords = ((x - np.asarray(grid["center"])) * np.asarray(grid["inv_scale"])) @ axes / grid["width"]
    ref_cells = len(np.unique(np.floor(coords).astype(np.int64), axis=0))
    assert len(got["n"]) == ref_cells == grid["cells"]
    assert int(got["n"].sum()) == len(x)
    # reference: numpy sums of the centred rows equal the sums of the cells' linear sums
    np.testing.assert_allclose([got[f"ls{j}"].sum() for j in range(3)], (x - np.asarray(grid["center"])).sum(axis=0), atol=1e-6)


def test_sql_cells_stage_without_a_model_runs_in_duckdb(blobs_db_copy, blobs_3k_3d_3c):
    x, _ = blobs_3k_3d_3c
    result = run_cli("sql", blobs_db_copy, "--table", "points", "--columns", "a,b,c", "--stage", "cells", "--cell-budget", 100)
    assert result.exit_code == 0, result.output
    (text,) = statements(result.stdout)
    got = fetch(blobs_db_copy, text)
    # reference: numpy row count; every row is counted in exactly one cell
    assert int(got["n"].sum()) == len(x)
    assert 1 < len(got["n"]) < len(x)


def test_sql_profile_stage_counts_the_rows_numpy_has(blobs_db_copy, blobs_3k_3d_3c):
    x, _ = blobs_3k_3d_3c
    result = run_cli("sql", blobs_db_copy, "--table", "points", "--columns", "a,b,c", "--stage", "profile")
    assert result.exit_code == 0, result.output
    count, sample = statements(result.stdout)
    # reference: numpy row count of the generated data
    assert fetch(blobs_db_copy, count)["n"][0] == len(x)
    got = fetch(blobs_db_copy, sample)
    assert len(got) == 3 and all(len(v) <= len(x) for v in got.values())


@pytest.mark.parametrize("stage", ["refine", "label"])
def test_sql_refine_and_label_stages_need_a_model(blobs_db_copy, stage):
    result = run_cli("sql", blobs_db_copy, "--table", "points", "--columns", "a,b,c", "--stage", stage)
    assert_one_error_line(result, f"--stage {stage} needs --model", code=2)


def test_sql_refine_stage_with_a_model_reproduces_the_model_sizes(blobs_db_copy, model_file):
    result = run_cli("sql", blobs_db_copy, "--table", "points", "--model", model_file, "--stage", "refine")
    assert result.exit_code == 0, result.output
    (text,) = statements(result.stdout)
    got = fetch(blobs_db_copy, text)
    sizes = dict(zip(got["segment"].tolist(), got["n"].tolist()))
    assert [sizes[i] for i in range(3)] == json.loads(Path(model_file).read_text())["sizes"]


def test_sql_label_stage_with_a_model_assigns_the_nearest_centroid(blobs_db_copy, model_file, blobs_3k_3d_3c):
    x, _ = blobs_3k_3d_3c
    result = run_cli("sql", blobs_db_copy, "--table", "points", "--model", model_file, "--stage", "label")
    assert result.exit_code == 0, result.output
    (text,) = statements(result.stdout)
    got = fetch(blobs_db_copy, f"SELECT * FROM ({text}) ORDER BY id")
    doc = json.loads(Path(model_file).read_text())
    z = (x - np.asarray(doc["center"])) / np.asarray(doc["scale"])
    d2 = ((z[:, None, :] - np.asarray(doc["centroids_scaled"])[None]) ** 2).sum(axis=2)
    # reference: numpy argmin of squared distances to the model's centroids
    np.testing.assert_array_equal(got["segment"], d2.argmin(axis=1))


def test_sql_renders_the_postgres_dialect(blobs_db_copy, model_file):
    for stage in ("cells", "refine", "label"):
        result = run_cli("sql", blobs_db_copy, "--table", "points", "--model", model_file, "--stage", stage, "--dialect", "postgres")
        assert result.exit_code == 0, result.output
        # reference: sqlglot's own PostgreSQL parser accepts every statement printed
        for text in statements(result.stdout):
            assert sqlglot.parse_one(text, read="postgres") is not None


def test_sql_unknown_dialect_is_a_usage_error_naming_it(blobs_db_copy):
    result = run_cli("sql", blobs_db_copy, "--table", "points", "--columns", "a", "--stage", "profile", "--dialect", "nosuchsql")
    assert_one_error_line(result, "--dialect", "nosuchsql", code=2)


# ----------------------------------------------------------------------------- errors


@pytest.mark.parametrize("relation, sample_rows, kind", [
    ("t", 5_000, "whole"),  # at most twice the sample: the whole table
    ("v", 100, "seeded"),  # a view: the engine's seeded TABLESAMPLE
    ("t", 100, "block"),  # a large DuckDB base table: the two-stage block sample
])
def test_sql_stage_profile_prints_the_statements_segment_runs(tmp_path, monkeypatch, relation, sample_rows, kind):
    from tillite.engines import DuckDBEngine
    from tillite.pipeline import Settings, run_profile
    from tillite.sqlgen import Source, render
    from tillite.stages import profile_sample_kind

    db = tmp_path / "p.duckdb"
    with duckdb.connect(str(db)) as con:
        con.execute("CREATE TABLE t AS SELECT (range * 7919 % 10007)::DOUBLE AS a, (range % 97)::DOUBLE AS b "
                    f"FROM range({3_000 if kind == 'whole' else 200_000})")
        con.execute("CREATE VIEW v AS SELECT * FROM t")
    printed = run_cli("sql", db, "--table", relation, "-c", "a,b", "--stage", "profile", "--seed", 7,
                      "--sample-rows", sample_rows)
    assert printed.exit_code == 0, printed.output
    # reference: the statements DuckDB is given while the profile of `segment` runs
    ran = []
    real_query = DuckDBEngine.query
    monkeypatch.setattr(DuckDBEngine, "query", lambda self, st: ran.append(st) or real_query(self, st))
    settings = Settings(k=2, seed=7, sample_rows=sample_rows)
    with DuckDBEngine(str(db), read_only=True) as engine:
        run_profile(engine, Source.of_table(relation), ["a", "b"], settings)
        assert profile_sample_kind(engine, Source.of_table(relation), int(engine.con.execute("SELECT count(*) FROM t").fetchone()[0]),
                                   settings) == kind
    ran = [st for st in ran if relation in {t.name for t in st.find_all(sqlglot.exp.Table)}]  # not the catalog or settings
    assert printed.stdout == "".join(render(st, "duckdb", pretty=True) + ";\n" for st in ran)


@pytest.mark.parametrize("source, said, other", [("postgresql://me@db.example/warehouse", "a PostgreSQL URL", "postgres"),
                                                 ("local[2]", "a Spark master URL", "spark")])
def test_engine_duckdb_with_a_url_of_another_engine_says_duckdb_cannot_open_it(source, said, other):
    res = run_cli("segment", "--engine", "duckdb", source, "--table", "t", "-c", "a", "--k", 2)
    line = assert_one_error_line(res, source, said, "--engine duckdb cannot open", f"--engine {other}")
    assert "does not exist" not in line


@pytest.mark.parametrize(
    "command",
    [
        ["segment", "{db}", "-t", "points", "-c", "a", "--k", "2", "-o", "{tmp}/m.json"],
        ["label", "{db}", "-t", "points", "-m", "{model}", "--into", "v"],
        ["sql", "{db}", "-t", "points", "-c", "a", "--stage", "cells"],
    ],
    ids=["segment", "label", "sql"],
)
def test_missing_database_file_is_an_error_and_is_not_created(tmp_path, model_file, command):
    missing = tmp_path / "nothing.duckdb"
    args = [a.format(db=missing, tmp=tmp_path, model=model_file) for a in command]
    assert_one_error_line(run_cli(*args), str(missing), "does not exist")
    assert not missing.exists()


def test_missing_table_error_lists_the_tables_there(blobs_db_copy):
    result = run_cli("segment", blobs_db_copy, "-t", "nope", "-c", "a", "--k", 2, "-q")
    last = assert_one_error_line(result, "nope", "not found")
    assert "notes" in last and "points" in last


def test_missing_column_error_lists_the_columns_there(blobs_db_copy):
    result = run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,zz", "--k", 2, "-q")
    last = assert_one_error_line(result, "zz", "not found")
    assert all(f"{n} (DOUBLE)" in last for n in NAMES) and "truth (BIGINT)" in last


def test_non_numeric_column_error_names_its_type(blobs_db_copy):
    result = run_cli("segment", blobs_db_copy, "-t", "notes", "-c", "id,note", "--k", 2, "-q")
    assert_one_error_line(result, "note", "VARCHAR")


def test_k_larger_than_the_distinct_values_is_an_error(tmp_path):
    path = write_table(tmp_path / "t.duckdb", "t", {"x": np.array([1.0, 1.0, 2.0, 2.0] * 50)})
    result = run_cli("segment", path, "-t", "t", "-c", "x", "--k", 3, "-o", tmp_path / "m.json", "-q")
    assert_one_error_line(result, "--k 3", "2 distinct")
    assert not (tmp_path / "m.json").exists()


def test_database_without_table_malformed_table_and_unwritable_model_path_are_clean_errors(tmp_path, blobs_db_copy):
    assert_one_error_line(run_cli("segment", blobs_db_copy, "-c", "a", "--k", 2), "--table", str(blobs_db_copy))
    assert_one_error_line(run_cli("segment", blobs_db_copy, "-t", "a..b", "-c", "a", "--k", 2), "--table", "a..b", code=2)
    out = tmp_path / "no" / "such" / "dir" / "m.json"
    assert_one_error_line(run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a", "--k", 2, "-o", out, "-q"), str(out))


def test_label_of_a_table_into_a_file_name_is_a_clean_error(tmp_path, blobs_db_copy, model_file):
    result = run_cli("label", blobs_db_copy, "-t", "points", "-m", model_file, "--into", "out.parquet")
    assert_one_error_line(result, "out")  # DuckDB's own line: schema "out" does not exist


# ----------------------------------------------------------------------------- files


def test_segment_reads_parquet_and_csv_files_without_table(tmp_path, data_files, blobs_3k_3d_3c):
    x, _ = blobs_3k_3d_3c
    centers = []
    for path in data_files:
        out = tmp_path / f"{path.suffix[1:]}.json"
        result = run_cli("segment", path, "--columns", "a,b,c", "--k", 3, "--out", out, "-q")
        assert result.exit_code == 0, result.output
        doc = json.loads(out.read_text())
        assert doc["rows"] == len(x) and doc["source"] == str(path)
        centers.append(doc["center"])
    # reference: numpy mean of the rows written to both files
    np.testing.assert_allclose(centers[0], x.mean(axis=0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(centers[1], x.mean(axis=0), rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("suffix", ["parquet", "csv"])
def test_label_of_a_file_writes_a_file_with_every_row(tmp_path, data_files, model_file, blobs_3k_3d_3c, suffix):
    x, _ = blobs_3k_3d_3c
    source = data_files[0] if suffix == "parquet" else data_files[1]
    out = tmp_path / f"out.{suffix}"
    result = run_cli("label", source, "--model", model_file, "--into", out)
    assert result.exit_code == 0, result.output
    assert result.stdout.strip() == f"file {out}"
    reader = "read_parquet" if suffix == "parquet" else "read_csv_auto"
    got = duckdb.sql(f"SELECT truth, segment FROM {reader}('{out}')").fetchnumpy()
    # reference: numpy row count of the data written; scikit-learn adjusted_rand_score against the truth
    assert len(got["segment"]) == len(x)
    assert adjusted_rand_score(got["truth"], got["segment"]) >= 0.99


def test_label_of_a_file_into_an_unknown_file_type_is_refused(tmp_path, data_files, model_file):
    out = tmp_path / "out.txt"
    assert_one_error_line(run_cli("label", data_files[0], "-m", model_file, "--into", out), "out.txt")
    assert not out.exists()


def test_label_of_a_file_into_the_same_file_is_refused_and_the_file_is_unchanged(tmp_path, data_files, model_file):
    source = tmp_path / "copy.parquet"
    shutil.copy(data_files[0], source)
    before = source.read_bytes()
    result = run_cli("label", source, "-m", model_file, "--into", source)
    assert source.read_bytes() == before
    assert result.exit_code == 1


def test_missing_data_file_is_an_error_naming_it(tmp_path):
    missing = tmp_path / "none.parquet"
    assert_one_error_line(run_cli("segment", missing, "-c", "a", "--k", 2), str(missing), "does not exist")


# ----------------------------------------------------------------------------- demo


def test_demo_runs_end_to_end_and_reuses_its_database(tmp_path):
    blobs_db_copy, out = tmp_path / "demo.duckdb", tmp_path / "demo.json"
    first = run_cli("demo", "--db", blobs_db_copy, "--rows", 5_000, "--days", 10, "--out", out)
    assert first.exit_code == 0, first.output
    assert "built" in first.stderr and str(blobs_db_copy) in first.stderr
    assert "rows by kind (rows) and segment (columns):" in first.stdout
    assert "statistical groupings, not diagnoses" in first.stdout
    doc = json.loads(out.read_text())
    assert doc["format"] == "tillite-model" and doc["k"] == 5
    # reference: DuckDB count(*) of the generated table, run directly
    assert doc["rows"] == fetch(blobs_db_copy, "SELECT count(*) AS n FROM meter_days")["n"][0] == 5_000
    crosstab = first.stdout.split("rows by kind (rows) and segment (columns):")[1].split("\n\n")[0]
    counts = [int(v.replace(",", "")) for ln in crosstab.strip().splitlines()[1:] for v in re.findall(r"\b[\d,]+\b", ln)]
    assert sum(counts) == 5_000
    assert "e-1" not in first.stdout  # round-off in a centroid is printed as 0

    second = run_cli("demo", "--db", blobs_db_copy, "--rows", 5_000, "--days", 10, "--out", out)
    assert second.exit_code == 0, second.output
    assert "reusing" in second.stderr and "built" not in second.stderr
    assert "statistical groupings, not diagnoses" in second.stdout


# ----------------------------------------------------------------------------- report


def test_crosstab_with_no_matching_rows_says_so_instead_of_failing():
    from tillite import report
    from tillite.engines import DuckDBEngine

    engine = DuckDBEngine(":memory:")
    try:
        engine.con.execute("CREATE TABLE l (id INT, segment INT); CREATE TABLE m (id INT, kind VARCHAR)")
        assert "no rows matched" in report.crosstab(engine, "l", "m", "id", "kind")
    finally:
        engine.close()


@pytest.mark.parametrize("dialect", ["spark", "postgres", "trino", "bigquery", "snowflake", "duckdb"])
def test_sql_without_a_source_prints_every_stage_in_any_dialect(model_file, dialect):
    import sqlglot

    for stage in ("profile", "cells", "refine", "label"):
        result = run_cli("sql", "--table", "warehouse.points", "--model", model_file, "--stage", stage, "--dialect", dialect)
        assert result.exit_code == 0, result.output
        # reference: sqlglot's own parser reads every printed statement back in that dialect
        for text in statements(result.stdout):
            assert sqlglot.parse_one(text, read=dialect) is not None
    result = run_cli("sql", "--columns", "a", "--stage", "cells")
    assert result.exit_code == 2 and "--table" in result.output


# ----------------------------------------------------------------------------- start-up

HEAVY_MODULES = ("numpy", "sqlglot", "duckdb", "psycopg", "pyspark", "scipy", "sklearn")


def imported_after(code: str) -> set[str]:
    """Top-level modules a fresh interpreter holds after running code (sys.modules is the reference)."""
    import subprocess
    import sys

    probe = code + "\nimport sys; print(' '.join(sorted({m.split('.')[0] for m in sys.modules})))"
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    return set(done.stdout.split())


def test_starting_the_command_imports_no_engine_driver_nor_numerical_library():
    loaded = imported_after("import tillite.cli")
    assert not loaded & set(HEAVY_MODULES), sorted(loaded & set(HEAVY_MODULES))


def test_show_reads_a_model_without_numpy_sqlglot_or_any_driver(model_file):
    code = f"from tillite.cli import main\nmain(['show', {str(model_file)!r}], standalone_mode=False)"
    assert not imported_after(code) & set(HEAVY_MODULES)


def test_segment_on_a_table_without_nulls_does_not_import_numpy_ma(tmp_path):
    import subprocess
    import sys

    import duckdb

    db = tmp_path / "plain.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE t AS SELECT (i % 97) / 7.0 AS a, (i % 13) * 1.5 AS b FROM range(5000) r(i)")
    con.close()
    code = (f"from tillite.cli import main\nmain(['segment', {str(db)!r}, '-t', 't', '-c', 'a,b', '--k', '3', '-q', "
            f"'-o', {str(tmp_path / 'm.json')!r}], standalone_mode=False)\nimport sys; print('numpy.ma' in sys.modules)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    # reference: sys.modules of the fresh interpreter; numpy.ma is imported only by asking np.ma (or np.unique)
    assert done.stdout.split()[-1] == "False", done.stdout


def test_the_package_still_offers_its_public_names_on_first_use():
    import tillite
    from tillite.engines import TilliteError as from_engines

    assert tillite.TilliteError is from_engines and tillite.segment.__module__ == "tillite.pipeline"
    assert imported_after("import tillite") & set(HEAVY_MODULES) == set()


def _all_commands(command, path=("tillite",)):
    yield path, command
    for name, sub in getattr(command, "commands", {}).items():
        yield from _all_commands(sub, (*path, name))


def test_every_option_of_every_command_has_help_text():
    import click

    missing = [
        (" ".join(path), opt.opts)
        for path, command in _all_commands(main)
        for opt in command.get_params(click.Context(command))
        if isinstance(opt, click.Option) and not (opt.help or "").strip()
    ]
    assert missing == []


def test_segment_options_are_the_settings_parameter_table():
    from tillite.settings import PARAMETERS

    segment_options = {p.name: p for p in main.commands["segment"].params}
    for p in PARAMETERS.values():
        if p.option_name is None:
            assert p.name not in segment_options
            continue
        opt = segment_options[p.name]
        assert p.option_name in opt.opts and opt.help == p.help
        if p.kind in ("int", "float", "str") and p.default is not None:
            assert opt.default == p.default


def test_every_settings_parameter_is_checked_with_a_message_naming_only_itself():
    from tillite.errors import ParameterError
    from tillite.settings import PARAMETERS, Settings

    for p in PARAMETERS.values():
        if not (p.choices or p.low is not None) or p.name == "k":
            continue
        bad = "nonsense" if p.choices else p.low - 1
        with pytest.raises(ParameterError) as caught:
            Settings(k=2, **{p.name: bad}).check(["a"])
        assert caught.value.parameters == (p.name,)
        assert str(caught.value).startswith(p.name + " must be")


def test_open_database_opens_a_postgresql_url_as_postgresql():
    """One opener of a database without a table (store commands, report --store, name --store)."""
    from tillite.engines import open_database
    from tillite.errors import SourceError

    with pytest.raises(SourceError, match="cannot connect to PostgreSQL"):
        open_database("postgresql://nobody@127.0.0.1:1/nothing_here?connect_timeout=2")


def test_k_auto_on_three_rows_says_why_fewer_candidates_were_compared_and_prints_no_python_lists(tmp_path):
    path = write_table(tmp_path / "three.duckdb", "t", {"a": np.array([1.0, 2.0, 5.0]), "b": np.array([2.0, 1.0, 7.0])})
    res = run_cli("segment", path, "-t", "t", "-c", "a,b", "--k", "auto", "-o", tmp_path / "m.json")
    assert res.exit_code == 0, res.output
    assert "k chosen among 1, 2 by" in res.stdout and "[1, 2]" not in res.stdout
    assert "only k = 1, 2 of the asked 1..12 compared: a k above 1 must be smaller than the 3 distinct grid cells" in res.stdout
    assert "[tillite] choose k: \n" not in res.stderr + "\n" and "nan" not in res.stderr
    k1_row = next(ln for ln in res.stderr.splitlines() if ln.strip().startswith("1 "))
    assert k1_row.split()[2] == "-"  # Calinski-Harabasz is undefined for one segment


def test_segment_minus_one_is_nameable_as_an_id_not_an_option(tmp_path, blobs_db_copy):
    out = tmp_path / "m.json"
    assert run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,b", "--k", 2, "--tree-budget", 50, "-o", out, "-q").exit_code == 0
    assert "outliers" in json.loads(out.read_text())["extras"]  # a CF tree's outlier group is segment -1
    res = run_cli("name", out, -1, "unusual", 0, "first")
    assert res.exit_code == 0, res.output
    assert '-1: "unusual"' in res.stdout
    assert json.loads(out.read_text())["names"] == {"-1": "unusual", "0": "first"}


def test_naming_segment_minus_one_of_a_model_without_it_is_refused_listing_its_ids(tmp_path, blobs_db_copy):
    out = tmp_path / "m.json"
    assert run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,b", "--k", 2, "-o", out, "-q").exit_code == 0
    before = out.read_bytes()
    assert_one_error_line(run_cli("name", out, -1, "unusual"), "segment id -1 is not in the model", "its ids are 0, 1")
    assert out.read_bytes() == before


def test_segment_json_names_the_model_file_it_wrote_even_when_quiet(tmp_path, blobs_db_copy):
    out = tmp_path / "m.json"
    res = run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,b", "--k", 2, "-o", out, "-q", "--json")
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["model_file"] == str(out) and res.stderr == ""


def test_wording_on_one_column_says_axis_and_sse_units_without_nested_brackets(tmp_path, blobs_db_copy):
    res = run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a", "--k", 2, "-o", tmp_path / "m.json")
    assert res.exit_code == 0, res.output
    assert "on 1 axis," in res.stderr and "1 axes" not in res.stderr
    assert "SSE (row level, in standard deviations):" in res.stdout


def test_several_missing_columns_are_named_in_the_plural(tmp_path, blobs_db_copy):
    res = run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,nope,nope2", "--k", 2, "-o", tmp_path / "m.json")
    assert_one_error_line(res, "columns nope, nope2 not found")


def test_into_a_missing_schema_names_into_not_a_raw_catalog_error(tmp_path, blobs_db_copy):
    out = tmp_path / "m.json"
    assert run_cli("segment", blobs_db_copy, "-t", "points", "-c", "a,b", "--k", 2, "-o", out, "-q").exit_code == 0
    res = run_cli("label", blobs_db_copy, "-t", "points", "-m", out, "--into", "missing_schema.x")
    line = assert_one_error_line(res, "--into missing_schema.x", "schema missing_schema does not exist")
    assert "Catalog Error" not in line
    assert run_cli("label", blobs_db_copy, "-t", "points", "-m", out, "--into", "main.x", "-q").exit_code == 0


def test_a_refresh_command_imports_neither_numpy_ma_nor_the_within_modules_on_a_table_with_nulls(tmp_path):
    import subprocess
    import sys

    db = tmp_path / "nulls.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE t AS SELECT i % 4 AS day, CASE WHEN i % 50 = 0 THEN NULL ELSE (i % 97) / 7.0 END AS a, "
                "(i % 13) * 1.5 AS b FROM range(4000) r(i)")
    con.close()
    assert run_cli("store", "build", db, "-t", "t", "-c", "a,b", "--partition-by", "day", "--k", "3", "-q").exit_code == 0
    con = duckdb.connect(str(db))
    con.execute("UPDATE t SET b = b + 1 WHERE day = 2")
    con.close()
    code = (f"from tillite.cli import main\nmain(['refresh', {str(db)!r}, '--store', 't', '-q'], standalone_mode=False)\n"
            "import sys; print('numpy.ma' in sys.modules, 'tillite.store_groups' in sys.modules, 'tillite.cli.report' in sys.modules)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    # reference: sys.modules of the fresh interpreter after the command
    assert "1 changed" in done.stdout and done.stdout.split()[-3:] == ["False", "False", "False"], done.stdout
