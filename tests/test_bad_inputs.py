"""Bad inputs on the command line: one error line naming the option, table, column or file at
fault, exit 1 (or click's usage exit 2), and never a Python traceback or Python spelling
(``replace=True``, ``None``) in what the user reads.

The data is scikit-learn's make_blobs; what is checked here is the command's contract, so no
outside reference is needed beyond the exit code and the message.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import duckdb
import numpy as np
import pytest
from sklearn.datasets import make_blobs


from conftest import altered_copy, assert_one_error_line, duckdb_file, run_cli, write_table


@pytest.fixture(scope="module")
def bad_inputs_db(tmp_path_factory) -> Path:
    x, _ = make_blobs(n_samples=900, centers=3, n_features=3, cluster_std=0.5, random_state=4)
    path = tmp_path_factory.mktemp("bad") / "bad.duckdb"
    write_table(path, "points", {"id": np.arange(len(x)), "a": x[:, 0], "b": x[:, 1], "c": x[:, 2], "part": np.arange(len(x)) % 3})
    write_table(path, "three", {"a": np.array([1.0, 2.0, 5.0]), "b": np.array([2.0, 3.5, 1.0])})
    write_table(path, "my.table", {"a": x[:50, 0], "b": x[:50, 1]})
    return path


@pytest.fixture(scope="module")
def model(bad_inputs_db, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("model") / "m.json"
    res = run_cli("segment", bad_inputs_db, "-t", "points", "-c", "a,b,c", "--k", 3, "-o", out, "-q")
    assert res.exit_code == 0, res.output
    return out


@pytest.fixture(scope="module")
def three_part_store_db(tmp_path_factory) -> Path:
    x, _ = make_blobs(n_samples=900, centers=3, n_features=2, cluster_std=0.5, random_state=4)
    path = tmp_path_factory.mktemp("store") / "store.duckdb"
    write_table(path, "points", {"a": x[:, 0], "b": x[:, 1], "part": np.arange(len(x)) % 3})
    res = run_cli("store", "build", path, "-t", "points", "-c", "a,b", "--partition-by", "part", "--k", 3, "-q")
    assert res.exit_code == 0, res.output
    return path


SEGMENT_CASES = [
    # (extra options, needles in the one error line)
    (["--k", 3, "--seed", -1], ["--seed", "-1"]),
    (["--k", 3, "--seed", 2**40], ["--seed"]),
    (["--k", 3, "--tree-budget", -1], ["--tree-budget", "-1"]),
    (["--k", 3, "--threshold", -1], ["--threshold", "-1"]),
    (["--k", 3, "--threshold", "nan"], ["--threshold", "nan"]),
    (["--k", 3, "--branching", 1], ["--branching", "at least 2"]),
    (["--k", 3, "--leaf-capacity", 0], ["--leaf-capacity", "at least 2"]),
    (["--k", 3, "--method", "ward", "--tree-budget", 10, "--leaf-capacity", 1], ["--leaf-capacity", "at least 2"]),
    (["--k", 3, "--tolerance", "nan"], ["--tolerance", "nan"]),
    (["--k", 3, "--tolerance", -1], ["--tolerance"]),
    (["--k", 3, "--sample-rows", 0], ["--sample-rows", "at least 2"]),
    (["--k", 3, "--cell-budget", 0], ["--cell-budget"]),
    (["--k", 3, "--refine-passes", -1], ["--refine-passes"]),
    (["--k", 3, "--restarts", 0], ["--restarts"]),
    (["--k", 3, "--width", "nan"], ["--width"]),
    (["--k", 0], ["--k", "at least 1"]),
    (["--k", -1], ["--k", "at least 1"]),
    (["--k", 3, "--weights", "a=0,b=0,c=0"], ["--weights", "0"]),
    (["--k", 3, "--weights", "a=nan"], ["--weights", "nan"]),
    (["--k", 3, "--weights", "a=-1"], ["--weights", "-1"]),
    (["--k", 3, "--weights", "a=1e300"], ["--weights", "1e+300"]),
    (["--method", "density", "--k", 5], ["--k", "--method density"]),
    (["--method", "density", "--adjacency", "distance", "--radius", "nan"], ["--radius", "nan"]),
    (["--method", "density", "--adjacency", "distance", "--radius", 0], ["--radius"]),
    (["--method", "density", "--min-count", "nan"], ["--min-count"]),
    (["--method", "density", "--min-count", -1], ["--min-count"]),
]


@pytest.mark.parametrize("options,needles", SEGMENT_CASES, ids=[" ".join(map(str, o)) for o, _ in SEGMENT_CASES])
def test_segment_option_out_of_range_is_one_error_line_naming_the_option(tmp_path, bad_inputs_db, options, needles):
    res = run_cli("segment", bad_inputs_db, "-t", "points", "-c", "a,b,c", "-o", tmp_path / "m.json", "-q", *options)
    assert_one_error_line(res, *needles)
    assert not (tmp_path / "m.json").exists()


OTHER_METHOD_CASES = [
    (["--k", 3, "--noise", "drop"], ["--noise", "--method density", "not --method kmeans"]),
    (["--k", 3, "--noise", "attach"], ["--noise", "--method density"]),  # given, even at its default, is not ignored
    (["--k", 3, "--min-count", 5], ["--min-count", "--method density"]),
    (["--k", 3, "--method", "ward", "--adjacency", "distance"], ["--adjacency", "--method density", "not --method ward"]),
    (["--method", "density", "--radius", 0.5], ["--radius", "--adjacency distance"]),
    (["--method", "density", "--k", 0], ["--k", "--method density"]),
    (["--method", "density", "--restarts", 3], ["--restarts", "--method kmeans or ward"]),
    (["--method", "density", "--k-rule", "bic"], ["--k-rule", "--method kmeans or ward"]),
    (["--method", "density", "--leaf-capacity", 10], ["--leaf-capacity", "--method kmeans or ward"]),
    (["--method", "density", "--keep-outliers"], ["--keep-outliers", "--method kmeans or ward"]),
    (["--method", "density", "--within", "part"], ["--within", "--method kmeans or ward"]),
    (["--k", 3, "--k-rule", "bic"], ["--k-rule", "--k auto", "--k 3"]),  # a fixed k leaves nothing to choose
]


@pytest.mark.parametrize("options,needles", OTHER_METHOD_CASES, ids=[" ".join(map(str, o)) for o, _ in OTHER_METHOD_CASES])
def test_an_option_of_another_method_is_refused_naming_the_option_and_its_method(tmp_path, bad_inputs_db, options, needles):
    res = run_cli("segment", bad_inputs_db, "-t", "points", "-c", "a,b,c", "-o", tmp_path / "m.json", "-q", *options)
    assert_one_error_line(res, *needles)
    assert not (tmp_path / "m.json").exists()


#: A valid value away from the default for every parameter that names its methods.
NOT_DEFAULT = {"k_rule": "bic", "n_init": 3, "tree_budget": 10, "threshold": 0.5, "branching": 3, "leaf_capacity": 3,
               "criterion": "radius", "keep_outliers": True, "min_count": 5.0, "adjacency": "distance", "radius": 0.5,
               "noise": "drop", "within": "part"}


def test_every_method_specific_parameter_is_refused_by_the_api_with_another_method():
    from tillite.errors import ParameterError
    from tillite.settings import METHODS, PARAMETERS, Settings

    specific = {n for n, p in PARAMETERS.items() if p.methods and n != "k"}
    assert specific == set(NOT_DEFAULT)  # a new method-specific parameter needs a value here
    for name, value in NOT_DEFAULT.items():
        for method in set(METHODS) - set(PARAMETERS[name].methods):
            with pytest.raises(ParameterError, match=name) as err:
                Settings(k=0 if method == "density" else 2, method=method, **{name: value}).check(["a"])
            assert "method" in err.value.parameters
    Settings(k=0, method="density", adjacency="distance", radius=0.5, noise="drop", min_count=5.0).check(["a"])


def test_k_rule_is_refused_with_a_fixed_k_and_taken_with_candidates():
    from tillite.errors import ParameterError
    from tillite.settings import Settings

    with pytest.raises(ParameterError, match="nothing to choose") as err:
        Settings(k=3, k_rule="bic").check(["a"])
    assert err.value.parameters[0] == "k_rule"
    Settings(k=0, k_candidates=(2, 3, 4), k_rule="bic").check(["a"])


def test_store_build_help_lists_only_the_methods_a_store_takes():
    res = run_cli("store", "build", "--help")
    assert res.exit_code == 0
    assert "[kmeans|ward]" in res.output and "density|" not in res.output and "|density" not in res.output


def test_store_build_with_a_negative_seed_is_one_error_line(tmp_path, bad_inputs_db):
    res = run_cli("store", "build", bad_inputs_db, "-t", "points", "-c", "a,b", "--partition-by", "part", "--k", 3, "--seed", -1,
              "--store", "s_bad", "-q")
    assert_one_error_line(res, "--seed")


REFRESH_CASES = [
    (["refresh", "{db}", "--store", "points", "--k", 0], ["--k", "at least 1"]),
    (["refresh", "{db}", "--store", "points", "--k", -1], ["--k"]),
    (["refresh", "{db}", "--store", "points", "--drift-warn", "nan"], ["--drift-warn"]),
    (["refresh", "{db}", "--store", "points", "--new-segment-shift", "nan"], ["--new-segment-shift"]),
    (["refresh", "{db}", "--store", "points", "--new-segment-shift", -1], ["--new-segment-shift", "-1"]),
    (["refresh", "{db}", "--store", "points", "--regrid", "--new-segment-shift", -1], ["--new-segment-shift"]),
    (["store", "status", "{db}", "--store", "points", "--outside-warn", "nan"], ["--outside-warn"]),
]


@pytest.mark.parametrize("args,needles", REFRESH_CASES, ids=[" ".join(map(str, a[3:])) or a[1] for a, _ in REFRESH_CASES])
def test_store_option_out_of_range_is_one_error_line_naming_the_option(three_part_store_db, args, needles):
    res = run_cli(*[str(three_part_store_db) if a == "{db}" else a for a in args])
    assert_one_error_line(res, *needles)


def _damaged(model: Path, tmp_path: Path, change) -> Path:
    data = json.loads(model.read_text())
    change(data)
    out = tmp_path / "damaged.json"
    out.write_text(json.dumps(data))  # json writes NaN as NaN, as a hand edit or another tool might
    return out


def _set(key, value):
    def change(d):
        d[key] = value
    return change


def _set_cell(key, i, j, value):
    def change(d):
        d[key][i][j] = value
    return change


def _set_item(key, i, value):
    def change(d):
        d[key][i] = value
    return change


MODEL_CASES = [
    ("scale 0", _set_item("scale", 0, 0.0), ["scale"]),
    ("scale NaN", _set_item("scale", 1, math.nan), ["scale"]),
    ("centroids_scaled NaN", _set_cell("centroids_scaled", 0, 0, math.nan), ["centroids_scaled"]),
    ("centroids NaN", _set_cell("centroids", 1, 2, math.nan), ["centroids"]),
    ("k mismatched", _set("k", 7), ["k is 7"]),
    ("duplicate ids", _set("ids", [0, 1, 1]), ["more than once"]),
    ("ids too few", _set("ids", [0, 1]), ["ids"]),
    ("negative weight", _set_item("weights", 0, -1.0), ["weights"]),
    ("grid width 0", lambda d: d["grid"].__setitem__("width", 0.0), ["grid"]),
]


@pytest.mark.parametrize("name,change,needles", MODEL_CASES, ids=[c[0] for c in MODEL_CASES])
def test_damaged_model_file_is_one_error_line_for_show_and_label(tmp_path, bad_inputs_db, model, name, change, needles):
    bad = _damaged(model, tmp_path, change)
    assert_one_error_line(run_cli("show", bad), "damaged", str(bad), *needles)
    assert_one_error_line(run_cli("label", bad_inputs_db, "-t", "points", "-m", bad, "--into", "never_made"), "damaged", *needles)


#: A value of each JSON type: the fuzz puts into a field every one its own value is not.
JSON_KINDS = {"null": None, "number": 7, "text": "x", "list": [1, "y"], "object": {"x": 1}}


def _json_kind(value) -> str:
    return {type(None): "null", bool: "number", int: "number", float: "number", str: "text", list: "list",
            dict: "object"}[type(value)]


def _model_commands(bad_inputs_db: Path, bad: Path, tmp_path: Path) -> dict[str, list]:
    """show, label and report of one model file."""
    return {"show": ["show", bad],
            "label": ["label", bad_inputs_db, "-t", "points", "-m", bad, "--into", "never_made"],
            "report": ["report", bad_inputs_db, "-t", "points", "-m", bad, "-o", tmp_path / "r.html"]}


#: Every top-level field of a model file written today (test_every_top_level_field_of_a_model_file_is_fuzzed).
MODEL_FIELDS = [
    "format", "version", "columns", "center", "scale", "weights", "scaling", "centroids", "centroids_scaled", "sizes", "sse",
    "segment_sse", "radius", "rows", "skipped", "source", "k", "method", "ids", "extras", "cell_map", "constant_columns",
    "grid", "params", "passes", "timings", "created", "names", "report_map", "within", "categorical"]


@pytest.mark.parametrize("field", MODEL_FIELDS)
def test_a_model_field_of_another_json_type_is_one_error_line_for_show_label_and_report(tmp_path, bad_inputs_db, model, field):
    data = json.loads(model.read_text())
    for kind, value in JSON_KINDS.items():
        if kind == _json_kind(data[field]):
            continue
        bad = _damaged(model, tmp_path, _set(field, value))
        for command, args in _model_commands(bad_inputs_db, bad, tmp_path).items():
            line = assert_one_error_line(run_cli(*args), str(bad), cli_words=False)
            assert field in line or "format" in line or "version" in line, (field, kind, command, line)
    assert not (tmp_path / "r.html").exists()


def test_every_top_level_field_of_a_model_file_is_fuzzed(model):
    assert sorted(MODEL_FIELDS) == sorted(json.loads(model.read_text()))


@pytest.mark.parametrize("field,value,words", [
    ("columns", [1, 2], 'field "columns" must be a list of texts (column names), got [1, 2]'),
    ("grid", "x", 'field "grid" must be an object, got "x"'),
    ("names", [1], 'field "names" must be an object of texts'),
    ("params", None, 'field "params" must be an object, got null'),
    ("rows", "x", 'field "rows" must be a whole number (a row count), got "x"'),
    ("source", 5, 'field "source" must be text'),
    ("centroids", [[1, "a", 2]] * 3, 'field "centroids" must be a list of lists of numbers'),
    ("sizes", [1, True, 3], 'field "sizes" must be a list of whole numbers'),
], ids=["columns", "grid", "names", "params", "rows", "source", "centroids", "sizes"])
def test_a_model_field_of_the_wrong_type_names_the_field_the_file_and_what_it_must_be(tmp_path, bad_inputs_db, model, field, value, words):
    bad = _damaged(model, tmp_path, _set(field, value))
    for args in _model_commands(bad_inputs_db, bad, tmp_path).values():
        assert_one_error_line(run_cli(*args), f"model file {bad}", words, cli_words=False)


def test_csv_with_only_a_header_says_it_has_no_rows(tmp_path):
    path = tmp_path / "empty.csv"
    path.write_text("a,b\n")
    res = run_cli("segment", path, "-c", "a,b", "--k", 2, "-o", tmp_path / "m.json", "-q")
    assert_one_error_line(res, "no rows", "empty.csv")


def test_dotted_table_name_is_explained_and_works_quoted(tmp_path, bad_inputs_db):
    res = run_cli("segment", bad_inputs_db, "-t", "my.table", "-c", "a,b", "--k", 2, "-o", tmp_path / "m.json", "-q")
    assert_one_error_line(res, '"my.table"', "double quotes")
    ok = run_cli("segment", bad_inputs_db, "-t", '"my.table"', "-c", "a,b", "--k", 2, "-o", tmp_path / "m.json", "-q")
    assert ok.exit_code == 0, ok.output


def test_malformed_table_without_source_is_a_usage_error_not_a_traceback():
    # issue 13: `tillite sql --table a..b -c x --stage profile` ended in a ValueError traceback
    res = run_cli("sql", "--table", "a..b", "-c", "x", "--stage", "profile")
    assert_one_error_line(res, "--table", "a..b", code=2)


def test_k_auto_on_a_three_row_table_segments_instead_of_failing(tmp_path, bad_inputs_db):
    # issue 13: Calinski-Harabasz raised ValueError for k equal to the number of cells
    res = run_cli("segment", bad_inputs_db, "-t", "three", "-c", "a,b", "--k", "auto", "-o", tmp_path / "m.json", "-q")
    assert res.exit_code == 0, res.output
    assert json.loads((tmp_path / "m.json").read_text())["k"] < 3


def test_existing_table_without_replace_names_the_option_not_the_python_parameter(tmp_path, bad_inputs_db, model):
    copy = altered_copy(bad_inputs_db, tmp_path / "copy.duckdb", "CREATE TABLE taken AS SELECT 1 AS x")
    res = run_cli("label", copy, "-t", "points", "-m", model, "--into", "taken")
    assert_one_error_line(res, "taken", "--replace")


def test_dropped_source_column_at_label_time_names_the_column(tmp_path, bad_inputs_db, model):
    copy = altered_copy(bad_inputs_db, tmp_path / "copy.duckdb", "ALTER TABLE points DROP COLUMN b", "CREATE TABLE base AS SELECT * FROM three")
    assert_one_error_line(run_cli("label", copy, "-t", "points", "-m", model, "--into", "labels"), "column b", "points")


def test_dropped_column_under_a_view_source_names_the_view(tmp_path, bad_inputs_db, model):
    copy = altered_copy(bad_inputs_db, tmp_path / "copy.duckdb", "CREATE VIEW pv AS SELECT a, b, c FROM points", "ALTER TABLE points DROP COLUMN c")
    assert_one_error_line(run_cli("label", copy, "-t", "pv", "-m", model, "--into", "labels"), "pv")


def test_into_the_table_under_a_view_source_is_refused_and_the_table_kept(tmp_path, bad_inputs_db, model):
    copy = altered_copy(bad_inputs_db, tmp_path / "copy.duckdb", "CREATE VIEW pv AS SELECT * FROM points")
    res = run_cli("label", copy, "-t", "pv", "-m", model, "--into", "points", "--replace", "--materialize")
    assert_one_error_line(res, "points", "pv")
    con = duckdb.connect(str(copy), read_only=True)
    assert con.execute("SELECT count(*) FROM points").fetchone()[0] == 900
    con.close()


def test_second_store_build_names_the_regrid_option_not_the_python_parameter(three_part_store_db):
    res = run_cli("store", "build", three_part_store_db, "-t", "points", "-c", "a,b", "--partition-by", "part", "--k", 3, "-q")
    assert_one_error_line(res, "--regrid")


@pytest.mark.parametrize("into", ["", "a..b", "s."])
def test_empty_into_name_is_a_usage_error(bad_inputs_db, model, into):
    assert_one_error_line(run_cli("label", bad_inputs_db, "-t", "points", "-m", model, "--into", into), "--into", code=2)


def test_sql_cells_stage_refuses_a_cell_budget_below_one(bad_inputs_db):
    assert_one_error_line(run_cli("sql", bad_inputs_db, "-t", "points", "-c", "a,b", "--stage", "cells", "--cell-budget", 0), "--cell-budget")


@pytest.mark.parametrize("args, needle", [
    (["segment", "x.duckdb", "-t", "t", "-c", "a", "--k", "abc"], "--k"),
    (["segment", "x.duckdb", "-t", "t", "-c", "a", "--k", "5..2"], "--k"),
    (["segment", "x.duckdb", "-t", "t", "-c", "a", "--k", "2", "--weights", "a"], "--weights"),
    (["segment", "x.duckdb", "-t", "t", "-c", "a"], "--k"),
    (["label", "x.duckdb", "--into", "v"], "--model"),
    (["sql", "--dialect", "nonsense", "--table", "t", "-c", "x", "--stage", "profile"], "--dialect"),
    (["sql", "bad.duckdb", "--table", "a..b", "-c", "x", "--stage", "profile"], "--table"),
    (["segment", "x.duckdb", "--nonsense"], "--nonsense"),
])
def test_usage_errors_are_one_error_line_naming_the_option_with_exit_2(args, needle):
    res = run_cli(*args)
    assert_one_error_line(res, needle, code=2)
    assert len(res.stderr.strip().splitlines()) == 1, res.stderr  # no Usage:/Try lines


def test_help_still_prints_usage():
    res = run_cli("segment", "--help")
    assert res.exit_code == 0 and res.output.startswith("Usage:")


def _no_python_internals(line: str) -> None:
    for internal in ("<class", "sqlglot.", "{'", "[0", "nan"):
        assert internal not in line, line


def test_unparsable_where_says_where_it_stopped_without_python_class_names(three_part_store_db):
    line = assert_one_error_line(run_cli("refresh", three_part_store_db, "--store", "points", "--where", "part >= "),
                                 "--where", "cannot parse it (line 1, col 7)")  # sqlglot: the end of the last token it read
    _no_python_internals(line)


def test_a_negative_weight_is_shown_as_column_equals_value(tmp_path, bad_inputs_db):
    res = run_cli("segment", bad_inputs_db, "-t", "points", "-c", "a,b,c", "--k", 3, "--weights", "a=-1", "-o", tmp_path / "m.json")
    _no_python_internals(assert_one_error_line(res, "--weights", "a=-1"))


def test_an_unknown_segment_id_lists_the_ids_as_plain_numbers(tmp_path, model):
    copy = tmp_path / "m.json"
    copy.write_bytes(model.read_bytes())
    _no_python_internals(assert_one_error_line(run_cli("name", copy, 7, "x"), "its ids are 0, 1, 2"))


def test_k_larger_than_the_distinct_cells_names_the_k_option(tmp_path):
    path = write_table(tmp_path / "three.duckdb", "t", {"a": np.array([1.0, 2.0, 5.0]), "b": np.array([2.0, 1.0, 7.0])})
    assert_one_error_line(run_cli("segment", path, "-t", "t", "-c", "a,b", "--k", 100000, "-q", "-o", tmp_path / "m.json"),
                          "--k 100,000 is larger than the 3 distinct grid cells")


@pytest.mark.parametrize("command", [["segment", "{src}", "-c", "a", "--k", 2],
                                     ["label", "{src}", "-m", "m.json", "--into", "out.parquet"],
                                     ["store", "build", "{src}", "-c", "a", "--k", 2, "--db", "s.duckdb"]])
def test_table_with_a_file_source_is_one_error_line_not_silently_ignored(tmp_path, command):
    src = tmp_path / "points.parquet"
    with duckdb.connect() as con:
        con.execute(f"COPY (SELECT 1.0 AS a) TO '{src}' (FORMAT parquet)")
    res = run_cli(*[str(src) if a == "{src}" else a for a in command], "--table", "points")
    assert_one_error_line(res, "--table", "file source", code=2)


@pytest.mark.parametrize("args", [[], ["store"], ["macros"]])
def test_a_group_without_a_command_still_shows_its_help_not_an_error_line(args):
    res = run_cli(*args)
    shown = res.stdout + res.stderr
    assert "Usage:" in shown and "Commands:" in shown and "Error:" not in shown


def test_sql_stage_refine_of_a_density_model_is_refused_in_one_line(bad_inputs_db, tmp_path):
    out = tmp_path / "dens.json"
    assert run_cli("segment", bad_inputs_db, "-t", "points", "-c", "a,b", "--method", "density", "-o", out, "-q").exit_code == 0
    res = run_cli("sql", bad_inputs_db, "-t", "points", "--model", out, "--stage", "refine")
    assert_one_error_line(res, "--stage refine", "density", "no refine pass")
    assert run_cli("sql", bad_inputs_db, "-t", "points", "--model", out, "--stage", "label").exit_code == 0


def test_report_by_a_missing_column_lists_the_tables_columns_not_tillites_derived_ones(bad_inputs_db, tmp_path):
    with duckdb_file(bad_inputs_db) as con:
        con.execute("CREATE OR REPLACE TABLE zoned AS SELECT *, CASE WHEN id % 2 = 0 THEN 'n' ELSE 's' END AS zone FROM points")
    out = tmp_path / "cat.json"
    assert run_cli("segment", bad_inputs_db, "-t", "zoned", "-c", "a,b", "--categorical", "zone", "--k", 2, "-o", out, "-q").exit_code == 0
    res = run_cli("report", bad_inputs_db, "-t", "zoned", "--model", out, "--by", "nosuch", "--out", tmp_path / "r.html")
    assert_one_error_line(res, "--by", "nosuch", "columns there: id, a, b, c, part, zone")
    assert "zone=" not in res.output and "__tillite" not in res.output


@pytest.mark.parametrize("into,needles", [
    ("a.b.c", ["--into a.b.c", "schema b of database a does not exist"]),
    ("a.b.c.d", ["--into a.b.c.d", "4 parts"]),
])
def test_label_into_a_missing_database_or_too_many_parts_is_one_line(bad_inputs_db, model, into, needles):
    assert_one_error_line(run_cli("label", bad_inputs_db, "-t", "points", "--model", model, "--into", into), *needles)


def test_label_into_database_schema_name_works(bad_inputs_db, model):
    res = run_cli("label", bad_inputs_db, "-t", "points", "--model", model, "--into", "bad.main.three_part_labels", "-q")
    assert res.exit_code == 0, res.output
    with duckdb_file(bad_inputs_db) as con:  # DuckDB's catalog read straight from the file
        assert con.execute("SELECT count(*) FROM main.three_part_labels").fetchone()[0] == 900
