"""Categorical columns (``--categorical``): indicators of the top categories, checked against numpy on
explicitly one-hot-encoded, scaled rows and against scikit-learn."""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner
from sklearn.cluster import KMeans
from sklearn.metrics import adjusted_rand_score

from tillite import categorical as cat
from tillite.cli import main
from tillite.engines import open_source
from tillite.model import Model
from tillite.pipeline import Settings, label, segment

from conftest import (
    assert_one_error_line, centroids_in_numpy_units, mixed_data, one_hot_scaled, sse_at_centroids, write_table,
)

@pytest.fixture(scope="module")
def mixed_db(tmp_path_factory):
    x, c, truth = mixed_data()
    path = tmp_path_factory.mktemp("cat") / "mixed.duckdb"
    write_table(path, "t", {"id": np.arange(len(x)), "a": x[:, 0], "b": x[:, 1], "district": c, "truth": truth})
    return path


def labels_of(path, model: Model, source_table: str = "t") -> np.ndarray:
    with open_source(str(path), table=source_table, writable=True) as (engine, src):
        label(engine, src, model, "labels", replace=True)
    con = duckdb.connect(str(path), read_only=True)
    try:
        return con.execute('SELECT segment FROM labels ORDER BY id').fetchnumpy()["segment"]
    finally:
        con.close()


def run_model(path, k: int, **kw) -> Model:
    with open_source(str(path), table="t") as (engine, src):
        return segment(engine, src, ["a", "b"], Settings(k=k, categorical=("district",), **kw))


def test_sse_equals_numpy_on_one_hot_scaled_rows(mixed_db):
    x, c, _ = mixed_data()
    model = run_model(mixed_db, 6)
    listed = model.categorical[0]["values"]
    assert set(listed) == {"harbour", "north"}
    seg = labels_of(mixed_db, model)
    u = one_hot_scaled(x, c, listed)
    # outside reference: numpy's SSE of the same assignment on explicitly one-hot-encoded, scaled rows
    expected = sse_at_centroids(u, seg, centroids_in_numpy_units(model, x, c, listed), model.segment_ids())
    assert model.sse == pytest.approx(expected, rel=1e-9)
    assert np.bincount(seg, minlength=model.k).tolist() == [model.sizes[model.segment_ids().index(i)] for i in range(model.k)]


def test_categories_and_numbers_together_recover_the_clusters(mixed_db):
    _, _, truth = mixed_data()
    model = run_model(mixed_db, 6)
    seg = labels_of(mixed_db, model)
    # outside reference: scikit-learn adjusted_rand_score against the generating labels
    assert adjusted_rand_score(truth, seg) >= 0.95


def test_refined_sse_is_within_0_2_percent_of_scikit_learn_kmeans_on_the_one_hot_matrix(mixed_db):
    x, c, _ = mixed_data()
    model = run_model(mixed_db, 4)
    u = one_hot_scaled(x, c, model.categorical[0]["values"])
    # outside reference: scikit-learn KMeans(n_init=10) inertia on the same one-hot, scaled matrix
    inertia = KMeans(n_clusters=4, n_init=10, random_state=0).fit(u).inertia_
    assert model.sse <= 1.002 * inertia


def test_weight_of_a_categorical_column_scales_all_its_indicators(mixed_db):
    x, c, _ = mixed_data()
    model = run_model(mixed_db, 5, weights={"district": 0.5, "a": 2.0})
    listed = model.categorical[0]["values"]
    seg = labels_of(mixed_db, model)
    u = one_hot_scaled(x, c, listed, weights=(2.0, 1.0), cat_weight=0.5)
    cu = centroids_in_numpy_units(model, x, c, listed, weights=(2.0, 1.0), cat_weight=0.5)
    # outside reference: numpy SSE on the one-hot rows weighted by hand
    assert model.sse == pytest.approx(sse_at_centroids(u, seg, cu, model.segment_ids()), rel=1e-9)


def test_default_weight_gives_the_column_the_variance_of_one_scaled_numeric_column(mixed_db):
    x, c, _ = mixed_data()
    model = run_model(mixed_db, 2)
    u = one_hot_scaled(x, c, model.categorical[0]["values"])
    # outside reference: numpy variances; a z-scored column has variance 1, so must the column's indicators together
    assert u[:, 2:].var(axis=0).sum() == pytest.approx(1.0, rel=1e-12)
    scale = np.asarray(model.scale)
    p = np.asarray(model.center)[2:]
    assert scale[2:] == pytest.approx(np.sqrt(1 - (p * p).sum()), rel=1e-12)


