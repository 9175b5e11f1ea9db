"""`segment --within G --categorical C`: categorical columns segmented within each group.

Outside references: each group against tillite run on a table holding that group alone (made by a plain SQL
WHERE in DuckDB); numpy on explicitly one-hot-encoded rows of the group (z-scored numbers with numpy's mean and
population sd, indicators centred and divided by sqrt(1 - sum p^2) of the group's shares): the SSE at the
model's centroids and the nearest centroid of every row.
"""

from __future__ import annotations

import json
import re

import duckdb
import numpy as np
import pytest
from sklearn.datasets import make_blobs

from tillite.engines import DuckDBEngine
from tillite.model import Model
from tillite.pipeline import Settings, label, segment
from tillite.sqlgen import Source

from conftest import altered_copy, assert_one_error_line, run_cli as run, write_table

NUMERIC = ["a", "b"]
#: passes until Lloyd's fixed point, so the --within run and a run on a group alone end at the same centroids
SETTINGS = dict(k=6, categorical=("district",), cell_budget=500, refine_passes=30, tolerance=1e-12)
#: group -> (rows, blob centres, category choices); the two groups' categories differ
GROUPS = {
    "harbour": (6_000, [(-4.0, -4.0), (4.0, 4.0)], ["north", "south", None]),
    "dune": (4_000, [(0.0, -5.0), (5.0, 0.0)], ["north", "west", "east"]),
}
ALONE = {"harbour": "only_harbour", "dune": "only_dune"}


def grouped_mixed_data() -> dict[str, np.ndarray]:
    """Per group: 2 numeric blobs (scikit-learn make_blobs) x 3 categories, 6 clusters only both tell apart."""
    parts = []
    for i, (value, (rows, centres, choices)) in enumerate(GROUPS.items()):
        x, _ = make_blobs(n_samples=rows, centers=centres, cluster_std=1.0, random_state=10 + i)
        district = np.array(choices, dtype=object)[np.random.default_rng(i).integers(0, 3, rows)]
        parts.append((x, district, np.array([value] * rows, dtype=object)))
    x = np.vstack([p[0] for p in parts])
    return {"id": np.arange(len(x)), "a": x[:, 0], "b": x[:, 1], "district": np.concatenate([p[1] for p in parts]),
            "grp": np.concatenate([p[2] for p in parts])}


@pytest.fixture(scope="module")
def grouped_mixed_db(tmp_path_factory):
    path = tmp_path_factory.mktemp("within_cat") / "mixed.duckdb"
    write_table(path, "t", grouped_mixed_data())
    con = duckdb.connect(str(path))
    try:
        for value, table in ALONE.items():
            con.execute(f"CREATE TABLE {table} AS SELECT * FROM t WHERE grp = '{value}'")
    finally:
        con.close()
    return path


@pytest.fixture(scope="module")
def grouped_mixed_model(grouped_mixed_db) -> Model:
    with DuckDBEngine(str(grouped_mixed_db), read_only=True) as engine:
        return segment(engine, Source.of_table("t"), NUMERIC, Settings(**SETTINGS, within="grp"))


