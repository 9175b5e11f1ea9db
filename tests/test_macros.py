"""The SQL macros (`tillite macros`): a SQL console does the job with nothing but SQL.

Every macro is run through a fresh DuckDB connection that executes SQL text only
(no Python function registered).  Each correctness check names its outside
reference beside the assertion: numpy computations on the same rows, the Python
path (pipeline.run_cell_pass, segmenters.kmeans, pipeline.label) as the product's
own cross-check, and scikit-learn's make_blobs for the data.
"""

from __future__ import annotations

import csv
import io
import shutil
import stat
import subprocess
import sys
from pathlib import Path

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner
from sklearn.datasets import make_blobs

from tillite import macros as M
from tillite.cli.macros import macros as macros_group
from tillite.demo import build_demo_database
from tillite.engines import DUCKDB_STORAGE_VERSION, DuckDBEngine
from tillite.pipeline import Settings, label, run_cell_pass, segment
from tillite.segmenters import kmeans
from tillite.sqlgen import Grid, Source

from conftest import columns_of, fetch_columns, fetch_rows, write_table
from throwaway_servers import unavailable

COLS = ["a", "unit price", "c"]
DEMO_COLS = ["litres", "night_share", "peak_litres", "flow_run_hours", "zero_hours"]


# ----------------------------------------------------------------------------- helpers


def sql_list(names: list[str]) -> str:
    """A DuckDB list literal of column names (test-side SQL text, names are ours)."""
    return "[" + ", ".join("'" + n.replace("'", "''") + "'" for n in names) + "]"


def user_macros(path: Path) -> set[str]:
    """Non-internal macros and table macros in the database."""
    rows = fetch_rows(path, "SELECT function_name FROM duckdb_functions() WHERE function_type IN ('macro', 'table_macro') AND NOT internal")
    return {r[0] for r in rows}


def blob_table(tmp_path: Path, rows: int = 12_000, seed: int = 5) -> tuple[Path, np.ndarray]:
    """make_blobs (scikit-learn) data in columns a, "unit price", c; c is shifted far from 0."""
    x, _ = make_blobs(n_samples=rows, centers=5, n_features=3, cluster_std=0.8, center_box=(-10, 10), random_state=seed)
    x = x * np.array([1.0, 25.0, 0.5]) + np.array([3.0, 100.0, 1e6])
    path = write_table(tmp_path / "blobs.duckdb", "pts", columns_of(x, COLS))
    M.install_into(path, M.generic_macros())
    return path, x


def profile_of(path: Path, table: str, cols: list[str]) -> dict[str, np.ndarray]:
    return fetch_columns(path, f"SELECT * FROM tillite_profile('{table}', {sql_list(cols)})")


def cells_of(path: Path, table: str, cols: list[str], width: float) -> list[tuple]:
    return fetch_rows(path, f"SELECT cell, n, ls, ss FROM tillite_cells('{table}', {sql_list(cols)}, {width!r})")


def python_cells(path: Path, table: str, cols: list[str], mean: np.ndarray, sd: np.ndarray, width: float):
    """The Python path's cell pass on the grid the macros use (exact mean and sd, no axes)."""
    grid = Grid(center=tuple(map(float, mean)), inv_scale=tuple(map(float, 1.0 / sd)), width=width, axes=None)
    engine = DuckDBEngine(str(path), read_only=True)
    try:
        return run_cell_pass(engine, Source.of_table(table), cols, grid)
    finally:
        engine.close()


def numpy_cells(x: np.ndarray, mean: np.ndarray, sd: np.ndarray, width: float) -> dict[tuple, tuple[int, np.ndarray, np.ndarray]]:
    """Reference: numpy group sums of u = (x - mean) / sd by key floor((x - mean) * (1 / sd / width))."""
    keys = np.floor((x - mean) * ((1.0 / sd) / width)).astype(np.int64)
    u = (x - mean) * (1.0 / sd)
    uniq, inverse = np.unique(keys, axis=0, return_inverse=True)
    inverse = inverse.ravel()
    n = np.bincount(inverse)
    ls = np.column_stack([np.bincount(inverse, weights=u[:, j]) for j in range(x.shape[1])])
    ss = np.column_stack([np.bincount(inverse, weights=u[:, j] ** 2) for j in range(x.shape[1])])
    return {tuple(k): (int(n[i]), ls[i], ss[i]) for i, k in enumerate(uniq.tolist())}