def test_categories_beyond_max_count_as_other_and_unseen_values_too(tmp_path):
    rng = np.random.default_rng(3)
    n = 6_000
    x = rng.normal(size=(n, 2))
    names = np.array([f"d{i}" for i in range(6)], dtype=object)
    c = names[np.minimum(rng.geometric(0.35, n) - 1, 5)]
    path = write_table(tmp_path / "m.duckdb", "t", {"id": np.arange(n), "a": x[:, 0], "b": x[:, 1], "district": c})
    model = run_model(path, 3, max_categories=2)
    listed = model.categorical[0]["values"]
    assert listed == ["d0", "d1"]  # most rows first (counted in the sample: the whole table here)
    seg = labels_of(path, model)
    u = one_hot_scaled(x, c, listed)
    # outside reference: numpy SSE with d2..d5 as one "other" column
    assert model.sse == pytest.approx(sse_at_centroids(u, seg, centroids_in_numpy_units(model, x, c, listed), model.segment_ids()), rel=1e-9)
    # a value first seen after the build counts as "other": same segment and distance as a d5 row
    con = duckdb.connect(str(path))
    con.execute("INSERT INTO t SELECT id + 100000, a, b, 'never seen' FROM t WHERE district = 'd5' LIMIT 3")
    con.close()
    labels_of(path, model)
    con = duckdb.connect(str(path), read_only=True)
    got = con.execute("SELECT l.segment, l.distance, o.segment, o.distance FROM labels l JOIN labels o ON o.id + 100000 = l.id "
                      "WHERE l.district = 'never seen'").fetchall()
    con.close()
    assert len(got) == 3 and all(r[0] == r[2] and r[1] == pytest.approx(r[3], rel=1e-12) for r in got)


def test_only_categorical_columns_key_the_cells_by_category(tmp_path):
    c = np.array(["a"] * 500 + ["b"] * 300 + [None] * 200, dtype=object)
    path = write_table(tmp_path / "c.duckdb", "t", {"id": np.arange(len(c)), "district": c})
    with open_source(str(path), table="t") as (engine, src):
        model = segment(engine, src, [], Settings(k=3, categorical=("district",)))
    # outside reference: counting the categories by hand; each is its own segment with SSE 0
    assert sorted(model.sizes) == [200, 300, 500]
    assert model.sse == pytest.approx(0.0, abs=1e-9)
    shares = [model.category_shares(i)["district"] for i in range(3)]
    assert sorted(max(s.values()) for s in shares) == [1.0, 1.0, 1.0]


def test_show_and_json_report_category_shares(mixed_db, tmp_path):
    out = tmp_path / "m.json"
    res = CliRunner().invoke(main, ["segment", str(mixed_db), "-t", "t", "-c", "a,b", "--categorical", "district", "--k", "6",
                                    "-o", str(out), "-q", "--json"])
    assert res.exit_code == 0, res.output
    summary = json.loads(res.stdout)
    shares = summary["segments"][0]["categories"]["district"]
    assert sum(shares.values()) == pytest.approx(1.0, rel=1e-9)
    assert set(shares) == {"harbour", "north", "(other)", "(NULL)"}
    text = Model.read(out).describe()
    assert "district: 100% " in text and "category shares per segment" in text
    assert Model.read(out).categorical == json.loads(out.read_text())["categorical"]


@pytest.mark.parametrize("args, needles", [
    (["-c", "a,b", "--categorical", "district", "--max-categories", 0], ["--max-categories", "0"]),
    (["-c", "a,b", "--categorical", "district", "--max-categories", 500], ["--max-categories", "200"]),
    (["-c", "a,district", "--categorical", "district"], ["district", "--columns", "--categorical"]),
    (["-c", "a", "--categorical", "nope"], ["nope", "not found"]),
    (["-c", "a", "--categorical", "id"], ["id", "10,000", "distinct"]),
])
def test_bad_categorical_input_is_one_error_line(mixed_db, args, needles):
    res = CliRunner().invoke(main, ["segment", str(mixed_db), "-t", "t", "--k", 3, "-q", *[str(a) for a in args]])
    assert_one_error_line(res, *needles)


def test_categorical_given_twice_segments_on_both_columns(mixed_db, tmp_path):
    out = tmp_path / "two.json"
    res = CliRunner().invoke(main, ["segment", str(mixed_db), "-t", "t", "-c", "a,b", "--categorical", "district",
                                    "--categorical", "truth", "--k", "6", "-o", str(out), "-q"])
    assert res.exit_code == 0, res.output
    assert [c["column"] for c in Model.read(out).categorical] == ["district", "truth"]