def group_rows(path, value: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    con = duckdb.connect(str(path), read_only=True)
    try:
        got = con.execute("SELECT id, a, b, district FROM t WHERE grp = ? ORDER BY id", [value]).fetchall()
    finally:
        con.close()
    return np.array([r[0] for r in got]), np.array([r[1:3] for r in got], dtype=float), np.array([r[3] for r in got], dtype=object)


def one_hot(c: np.ndarray, listed) -> np.ndarray:
    """0/1 columns: one per listed category, then "other", then NULL."""
    is_null = np.array([v is None for v in c])
    cols = [np.array([v == name for v in c], dtype=float) for name in listed]
    cols.append((~is_null & ~np.isin(c.astype(str), list(listed))).astype(float))
    cols.append(is_null.astype(float))
    return np.column_stack(cols)


def numpy_units(x: np.ndarray, c: np.ndarray, listed, centroids) -> tuple[np.ndarray, np.ndarray]:
    """The group's rows and the model's centroids (original units: means and shares) in numpy's scaled units."""
    ind = one_hot(c, listed)
    mean, sd, p = x.mean(axis=0), x.std(axis=0), ind.mean(axis=0)
    s = np.sqrt(1.0 - (p * p).sum())
    u = np.hstack([(x - mean) / sd, (ind - p) / s])
    cent = np.asarray(centroids, dtype=float)
    return u, np.hstack([(cent[:, :2] - mean) / sd, (cent[:, 2:] - p) / s])


def by_column_name(model_columns, centroids, columns) -> np.ndarray:
    """Centroid rows with the columns in ``columns``' order, the rows sorted."""
    where = {c: j for j, c in enumerate(model_columns)}
    c = np.asarray(centroids, dtype=float)[:, [where[n] for n in columns]]
    return c[np.lexsort(c.T[::-1])]


def labels_by_id(path, model: Model, tmp_path) -> dict[int, tuple[str, int]]:
    copy = tmp_path / "labels.duckdb"
    copy.write_bytes(path.read_bytes())
    with DuckDBEngine(str(copy)) as engine:
        label(engine, Source.of_table("t"), model, "labels")
    con = duckdb.connect(str(copy), read_only=True)
    try:
        return {i: (g, s) for i, g, s in con.execute("SELECT id, grp, segment FROM labels").fetchall()}
    finally:
        con.close()


def test_each_group_equals_a_categorical_run_on_that_group_alone(grouped_mixed_db, grouped_mixed_model):
    groups = {g["name"]: g for g in grouped_mixed_model.within["groups"]}
    assert set(groups) == set(ALONE)
    assert any(g["passes"] for g in groups.values())  # the refine passes ran
    for name, table in ALONE.items():
        with DuckDBEngine(str(grouped_mixed_db), read_only=True) as engine:
            alone = segment(engine, Source.of_table(table), NUMERIC, Settings(**SETTINGS))
        g = groups[name]
        # outside reference: tillite --categorical on a table holding only this group (SQL WHERE in DuckDB); the
        # group's indicators include the categories of the other group (0 on every row, adding no distance)
        assert sorted(g["sizes"]) == sorted(alone.sizes)
        np.testing.assert_allclose(by_column_name(grouped_mixed_model.columns, g["centroids"], alone.columns),
                                   by_column_name(alone.columns, alone.centroids, alone.columns), rtol=1e-6, atol=1e-6)
        assert g["sse"] == pytest.approx(alone.sse, rel=1e-6)


def test_each_group_sse_and_labels_equal_numpy_on_one_hot_scaled_rows(grouped_mixed_db, grouped_mixed_model, tmp_path):
    listed = grouped_mixed_model.categorical[0]["values"]
    assert set(listed) == {"north", "south", "west", "east"}  # listed once, from the whole table
    labels = labels_by_id(grouped_mixed_db, grouped_mixed_model, tmp_path)
    for g in grouped_mixed_model.within["groups"]:
        ids, x, c = group_rows(grouped_mixed_db, g["value"])
        u, cent = numpy_units(x, c, listed, g["centroids"])
        seg = np.array([labels[i][1] for i in ids])
        assert all(labels[i][0] == g["value"] for i in ids)
        # outside reference: numpy's SSE of the same assignment on explicitly one-hot-encoded, scaled rows
        assert g["sse"] == pytest.approx(float(((u - cent[seg]) ** 2).sum()), rel=1e-9)
        # outside reference: numpy's nearest centroid of every one-hot row
        nearest = (((u[:, None, :] - cent[None, :, :]) ** 2).sum(axis=2)).argmin(axis=1)
        assert (seg == nearest).all()
        assert np.bincount(seg, minlength=g["k"]).tolist() == g["sizes"]


def test_scoring_macros_take_the_group_and_the_category_and_equal_the_labels(grouped_mixed_db, grouped_mixed_model, tmp_path):
    from tillite import macros as M

    copy = tmp_path / "macros.duckdb"
    copy.write_bytes(grouped_mixed_db.read_bytes())
    with DuckDBEngine(str(copy)) as engine:
        label(engine, Source.of_table("t"), grouped_mixed_model, "labels")
    assert M.scoring_arguments(grouped_mixed_model) == ["grp", "a", "b", "district"]
    M.install_into(copy, M.scoring_macros(grouped_mixed_model, "mixed"))
    con = duckdb.connect(str(copy), read_only=True)
    try:
        # reference: the label view, computed by another statement form (the per-group join)
        differ = con.execute("SELECT count(*) FROM labels WHERE mixed_segment(grp, a, b, district) IS DISTINCT FROM segment "
                             "OR abs(mixed_distance(grp, a, b, district) - distance) > 1e-9 * (1 + distance)").fetchone()[0]
    finally:
        con.close()
    assert differ == 0


def test_show_json_and_the_model_file_give_category_shares_per_segment_per_group(grouped_mixed_db, tmp_path):
    out = tmp_path / "m.json"
    result = run("segment", grouped_mixed_db, "-t", "t", "-c", "a,b", "--categorical", "district", "--within", "grp",
                 "--k", 6, "-o", out, "-q")
    assert result.exit_code == 0, result.output
    model = Model.read(out)  # the model file round-trips
    assert model.categorical[0]["column"] == "district"
    shown = run("show", out).stdout
    assert "== grp = dune" in shown and "category shares per segment" in shown
    dune = shown.split("== grp = dune")[1].split("== grp")[0]
    assert "south" not in dune.split("category shares")[1].split("segments in words")[0]  # dune has no south rows
    digest = json.loads(run("show", out, "--json").stdout)
    for group in digest["groups"]:
        for seg in group["segments"]:
            shares = seg["categories"]["district"]
            # reference: shares of one column's categories sum to 1 (they are the centroid's indicator means)
            assert sum(shares.values()) == pytest.approx(1.0, abs=1e-9)


def test_within_equal_to_a_categorical_column_is_one_error_line(grouped_mixed_db):
    from conftest import assert_one_error_line

    assert_one_error_line(run("segment", grouped_mixed_db, "-t", "t", "-c", "a,b", "--categorical", "district",
                              "--within", "district", "--k", 2, "-q"), "--within district", "--categorical")


def test_sql_stage_cells_of_such_a_model_groups_by_group_and_category(grouped_mixed_db, grouped_mixed_model, tmp_path):
    path = tmp_path / "m.json"
    grouped_mixed_model.write(path)
    result = run("sql", "-t", "t", "--stage", "cells", "--model", path)
    assert result.exit_code == 0, result.output
    # reference: the statement segment ran, keyed by the group column and the category code
    assert '"grp"' in result.stdout and "GROUP BY" in result.stdout and '"district"' in result.stdout


def test_report_gives_each_group_its_category_shares_per_segment(grouped_mixed_db, grouped_mixed_model, tmp_path):
    from tillite import report as R

    labels = labels_by_id(grouped_mixed_db, grouped_mixed_model, tmp_path)
    with DuckDBEngine(str(grouped_mixed_db), read_only=True) as engine:
        content = R.report_of_model(engine, Source.of_table("t"), grouped_mixed_model)
    column = grouped_mixed_model.columns.index("district=north")
    for g in content["groups"]:
        ids, _, c = group_rows(grouped_mixed_db, g["value"])
        seg = np.array([labels[i][1] for i in ids])
        for s, profile in zip(g["report"]["segments"], g["report"]["profile"]):
            # outside reference: numpy's share of "north" among the group's rows labelled with that segment
            expected = float(np.mean(c[seg == s["segment"]] == "north"))
            assert profile["mean"][column] == pytest.approx(expected, abs=1e-9)


def test_group_with_a_tiny_spread_gets_its_own_grid_keyed_by_category_and_equals_a_run_on_it_alone(tmp_path):
    from conftest import grouped_blobs

    # the "dot" group spreads over 1e-4 of the others' range: on the shared grid it fills a cell or two per category
    data = grouped_blobs({"wide": (6_000, 3, 0.0, 1.0), "dot": (3_000, 3, 2.0, 1e-4)}, seed=20)
    data["district"] = np.array(["north", "south"], dtype=object)[np.random.default_rng(3).integers(0, 2, len(data["grp"]))]
    db = write_table(tmp_path / "dot.duckdb", "t", data)
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE only_dot AS SELECT * FROM t WHERE grp = 'dot'")
    con.close()
    settings = dict(k=6, categorical=("district",), cell_budget=2_000, refine_passes=30, tolerance=1e-12)
    seen = []
    with DuckDBEngine(str(db), read_only=True) as engine:
        model = segment(engine, Source.of_table("t"), ["a", "b", "c"], Settings(**settings, within="grp"),
                        progress=lambda stage, message: seen.append(message))
        alone = segment(engine, Source.of_table("only_dot"), ["a", "b", "c"], Settings(**settings))
    assert any("group dot" in m and "a grid of its own" in m for m in seen)
    dot = {g["name"]: g for g in model.within["groups"]}["dot"]
    assert dot["k"] == 6 and not dot["notes"]
    # outside reference: tillite --categorical on a table holding only the dot group (SQL WHERE in DuckDB)
    assert sorted(dot["sizes"]) == sorted(alone.sizes)
    np.testing.assert_allclose(by_column_name(model.columns, dot["centroids"], alone.columns),
                               by_column_name(alone.columns, alone.centroids, alone.columns), rtol=1e-6, atol=1e-9)
    assert dot["sse"] == pytest.approx(alone.sse, rel=1e-6)


@pytest.mark.parametrize("dropped, role", [("district", "categorical"), ("grp", "--within group"), ("b", "numeric")])
def test_label_and_report_on_a_table_without_a_model_column_name_it_and_the_model_file(
        grouped_mixed_db, grouped_mixed_model, tmp_path, dropped, role):
    db = altered_copy(grouped_mixed_db, tmp_path / "lacks.duckdb", f"CREATE TABLE lacks AS SELECT * EXCLUDE ({dropped}) FROM t")
    model_file = tmp_path / "wc.json"
    grouped_mixed_model.write(model_file)
    # outside reference: DuckDB's own listing of the table's columns (the dropped one is not there)
    labelled = run("label", db, "-t", "lacks", "--model", model_file, "--into", "lab")
    assert_one_error_line(labelled, f"{role} column {dropped} of model {model_file}", "not found in lacks")
    reported = run("report", db, "-t", "lacks", "--model", model_file, "-o", tmp_path / "r.html")
    assert_one_error_line(reported, f"{role} column {dropped} of model {model_file}", "not found in lacks")


def test_report_with_a_model_of_another_table_says_so_in_a_warning_line(grouped_mixed_db, grouped_mixed_model, tmp_path):
    db = altered_copy(grouped_mixed_db, tmp_path / "other.duckdb", "CREATE TABLE copied AS SELECT * FROM t")
    model_file = tmp_path / "wc.json"
    grouped_mixed_model.write(model_file)
    other = run("report", db, "-t", "copied", "--model", model_file, "-o", tmp_path / "r.html", "-q")
    same = run("report", db, "-t", "t", "--model", model_file, "-o", tmp_path / "s.html", "-q")
    assert other.exit_code == 0 and same.exit_code == 0, (other.output, same.output)
    # outside reference: the model file's own source field (t) against the table given (copied)
    warned = [ln for ln in other.stderr.splitlines() if ln.startswith("warning:")]
    assert len(warned) == 1 and "built on t, not copied" in warned[0], other.stderr
    assert not [ln for ln in same.stderr.splitlines() if ln.startswith("warning:")], same.stderr


def test_show_gives_category_shares_adding_to_100_and_group_sizes_apart_from_thousands(grouped_mixed_model, tmp_path):
    from tillite.model import whole_percents

    # outside reference: the largest remainder (Hamilton) method worked by hand: 54.5, 30.9, 14.6 -> 54, 31, 15
    assert whole_percents([0.545, 0.309, 0.146]) == [54, 31, 15]
    assert whole_percents([1, 1, 1]) == [34, 33, 33]
    model_file = tmp_path / "wc.json"
    grouped_mixed_model.write(model_file)
    shown = run("show", model_file).stdout
    share_lines = [ln for ln in shown.splitlines() if re.match(r"^  \d+ district: \d+% ", ln) and "more" not in ln]
    assert share_lines
    for line in share_lines:  # all but categories under 0.5% shown: the shares add to 100 (99 with one left out)
        shares = [int(part.split("%")[0]) for part in line.split(": ", 1)[1].split(", ")]
        assert 99 <= sum(shares) <= 100, line
    group_lines = [ln for ln in shown.splitlines() if " rows  k=" in ln]
    assert group_lines and all(" / " in ln.split("sizes ", 1)[1] for ln in group_lines if "k=1 " not in ln), group_lines