def demo_labelled(tmp_path: Path):
    """The demo table (20,000 rows), segmented and labelled by the Python path, with its model."""
    path = tmp_path / "demo.duckdb"
    build_demo_database(path, rows=20_000)
    engine = DuckDBEngine(str(path))
    try:
        model = segment(engine, Source.of_table("meter_days"), DEMO_COLS, Settings(k=5))
        label(engine, Source.of_table("meter_days"), model, "labelled")
    finally:
        engine.close()
    return path, model


def run_macros_cli(*args: object):
    return CliRunner().invoke(macros_group, [str(a) for a in args])


# ----------------------------------------------------------------------------- tillite_profile


def test_profile_equals_numpy_on_usable_rows_and_counts_null_nan_inf(tmp_path):
    rng = np.random.default_rng(1)
    x = np.column_stack([rng.normal(5, 2, 3_000), rng.normal(-40, 0.3, 3_000), rng.integers(0, 50, 3_000).astype(float)])
    x[:4, 0] = np.nan
    x[4:7, 1] = np.inf
    x[7, 2] = -np.inf
    path = write_table(tmp_path / "p.duckdb", "p", columns_of(x, COLS))
    fetch_rows(path, 'INSERT INTO p VALUES (NULL, 1.0, 2.0), (NULL, NULL, 3.0)')
    M.install_into(path, M.generic_macros())
    got = profile_of(path, "p", COLS)
    usable = x[8:]
    assert list(got["column_name"]) == COLS and list(got["position"]) == [1, 2, 3]
    assert set(got["rows"]) == {3_002} and set(got["usable"]) == {len(usable)} and set(got["skipped"]) == {3_002 - len(usable)}
    # reference: numpy counts of NULL/NaN/Inf per column (the two NULL rows counted by hand)
    assert list(got["invalid"]) == [4 + 2, 3 + 1, 1]
    # reference: numpy mean, population sd, min and max of the usable rows
    np.testing.assert_allclose(got["mean"], usable.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(got["sd"], usable.std(axis=0), rtol=1e-9)
    np.testing.assert_array_equal(got["min"], usable.min(axis=0))
    np.testing.assert_array_equal(got["max"], usable.max(axis=0))


def test_profile_of_an_empty_table_lists_every_column_with_zero_rows(tmp_path):
    path = write_table(tmp_path / "e.duckdb", "e", {"a": np.zeros(0), "b": np.zeros(0)})
    M.install_into(path, M.generic_macros())
    got = fetch_rows(path, "SELECT column_name, rows, usable, mean FROM tillite_profile('e', ['b', 'a'])")
    assert got == [("b", 0, 0, None), ("a", 0, 0, None)]


# ----------------------------------------------------------------------------- tillite_cells


@pytest.mark.parametrize("width", [0.5, 0.3])
def test_cells_equal_the_python_cell_pass_and_numpy_on_the_same_grid(tmp_path, width):
    path, x = blob_table(tmp_path)
    fetch_rows(path, 'INSERT INTO pts VALUES (NULL, 1.0, 2.0), (1.0, \'nan\'::DOUBLE, 2.0), (1.0, 2.0, \'inf\'::DOUBLE)')
    prof = profile_of(path, "pts", COLS)
    mean, sd = np.asarray(prof["mean"]), np.asarray(prof["sd"])
    got = cells_of(path, "pts", COLS, width)
    sql = {tuple(cell): (n, np.array(ls), np.array(ss)) for cell, n, ls, ss in got if cell is not None}
    skipped = [n for cell, n, _, _ in got if cell is None]
    assert skipped == [3]

    # reference 1: the Python path (pipeline.run_cell_pass) on Grid(exact mean, 1/exact sd, width, no axes);
    # its CF sums are on x - center, scaled afterwards by inv_scale: the same units as u here
    cp = python_cells(path, "pts", COLS, mean, sd, width)
    py = {tuple(int(v) for v in k): (int(n), cp.cells.ls[i], cp.cells.ss[i]) for i, (k, n) in enumerate(zip(cp.keys, cp.cells.n))}
    assert cp.skipped == 3 and cp.usable == len(x)
    # reference 2: numpy group sums on the same rows
    ref = numpy_cells(x, mean, sd, width)
    assert set(sql) == set(py) == set(ref)
    for key, (n, ls, ss) in sql.items():
        for other in (py[key], ref[key]):
            assert n == other[0]
            # relative 1e-9; per-cell sums of u can be near 0, so also an absolute 1e-9 per row
            np.testing.assert_allclose(ls, other[1], rtol=1e-9, atol=1e-9 * n)
            np.testing.assert_allclose(ss, other[2], rtol=1e-9, atol=1e-9 * n)


def test_cells_follow_the_order_of_the_column_list_not_the_table(tmp_path):
    path, _ = blob_table(tmp_path, rows=2_000)
    forward = {tuple(c): (n, ls) for c, n, ls, _ in cells_of(path, "pts", COLS, 0.5)}
    backward = {tuple(c[::-1]): (n, ls[::-1]) for c, n, ls, _ in cells_of(path, "pts", COLS[::-1], 0.5)}
    # reference: the same macro with the list reversed gives the reversed keys and sums
    assert forward.keys() == backward.keys()
    for key in forward:
        assert forward[key][0] == backward[key][0]
        np.testing.assert_allclose(forward[key][1], backward[key][1], rtol=1e-12, atol=1e-12)


def test_cell_centroids_in_original_units_equal_numpy_means_of_the_cell_rows(tmp_path):
    path, x = blob_table(tmp_path, rows=3_000)
    prof = profile_of(path, "pts", COLS)
    mean, sd = np.asarray(prof["mean"]), np.asarray(prof["sd"])
    keys = np.floor((x - mean) * ((1.0 / sd) / 0.5)).astype(np.int64)
    got = fetch_rows(path, f"SELECT cell, centroid FROM tillite_cells('pts', {sql_list(COLS)}, 0.5) WHERE cell IS NOT NULL")
    for cell, centroid in got[:200]:
        rows = x[(keys == np.array(cell)).all(axis=1)]
        # reference: numpy mean of the rows in the cell
        # (compared in standard deviations: 1e-9 of the column's spread)
        np.testing.assert_allclose((np.array(centroid) - mean) / sd, (rows.mean(axis=0) - mean) / sd, rtol=1e-9, atol=1e-9)


# ----------------------------------------------------------------------------- tillite_segments


def test_segments_sse_is_within_one_percent_of_python_kmeans_on_the_same_cells(tmp_path):
    path, x = blob_table(tmp_path, rows=15_000, seed=11)
    prof = profile_of(path, "pts", COLS)
    mean, sd = np.asarray(prof["mean"]), np.asarray(prof["sd"])
    got = fetch_columns(path, f"SELECT * FROM tillite_segments('pts', {sql_list(COLS)}, 5)")
    assert list(got["segment"]) == [0, 1, 2, 3, 4]
    assert int(got["size"].sum()) == len(x) and all(got["converged"])
    # reference: the Python path's second phase (segmenters.kmeans, 10 k-means++ restarts) on the same cells
    cp = python_cells(path, "pts", COLS, mean, sd, 0.5)
    python_sse = kmeans(cp.cells, 5).sse
    assert float(got["sse"].sum()) == pytest.approx(python_sse, rel=0.01)
    # reference: numpy mean/sd scaling between the two centroid columns
    for orig, scaled in zip(got["centroid"], got["centroid_scaled"]):
        np.testing.assert_allclose((np.asarray(orig) - mean) / sd, np.asarray(scaled), rtol=1e-9, atol=1e-9)


def test_segments_of_data_shifted_by_1e9_equal_those_of_the_unshifted_data(tmp_path):
    x, _ = make_blobs(n_samples=6_000, centers=4, n_features=2, cluster_std=1.0, random_state=21)
    results = []
    for name, shift in (("near", 0.0), ("far", 1e9)):
        path = write_table(tmp_path / f"{name}.duckdb", "t", columns_of(x + shift, ["p", "q"]))
        M.install_into(path, M.generic_macros())
        results.append(fetch_columns(path, "SELECT size, sse, centroid FROM tillite_segments('t', ['p', 'q'], 4)"))
    near, far = results
    # reference: the same macro on the unshifted rows (nothing may cancel when values sit near 1e9)
    np.testing.assert_array_equal(near["size"], far["size"])
    np.testing.assert_allclose(far["sse"], near["sse"], rtol=1e-6)
    np.testing.assert_allclose(np.stack(far["centroid"]) - 1e9, np.stack(near["centroid"]), atol=1e-5)


def test_segments_iteration_cap_is_reported_and_zero_iterations_keep_the_seeds(tmp_path):
    path, _ = blob_table(tmp_path, rows=4_000)
    full = fetch_rows(path, f"SELECT sum(sse), any_value(iterations), bool_and(converged) FROM tillite_segments('pts', {sql_list(COLS)}, 4)")[0]
    none = fetch_rows(path, f"SELECT sum(sse), any_value(iterations), bool_and(converged) FROM tillite_segments('pts', {sql_list(COLS)}, 4, iterations := 0)")[0]
    assert none[1] == 0 and none[2] is False
    assert full[2] is True and 1 <= full[1] <= M.DEFAULT_ITERATIONS
    # reference: Lloyd iterations never raise the SSE of the seeding (k-means' defining property)
    assert full[0] <= none[0] * (1 + 1e-12)


def test_segments_with_k_above_the_cell_count_or_below_one_say_so(tmp_path):
    path = write_table(tmp_path / "few.duckdb", "few", {"a": np.array([0.0, 0.0, 5.0, 9.0]), "b": np.array([1.0, 1.0, 2.0, 3.0])})
    M.install_into(path, M.generic_macros())
    with pytest.raises(duckdb.Error, match="k=5 is larger than the 3 occupied cells of few"):
        fetch_rows(path, "SELECT * FROM tillite_segments('few', ['a', 'b'], 5)")
    with pytest.raises(duckdb.Error, match="k must be at least 1"):
        fetch_rows(path, "SELECT * FROM tillite_segments('few', ['a', 'b'], 0)")
    with pytest.raises(duckdb.Error, match="width must be a positive number"):
        fetch_rows(path, "SELECT * FROM tillite_cells('few', ['a', 'b'], -1)")


def test_bad_column_lists_give_messages_naming_the_columns(tmp_path):
    data = {"a": np.arange(5.0), "unit price": np.arange(5.0), "name": np.array(list("vwxyz"))}
    path = write_table(tmp_path / "bad.duckdb", "t", data)
    M.install_into(path, M.generic_macros())
    with pytest.raises(duckdb.Error, match="column\\(s\\) name of t are not numbers"):
        fetch_rows(path, "SELECT * FROM tillite_profile('t', ['a', 'name'])")
    with pytest.raises(duckdb.Error, match="given more than once"):
        fetch_rows(path, "SELECT * FROM tillite_profile('t', ['a', 'unit price', 'A'])")
    with pytest.raises(duckdb.Error, match='"nope"'):
        fetch_rows(path, "SELECT * FROM tillite_profile('t', ['a', 'nope'])")


# ----------------------------------------------------------------------------- scoring macros


def test_scoring_macros_equal_tillite_label_on_every_demo_row(tmp_path):
    path, model = demo_labelled(tmp_path)
    M.install_into(path, M.scoring_macros(model, "water"))
    args = ", ".join(DEMO_COLS)
    got = fetch_columns(path, f"SELECT segment, distance, water_segment({args}) AS s, water_distance({args}) AS d FROM labelled")
    assert len(got["segment"]) == 20_000
    label_null, macro_null = np.ma.getmaskarray(got["segment"]), np.ma.getmaskarray(got["s"])
    # reference: the Python path's label view (pipeline.label), NULLs included
    assert label_null.sum() > 0
    np.testing.assert_array_equal(macro_null, label_null)
    np.testing.assert_array_equal(np.ma.getdata(got["s"])[~label_null], np.ma.getdata(got["segment"])[~label_null])
    np.testing.assert_array_equal(np.ma.getmaskarray(got["d"]), np.ma.getmaskarray(got["distance"]))
    # distance = sqrt(best + ||u||^2) cancels near a centroid: the two SQL forms of ||u||^2 ((w s v)^2 in the
    # label view, safe at 1e-300; the macro's own form) differ by round-off of ||u||^2, hence the small atol
    np.testing.assert_allclose(np.ma.getdata(got["d"])[~label_null], np.ma.getdata(got["distance"])[~label_null], rtol=1e-12, atol=1e-12)


def test_scoring_macros_take_quoted_column_names_and_give_null_for_null_nan_inf(tmp_path):
    x, _ = make_blobs(n_samples=3_000, centers=3, n_features=2, random_state=2)
    data = {"unit price": x[:, 0], "select": x[:, 1] * 10.0, "id": np.arange(len(x))}
    path = write_table(tmp_path / "q.duckdb", "shop", data)
    fetch_rows(path, "INSERT INTO shop VALUES (NULL, 1.0, -1), ('nan'::DOUBLE, 1.0, -2), (1.0, '-inf'::DOUBLE, -3)")
    engine = DuckDBEngine(str(path))
    try:
        model = segment(engine, Source.of_table("shop"), ["unit price", "select"], Settings(k=3))
        label(engine, Source.of_table("shop"), model, "shop_labels")
    finally:
        engine.close()
    M.install_into(path, M.scoring_macros(model, "shop"))
    got = fetch_columns(
        path,
        'SELECT id, "unit price" AS p, "select" AS q, segment, shop_segment("unit price", "select") AS s,'
        ' shop_distance("unit price", "select") AS d FROM shop_labels ORDER BY id',
    )
    bad = np.asarray(got["id"]) < 0
    assert np.ma.getmaskarray(got["s"])[bad].all() and np.ma.getmaskarray(got["s"]).sum() == 3
    # reference: the Python path's label view
    np.testing.assert_array_equal(np.ma.getdata(got["s"])[~bad], np.ma.getdata(got["segment"])[~bad])
    # reference: numpy nearest centroid in the model's scaled units
    z = (np.column_stack([got["p"], got["q"]])[~bad] - np.array(model.center)) / np.array(model.scale)
    d2 = ((z[:, None, :] - np.array(model.centroids_scaled)[None]) ** 2).sum(axis=2)
    np.testing.assert_array_equal(np.ma.getdata(got["s"])[~bad], d2.argmin(axis=1))
    np.testing.assert_allclose(np.ma.getdata(got["d"])[~bad], np.sqrt(d2.min(axis=1)), rtol=1e-9, atol=1e-12)


def test_model_names_become_quoted_identifiers_and_unprintable_names_are_refused(tmp_path):
    path, model = demo_labelled(tmp_path)
    M.install_into(path, M.scoring_macros(model, 'odd "name'))
    args = ", ".join(DEMO_COLS)
    got = fetch_rows(path, f'SELECT count(*) FROM labelled WHERE "odd ""name_segment"({args}) IS NOT DISTINCT FROM segment')
    # reference: the Python path's label view
    assert got == [(20_000,)]
    for bad in ["", " water", "a\nb"]:
        with pytest.raises(M.MacroError, match="model name"):
            M.scoring_macros(model, bad)


# ----------------------------------------------------------------------------- install and remove


def test_install_twice_replaces_cleanly_and_records_each_macro_once(tmp_path):
    path, _ = blob_table(tmp_path, rows=500)
    M.install_into(path, M.generic_macros())
    rows = fetch_rows(path, "SELECT macro_name, macro_type, model_name FROM tillite_macro_registry ORDER BY macro_name")
    assert rows == sorted((name, "table", None) for name in M.GENERIC_NAMES.values())
    assert fetch_rows(path, "SELECT count(*) FROM tillite_profile('pts', ['a'])") == [(1,)]


def test_remove_drops_what_tillite_installed_and_keeps_a_user_macro_named_tillite_x(tmp_path):
    path, model = demo_labelled(tmp_path)
    fetch_rows(path, "CREATE MACRO tillite_x(a) AS a + 1")
    fetch_rows(path, "CREATE MACRO water_helper(a) AS a * 2")
    M.install_into(path, M.generic_macros())
    M.install_into(path, M.scoring_macros(model, "water"))
    assert {"water_segment", "water_distance", "tillite_cells"} <= user_macros(path)

    assert sorted(M.remove_from(path, "water")) == ["water_distance", "water_segment"]
    assert user_macros(path) == set(M.GENERIC_NAMES.values()) | {"tillite_x", "water_helper"}
    assert sorted(M.remove_from(path)) == sorted(M.GENERIC_NAMES.values())
    assert user_macros(path) == {"tillite_x", "water_helper"}
    assert fetch_rows(path, "SELECT count(*) FROM information_schema.tables WHERE table_name = 'tillite_macro_registry'") == [(0,)]
    assert fetch_rows(path, "SELECT tillite_x(1), water_helper(2)") == [(2, 4)]
    assert M.remove_from(path) == []


def test_install_into_a_missing_database_names_it_and_creates_nothing(tmp_path):
    target = tmp_path / "nowhere.duckdb"
    with pytest.raises(M.MacroError, match=f"database {target} does not exist"):
        M.install_into(target, M.generic_macros())
    assert list(tmp_path.iterdir()) == []


def test_install_into_a_read_only_database_names_it_and_leaves_it_unchanged(tmp_path):
    path, _ = blob_table(tmp_path, rows=200)
    fetch_rows(path, "SELECT 1")
    before = path.read_bytes()
    path.chmod(stat.S_IRUSR | stat.S_IRGRP | stat.S_IROTH)
    try:
        with pytest.raises(M.MacroError, match=f"database {path} is read-only"):
            M.install_into(path, M.generic_macros())
        with pytest.raises(M.MacroError, match=f"database {path} is read-only"):
            M.remove_from(path)
        assert path.read_bytes() == before
    finally:
        path.chmod(stat.S_IRUSR | stat.S_IWUSR)


def test_templates_take_only_sqlglot_rendered_values():
    with pytest.raises(M.MacroError, match="rendered SQL"):
        M.fill("SELECT {{x}}", {"x": "1; DROP TABLE t"})  # type: ignore[dict-item]
    with pytest.raises(M.MacroError, match="without a value: x"):
        M.fill("SELECT {{x}}", {})
    assert M.fill("SELECT {{x}}, {{y}}", {"x": M.identifier('a"b'), "y": M.literal("it's")}) == "SELECT \"a\"\"b\", 'it''s'"


# ----------------------------------------------------------------------------- the command


def test_cli_show_prints_sql_that_a_fresh_connection_runs(tmp_path):
    result = run_macros_cli("show")
    assert result.exit_code == 0, result.output
    con = duckdb.connect()
    try:
        con.execute(result.output)
        con.execute("CREATE TABLE t AS SELECT range::DOUBLE AS \"unit price\" FROM range(10)")
        # reference: numpy mean and population sd of 0..9
        assert con.execute("SELECT mean, sd FROM tillite_profile('t', ['unit price'])").fetchall() == [(4.5, float(np.std(np.arange(10))))]
    finally:
        con.close()


def test_cli_install_show_and_remove_a_model_and_say_what_they_did(tmp_path):
    path, model = demo_labelled(tmp_path)
    model_file = tmp_path / "model.json"
    model.write(model_file)
    shown = run_macros_cli("show", "--model", model_file, "--name", "water")
    assert shown.exit_code == 0 and 'CREATE OR REPLACE MACRO "water_segment"("litres"' in shown.output
    assert "water_distance" in shown.output

    done = run_macros_cli("install", path, "--model", model_file, "--name", "water")
    assert done.exit_code == 0, done.output
    assert f"installed into {path}: water_segment, water_distance" in done.output
    assert '"water_segment"("litres", "night_share"' in done.output
    assert run_macros_cli("install", path).exit_code == 0
    args = ", ".join(DEMO_COLS)
    # reference: the Python path's label view
    assert fetch_rows(path, f"SELECT count(*) FROM labelled WHERE water_segment({args}) IS NOT DISTINCT FROM segment") == [(20_000,)]

    gone = run_macros_cli("remove", path, "--name", "water")
    assert gone.exit_code == 0 and "removed from" in gone.output and "water_segment" in gone.output
    assert "tillite_profile" in user_macros(path) and "water_segment" not in user_macros(path)
    again = run_macros_cli("remove", path, "--name", "water")
    assert again.exit_code == 0 and "nothing removed" in again.output


def test_cli_errors_are_one_line_messages_naming_the_path(tmp_path):
    missing = tmp_path / "missing.duckdb"
    result = run_macros_cli("install", missing)
    assert result.exit_code == 1 and f"database {missing} does not exist" in result.output
    assert "Traceback" not in result.output and not missing.exists()
    assert run_macros_cli("show", "--name", "water").exit_code == 2
    assert run_macros_cli("show", "--model", tmp_path / "none.json", "--name", "w").exit_code == 1


@pytest.mark.parametrize("source, said", [("postgresql://me@db.example/warehouse", "a PostgreSQL URL"),
                                          ("spark://master:7077", "a Spark master URL")])
def test_macros_install_into_a_url_of_another_engine_says_macros_go_into_duckdb_files_only(source, said):
    result = run_macros_cli("install", source)
    assert result.exit_code == 1 and "Traceback" not in result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and source in lines[0] and said in lines[0] and "DuckDB database files only" in lines[0], lines
    assert "does not exist" not in lines[0]


# ----------------------------------------------------------------------------- a real console


def duckdb_shell() -> str | None:
    """The DuckDB command-line shell, if installed (PyPI package duckdb-cli, or on PATH)."""
    beside = Path(sys.executable).parent / "duckdb"
    if beside.exists():
        return str(beside)
    return shutil.which("duckdb")


def run_shell(shell: str, script: str, database: str = ":memory:") -> str:
    done = subprocess.run([shell, "-csv", database], input=script, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0 and not done.stderr.strip(), done.stderr
    # the shell prints its warnings (e.g. deprecated syntax) among the results on stdout
    assert "warning" not in done.stdout.lower() and "deprecat" not in done.stdout.lower(), done.stdout
    return done.stdout


def required_shell() -> str:
    """The shell, or a loud skip (a failure when CI=true: the test extra installs duckdb-cli)."""
    shell = duckdb_shell()
    if shell is None:
        unavailable("no DuckDB command-line shell (pip install duckdb-cli)")
    return shell


def test_console_shell_runs_the_shown_macros_on_sql_alone(tmp_path):
    x, _ = make_blobs(n_samples=2_000, centers=3, n_features=2, random_state=8)
    data = tmp_path / "pts.csv"
    np.savetxt(data, x, delimiter=",", header="a,unit price", comments="", fmt="%.17g")
    script = M.script(M.generic_macros()) + (
        f"CREATE TABLE pts AS SELECT * FROM read_csv('{data}');\n"
        "SELECT column_name, usable, mean, sd FROM tillite_profile('pts', ['unit price', 'a']);\n"
        "SELECT segment, size FROM tillite_segments('pts', ['a', 'unit price'], 3);\n"
    )
    out = run_shell(required_shell(), script)
    rows = list(csv.reader(io.StringIO(out)))
    profile = [r for r in rows if r and r[0] in ("unit price", "a")]
    assert [r[0] for r in profile] == ["unit price", "a"]
    # reference: numpy mean and population sd of the CSV's rows
    np.testing.assert_allclose([float(r[2]) for r in profile], x.mean(axis=0)[::-1], rtol=1e-12)
    np.testing.assert_allclose([float(r[3]) for r in profile], x.std(axis=0)[::-1], rtol=1e-9)
    sizes = [int(r[1]) for r in rows if r and r[0] in ("0", "1", "2")]
    assert sum(sizes) == 2_000


def test_console_shell_scores_rows_of_our_database_file(tmp_path):
    """The shell the registry offers (duckdb-cli, possibly older than the Python duckdb) opens our files."""
    shell = required_shell()
    path, model = demo_labelled(tmp_path)
    M.install_into(path, M.scoring_macros(model, "water"))
    args = ", ".join(DEMO_COLS)
    # run_shell also checks that the shell printed nothing on stderr (no error, no deprecation warning)
    out = run_shell(shell, f"SELECT count(*) FROM labelled WHERE water_segment({args}) IS NOT DISTINCT FROM segment;\n", str(path))
    # reference: the Python path's label view
    assert out.strip().splitlines()[-1] == "20000"


def test_console_shell_takes_the_pasted_scoring_macros_without_warnings(tmp_path):
    shell = required_shell()
    path, model = demo_labelled(tmp_path)
    pasted = M.script(M.scoring_macros(model, "water"))
    args = ", ".join(DEMO_COLS)
    # run_shell checks that stderr is empty: no error and no deprecation warning for the pasted text
    out = run_shell(shell, pasted + f"SELECT count(*) FROM labelled WHERE water_segment({args}) IS NOT DISTINCT FROM segment;\n", str(path))
    # reference: the Python path's label view
    assert out.strip().splitlines()[-1] == "20000"


def test_files_tillite_creates_open_in_the_registry_shell_and_keep_their_storage_version(tmp_path):
    """New files get DuckDB's 1.0 storage format; existing files keep theirs (DuckDB never rewrites them)."""
    shell = required_shell()
    path, _ = demo_labelled(tmp_path)
    con = duckdb.connect(str(path), read_only=True)
    try:
        tag = con.execute("SELECT tags['storage_version'] FROM duckdb_databases() WHERE database_name = current_database()").fetchone()[0]
    finally:
        con.close()
    # reference: DuckDB's own storage_version tag of the attached file
    assert tag == f"{DUCKDB_STORAGE_VERSION}+"
    assert run_shell(shell, "SELECT count(*) FROM meter_days;\n", str(path)).strip().splitlines()[-1] == "20000"


def test_templates_ship_inside_the_package_and_keep_placeholders_out_of_comments():
    folder = Path(M.__file__).parent / "sql"
    stems = {p.stem for p in folder.glob("*.sql")}
    assert stems >= set(M.GENERIC_NAMES) | {"scoring", "registry"}
    for stem in stems:
        text = M.template(stem)
        assert text.lstrip().startswith("--")
        # a placeholder in a -- comment could end the comment with a newline of its value
        assert not [line for line in text.splitlines() if "--" in line and "{{" in line.split("--", 1)[1]]


def test_an_existing_file_read_for_segmenting_is_not_rewritten_in_another_storage_format(tmp_path):
    import hashlib

    from tillite.engines import open_source

    x, _ = make_blobs(n_samples=3_000, centers=3, n_features=2, random_state=3)
    path = write_table(tmp_path / "v2.duckdb", "pts", {"a": x[:, 0], "b": x[:, 1]})  # the Python duckdb's own default format

    def state() -> tuple[str, int]:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest(), Path(path).stat().st_mtime_ns

    before = state()
    engine, src = open_source(str(path), "pts")
    try:
        segment(engine, src, ["a", "b"], Settings(k=3))
    finally:
        engine.close()
    # reference: the file's bytes (sha256) and modification time, as the file system reports them
    assert state() == before