@pytest.mark.parametrize("args, needles", [
    (["--categorical", "district", "--categorical", "district"], ["--categorical", "more than once", "district"]),
    (["--categorical", "district", "--weights", "district=-1"], ["--weights", "district=-1"]),
    (["--categorical", "district", "--weights", "district=nan"], ["--weights", "district=nan"]),
])
def test_bad_repeated_or_weighted_categorical_is_one_error_line_in_cli_words(mixed_db, args, needles):
    res = CliRunner().invoke(main, ["segment", str(mixed_db), "-t", "t", "-c", "a", "--k", "3", "-q", *args])
    line = assert_one_error_line(res, *needles)
    assert not any(mark in line for mark in "{}[]"), line  # no Python dict or list in the message


@pytest.mark.parametrize("value", ["", " , "], ids=["empty", "commas-only"])
def test_categorical_without_column_names_is_a_usage_error_not_ignored(mixed_db, value):
    res = CliRunner().invoke(main, ["segment", str(mixed_db), "-t", "t", "-c", "a", "--k", "3", "-q", "--categorical", value])
    assert_one_error_line(res, "--categorical", "column names", code=2)


@pytest.mark.parametrize("values", [["north"] * 50, [None] * 50], ids=["one-value", "nulls-only"])
def test_a_single_category_alone_is_one_error_line_naming_the_column_not_its_indicators(tmp_path, values):
    db = write_table(tmp_path / "one.duckdb", "t", {"a": np.arange(50.0), "district": np.array(values, dtype=object)})
    res = CliRunner().invoke(main, ["segment", str(db), "-t", "t", "--categorical", "district", "--k", "2", "-q",
                                    "-o", str(tmp_path / "m.json")])
    line = assert_one_error_line(res, "nothing to segment on", "district (one category)")
    assert "(other)" not in line and "(NULL)" not in line, line


def _damage(spec: dict, what: str) -> None:
    if what == "no-type":
        del spec["type"]
    elif what == "bad-type":
        spec["type"] = "BLOB; DROP TABLE t"
    elif what == "null-category":
        spec["values"][0] = None


@pytest.mark.parametrize("what, needles", [
    ("no-type", ["damaged", "SQL type"]),
    ("bad-type", ["damaged", "district", "not a SQL type"]),
    ("null-category", ["damaged", "district", "not text"]),
])
@pytest.mark.parametrize("command", ["show", "label", "macros"])
def test_a_damaged_categorical_field_in_the_model_file_is_one_error_line(mixed_db, tmp_path, what, needles, command):
    good = tmp_path / "good.json"
    run_model(mixed_db, 3).write(good)
    data = json.loads(good.read_text())
    _damage(data["categorical"][0], what)
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(data))
    args = {"show": ["show", bad],
            "label": ["label", mixed_db, "-t", "t", "--model", bad, "--into", "v", "-q"],
            "macros": ["macros", "install", tmp_path / "m.duckdb", "--model", bad, "--name", "w"]}[command]
    if command == "macros":
        duckdb.connect(str(tmp_path / "m.duckdb")).close()
    res = CliRunner().invoke(main, [str(a) for a in args])
    if command == "show" and what == "bad-type":
        # show writes no SQL, so it never reads the type: it prints the model; the commands that write SQL refuse it
        assert res.exit_code == 0 and "district" in res.stdout, res.output
        return
    assert_one_error_line(res, *needles)


def test_sql_stage_cells_of_a_categorical_model_prints_the_cell_pass_keyed_by_category(mixed_db, tmp_path):
    path = tmp_path / "m.json"
    model = run_model(mixed_db, 6)
    model.write(path)
    res = CliRunner().invoke(main, ["sql", str(mixed_db), "-t", "t", "--model", str(path), "--stage", "cells"])
    assert res.exit_code == 0, res.output
    with duckdb.connect(str(mixed_db), read_only=True) as con:  # the printed statement, run as a user would
        got = con.execute(f"SELECT * FROM ({res.stdout.strip().rstrip(';')})")
        columns = [d[0] for d in got.description]
        rows = got.fetchall()
    assert "q0" in columns  # keyed by the category's code, as segment's own cell pass is
    assert len(rows) == model.grid["cells"]  # the cells segment itself counted
    assert sum(row[columns.index("n")] for row in rows) == 12_000


def test_group_scale_is_the_root_of_one_minus_the_sum_of_squared_shares():
    # outside reference: the definition (Gini impurity 1 - sum p^2), worked by hand: 1 - (0.25 + 0.25) = 0.5
    assert cat.group_scale(np.array([0.5, 0.5])) == pytest.approx(np.sqrt(0.5))
    assert cat.group_scale(np.array([1.0, 0.0])) == 0.0


def test_scoring_macros_take_the_category_and_agree_with_the_labels(mixed_db, tmp_path):
    from tillite import macros as M

    path = tmp_path / "copy.duckdb"
    path.write_bytes(mixed_db.read_bytes())
    model = run_model(path, 6)
    labels_of(path, model)
    M.install_into(path, M.scoring_macros(model, "mixed"))
    con = duckdb.connect(str(path), read_only=True)
    # outside reference: the label view's own segment and distance, row by row (the two share no code path)
    differ = con.execute('SELECT count(*) FROM labels WHERE mixed_segment(a, b, district) <> segment '
                         'OR abs(mixed_distance(a, b, district) - distance) > 1e-9 * (1 + distance)').fetchone()[0]
    unseen = con.execute("SELECT mixed_segment(a, b, 'never seen') = mixed_segment(a, b, 'also new') FROM t LIMIT 5").fetchall()
    con.close()
    assert differ == 0
    assert all(r[0] for r in unseen)  # two unseen values are the same "other" category


def test_report_shows_each_category_share_per_segment(mixed_db):
    from tillite import report as R

    x, c, _ = mixed_data()
    model = run_model(mixed_db, 6)
    seg = labels_of(mixed_db, model)
    with open_source(str(mixed_db), table="t") as (engine, src):
        content = R.report_of_model(engine, src, model, ["district"])
    assert content is not None
    # outside reference: numpy share of "north" rows in each labelled segment
    name = model.categorical[0]["indicators"][model.categorical[0]["values"].index("north")]
    for i, sid in enumerate(model.segment_ids()):
        rows = seg == sid
        expected = float(np.mean([v == "north" for v in c[rows]]))
        assert model.category_shares(i)["district"]["north"] == pytest.approx(expected, abs=1e-9)
    assert name in json.dumps(content, default=str)


@pytest.mark.parametrize("sql_type, make", [
    ("INTEGER", "i % 4"),
    ("DATE", "DATE '2026-01-01' + (i % 4)::INT"),
    ("BOOLEAN", "CASE WHEN i % 4 = 3 THEN NULL ELSE i % 4 = 0 END"),
    ("VARCHAR", "CASE i % 4 WHEN 0 THEN 'O''Brien \"q\"' WHEN 1 THEN '(other)' WHEN 2 THEN 'select' ELSE NULL END"),
])
def test_categories_of_any_type_match_their_literals(tmp_path, sql_type, make):
    path = tmp_path / "types.duckdb"
    con = duckdb.connect(str(path))
    con.execute(f"CREATE TABLE t AS SELECT i AS id, CAST({make} AS {sql_type}) AS c FROM range(4000) r(i)")
    expected = sorted(n for (n,) in con.execute("SELECT count(*) FROM t GROUP BY c").fetchall())
    con.close()
    with open_source(str(path), table="t", writable=True) as (engine, src):
        model = segment(engine, src, [], Settings(k=len(expected), categorical=("c",)))
        label(engine, src, model, "labels")
        got = sorted(n for n in engine.query(__import__("sqlglot").parse_one(
            'SELECT count(*) AS n FROM labels GROUP BY segment'))["n"].tolist())
    # outside reference: DuckDB's own GROUP BY of the column; each category (NULL too) is one segment
    assert sorted(model.sizes) == expected == got
    assert model.sse == pytest.approx(0.0, abs=1e-9)



def test_a_categorical_model_does_not_depend_on_the_order_the_engine_returns_rows_in(tmp_path, monkeypatch):
    # reference: the model's own definition; a parallel GROUP BY returns its rows in any order, so the same
    # data and seed must give the same figures, to the last bit, whatever that order (here: every result
    # shuffled). The refine pass groups by (segment, category code): several rows per segment.
    from tillite.demo import build_demo_database
    from tillite.engines import DuckDBEngine

    path = tmp_path / "demo.duckdb"
    build_demo_database(path, rows=300_000, days=10, seed=7)

    def model() -> dict:
        with open_source(str(path), table="meter_days") as (engine, src):
            settings = Settings(k=3, categorical=("district",))
            return segment(engine, src, ["litres", "night_share", "zero_hours"], settings).to_dict()

    expected = model()
    plain_query = DuckDBEngine.query
    rng = np.random.default_rng(7)

    def shuffled_query(self, statement):
        got = plain_query(self, statement)
        order = rng.permutation(len(next(iter(got.values()))) if got else 0)
        return {name: values[order] for name, values in got.items()}

    monkeypatch.setattr(DuckDBEngine, "query", shuffled_query)
    got = model()
    for name in ("sse", "segment_sse", "radius", "centroids", "sizes"):
        assert got[name] == expected[name], name
    assert [p["sse"] for p in got["passes"]] == [p["sse"] for p in expected["passes"]]
