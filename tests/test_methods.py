"""Second-phase methods end to end: SQL cells -> CF tree / Ward / density / k choice -> refine -> labels."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner
from sklearn.datasets import make_blobs, make_circles, make_moons
from sklearn.metrics import adjusted_rand_score

from tillite.cli import main
from tillite.engines import DuckDBEngine
from tillite.pipeline import Settings, label, segment
from tillite.sqlgen import Source

from conftest import columns_of, write_table


def labelled(engine: DuckDBEngine, model, table: str = "t") -> dict[str, np.ndarray]:
    label(engine, Source.of_table(table), model, "labels")
    return engine.con.execute('SELECT "truth", "segment" FROM "labels"').fetchnumpy()


@pytest.mark.parametrize("maker", [make_moons, make_circles], ids=["moons", "circles"])
def test_density_segments_recover_non_convex_shapes_where_kmeans_cannot(tmp_path, maker):
    kwargs = {"noise": 0.05, "random_state": 0} if maker is make_moons else {"noise": 0.05, "factor": 0.5, "random_state": 0}
    x, y = maker(n_samples=200_000, **kwargs)
    data = columns_of(x, ["a", "b"])
    data["truth"] = y
    path = write_table(tmp_path / "shapes.duckdb", "t", data)
    engine = DuckDBEngine(str(path))
    dense = segment(engine, Source.of_table("t"), ["a", "b"], Settings(k=0, method="density"))
    got = labelled(engine, dense)
    # reference: scikit-learn adjusted_rand_score against the generating labels, rows labelled through their cell
    assert adjusted_rand_score(got["truth"], got["segment"]) >= 0.95
    assert dense.method == "density" and dense.k == 2 and dense.passes == []  # no k-means refinement
    kmeans = segment(engine, Source.of_table("t"), ["a", "b"], Settings(k=2))
    got = labelled(engine, kmeans)
    assert adjusted_rand_score(got["truth"], got["segment"]) < 0.6
    engine.close()


def test_ward_method_ends_with_refinement_and_recovers_blobs(tmp_path, blobs_30k_4d_5c):
    x, y = blobs_30k_4d_5c
    data = columns_of(x, ["a", "b", "c", "d"])
    data["truth"] = y
    engine = DuckDBEngine(str(write_table(tmp_path / "b.duckdb", "t", data)))
    model = segment(engine, Source.of_table("t"), ["a", "b", "c", "d"], Settings(k=5, method="ward"))
    assert model.method == "ward" and len(model.extras["merge_heights"]) == 30
    got = labelled(engine, model)
    # reference: scikit-learn adjusted_rand_score against make_blobs' labels
    assert adjusted_rand_score(got["truth"], got["segment"]) >= 0.99
    engine.close()


def test_cf_tree_outlier_group_is_labelled_minus_one(tmp_path):
    x, y = make_blobs(n_samples=60_000, centers=4, n_features=3, cluster_std=0.5, center_box=(-15, 15), random_state=8)
    far = np.random.default_rng(1).uniform(40, 60, size=(30, 3)) * np.array([1, -1, 1])
    data = columns_of(np.vstack([x, far]), ["a", "b", "c"])
    data["truth"] = np.concatenate([y, np.full(30, -1)])
    engine = DuckDBEngine(str(write_table(tmp_path / "o.duckdb", "t", data)))
    model = segment(engine, Source.of_table("t"), ["a", "b", "c"], Settings(k=4, cell_budget=20_000, tree_budget=1_000))
    assert model.params["tree"]["entries"] <= 1_000
    outliers = model.extras["outliers"]
    got = labelled(engine, model)
    seg = np.asarray(got["segment"])
    assert (seg == -1).sum() == outliers["rows"] > 0
    # the planted far points are in the outlier group
    assert (seg[np.asarray(got["truth"]) == -1] == -1).all()
    inliers = seg >= 0
    # reference: scikit-learn adjusted_rand_score on the rows kept
    assert adjusted_rand_score(np.asarray(got["truth"])[inliers], seg[inliers]) >= 0.99
    kept = segment(engine, Source.of_table("t"), ["a", "b", "c"], Settings(k=4, tree_budget=1_000, keep_outliers=True))
    assert "outliers" not in kept.extras or kept.extras["outliers"]["rows"] == 0
    engine.close()


def test_k_range_is_chosen_on_cfs_and_recorded(tmp_path):
    x, y = make_blobs(n_samples=40_000, centers=5, n_features=4, cluster_std=0.6, center_box=(-15, 15), random_state=11)
    engine = DuckDBEngine(str(write_table(tmp_path / "k.duckdb", "t", columns_of(x, ["a", "b", "c", "d"]))))
    model = segment(engine, Source.of_table("t"), ["a", "b", "c", "d"], Settings(k=0, k_candidates=tuple(range(2, 10))))
    assert model.k == 5 and model.params["k_choice"]["k"] == 5
    assert [r["k"] for r in model.params["k_choice"]["table"]] == list(range(2, 10))
    engine.close()


def test_cli_method_options_reach_the_model_and_show_prints_the_cut(tmp_path, blobs_30k_4d_5c):
    x, _ = blobs_30k_4d_5c
    db = write_table(tmp_path / "c.duckdb", "t", columns_of(x, ["a", "b", "c", "d"]))
    out = tmp_path / "m.json"
    runner = CliRunner()
    res = runner.invoke(main, ["segment", str(db), "-t", "t", "-c", "a,b,c,d", "--k", "5", "--method", "ward", "-q", "-o", str(out)])
    assert res.exit_code == 0, res.output
    assert json.loads(out.read_text())["method"] == "ward"
    shown = runner.invoke(main, ["show", str(out)])
    assert "Ward merge heights" in shown.output and "sharp cut" in shown.output
    res = runner.invoke(main, ["segment", str(db), "-t", "t", "-c", "a,b,c,d", "--k", "auto", "-o", str(out)])
    assert res.exit_code == 0 and "Calinski-Harabasz" in res.stderr and json.loads(out.read_text())["k"] == 5
    res = runner.invoke(main, ["segment", str(db), "-t", "t", "-c", "a,b", "--k", "two"])
    assert res.exit_code == 2 and "--k" in res.output


def test_two_tree_insertion_orders_agree_after_refinement(tmp_path):
    x, y = make_blobs(n_samples=80_000, centers=5, n_features=4, cluster_std=1.0, random_state=21)
    data = columns_of(x, ["a", "b", "c", "d"])
    data["truth"] = y
    engine = DuckDBEngine(str(write_table(tmp_path / "orders.duckdb", "t", data)))
    runs = []
    for seed in (0, 1):
        settings = Settings(k=5, seed=seed, tree_budget=800, keep_outliers=True)
        model = segment(engine, Source.of_table("t"), ["a", "b", "c", "d"], settings)
        assert model.params["tree"]["entries"] <= 800
        runs.append(np.asarray(labelled(engine, model)["segment"]))
    # reference: scikit-learn adjusted_rand_score between the two seeded insertion orders, after the refine passes
    assert adjusted_rand_score(runs[0], runs[1]) >= 0.95
    engine.close()


def test_outlier_rows_are_the_rows_of_mapped_cells_whether_the_map_is_a_table_or_held(tmp_path):
    x, _ = make_blobs(n_samples=40_000, centers=4, n_features=3, cluster_std=0.6, center_box=(-12, 12), random_state=3)
    far = np.random.default_rng(2).uniform(30, 50, size=(25, 3))
    rows = np.vstack([x, far])
    engine = DuckDBEngine(str(write_table(tmp_path / "m.duckdb", "t", columns_of(rows, ["a", "b", "c"]))))
    model = segment(engine, Source.of_table("t"), ["a", "b", "c"], Settings(k=4, tree_budget=600))
    cell_map = model.cell_map_spec()
    assert cell_map is not None and cell_map.packing() is not None
    label(engine, Source.of_table("t"), model, "as_view")  # the view reads its map table
    label(engine, Source.of_table("t"), model, "as_table", materialize=True)  # map held as a temporary relation
    order = 'ORDER BY "a", "b", "c"'
    view = engine.con.execute(f'SELECT "a", "b", "c", "segment" FROM "as_view" {order}').fetchnumpy()
    table = engine.con.execute(f'SELECT "segment" FROM "as_table" {order}').fetchnumpy()
    assert engine.con.execute("SELECT count(*) FROM duckdb_views() WHERE view_name LIKE '__tillite_map%'").fetchone()[0] == 0
    np.testing.assert_array_equal(view["segment"], table["segment"])
    # reference: numpy floor of the grid coordinates (Grid.keys_of) and a Python set of the mapped cells
    mapped = set(map(tuple, cell_map.keys))
    seen = np.column_stack([view[c] for c in ("a", "b", "c")])
    in_map = np.array([tuple(k) in mapped for k in cell_map.grid.keys_of(seen)])
    np.testing.assert_array_equal(np.asarray(view["segment"]) == -1, in_map)
    # the model's sizes are the label counts (the refine pass ran through the same map)
    counts = np.bincount(np.asarray(table["segment"])[np.asarray(table["segment"]) >= 0], minlength=model.k)
    assert counts.tolist() == model.sizes
    engine.close()


def test_k_auto_on_one_gaussian_blob_keeps_one_segment_and_says_why(tmp_path):
    x, _ = make_blobs(n_samples=20_000, centers=1, n_features=3, random_state=2)  # scikit-learn: one blob
    db = write_table(tmp_path / "one.duckdb", "t", columns_of(x, ["a", "b", "c"]))
    out = tmp_path / "m.json"
    res = CliRunner().invoke(main, ["segment", str(db), "-t", "t", "-c", "a,b,c", "--k", "auto", "-o", str(out)])
    assert res.exit_code == 0, res.output
    assert json.loads(out.read_text())["k"] == 1
    assert "chosen k = 1 (one segment: its BIC" in res.stderr
    shown = CliRunner().invoke(main, ["show", str(out)])
    assert "k chosen among 1..12 by" in shown.output and "one segment" in shown.output


@pytest.mark.parametrize("k", ["10000", "2..100000"])
def test_k_far_above_the_cells_is_one_error_line_naming_k(tmp_path, blobs_30k_4d_5c, k):
    x, _ = blobs_30k_4d_5c
    db = write_table(tmp_path / "b.duckdb", "t", columns_of(x, ["a", "b", "c", "d"]))
    res = CliRunner().invoke(main, ["segment", str(db), "-t", "t", "-c", "a,b,c,d", "--k", k, "-q"])
    assert res.exit_code == 1 and "Traceback" not in res.output
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("Error:") and "--k" in lines[0] and "at most" in lines[0]


def test_ward_on_many_cells_condenses_first_without_outliers_and_show_says_so(tmp_path, blobs_30k_4d_5c, monkeypatch):
    import tillite.stages as P

    monkeypatch.setattr(P, "WARD_ENTRIES", 400)
    x, y = blobs_30k_4d_5c
    data = columns_of(x, ["a", "b", "c", "d"])
    data["truth"] = y
    engine = DuckDBEngine(str(write_table(tmp_path / "w.duckdb", "t", data)))
    model = segment(engine, Source.of_table("t"), ["a", "b", "c", "d"], Settings(k=5, method="ward"))
    assert model.params["tree"]["entries"] <= 400 and "before Ward" in model.params["tree"]["reason"]
    assert "outliers" not in model.extras or model.extras["outliers"]["rows"] == 0
    assert "condensed before Ward" in model.describe()
    got = labelled(engine, model)
    # reference: scikit-learn adjusted_rand_score against make_blobs' labels
    assert adjusted_rand_score(got["truth"], got["segment"]) >= 0.99
    engine.close()


@pytest.mark.parametrize("scale", [1e-100, 1.0])
def test_ward_on_tiny_or_constant_weighted_data_ends_without_a_traceback(tmp_path, scale):
    x, _ = make_blobs(n_samples=2000, centers=3, n_features=2, random_state=0)
    x = x * scale if scale != 1.0 else np.column_stack([np.full(2000, 5.0), 2.0 + np.arange(2000) * 1e-14])
    db = write_table(tmp_path / "tiny.duckdb", "t", columns_of(x, ["a", "b"]))
    out = tmp_path / "m.json"
    res = CliRunner().invoke(main, ["segment", str(db), "-t", "t", "-c", "a,b", "--k", "3", "--method", "ward", "-q",
                                    "-o", str(out)])
    assert "Traceback" not in res.output and not isinstance(res.exception, ZeroDivisionError)
    if res.exit_code == 0:
        shown = CliRunner().invoke(main, ["show", str(out)])
        assert shown.exit_code == 0 and "Traceback" not in shown.output
    else:
        assert res.exit_code == 1 and res.stderr.strip().splitlines()[-1].startswith("Error:")


@pytest.mark.parametrize("settings", [dict(k=4, tree_budget=300), dict(k=0, method="density")], ids=["outliers", "density"])
def test_a_label_view_reading_its_cell_map_table_equals_the_inline_map_labels_on_the_demo(tmp_path, settings):
    from tillite import sqlgen
    from tillite.demo import DEMO_COLUMNS, build_demo_database
    from tillite.pipeline import cell_map_table, check_columns

    path = tmp_path / "water.duckdb"
    build_demo_database(path, rows=20_000, days=4, seed=5)
    engine = DuckDBEngine(str(path))
    src, cols = Source.of_table("meter_days"), list(DEMO_COLUMNS)
    model = segment(engine, src, cols, Settings(**settings))
    assert model.cell_map_spec() is not None
    label(engine, src, model, "by_table")
    kept = engine.con.execute(f'SELECT count(*) FROM "{cell_map_table("by_table")}"').fetchone()[0]
    assert kept == len(model.cell_map["keys"])
    # reference: the view as labels made it before, the map inline as a VALUES list (its own statement)
    inline = sqlgen.label_select(src, cols, check_columns(engine, src, cols), model.assignment(), engine.target,
                                 cell_map=model.cell_map_spec())
    engine.execute(sqlgen.create_relation_statement("inline", inline, materialize=False))
    order = 'ORDER BY "meter_id", "day"'
    got = engine.con.execute(f'SELECT "segment", "distance" FROM "by_table" {order}').fetchnumpy()
    ref = engine.con.execute(f'SELECT "segment", "distance" FROM "inline" {order}').fetchnumpy()
    np.testing.assert_array_equal(got["segment"], ref["segment"])
    np.testing.assert_array_equal(np.ma.getmaskarray(got["distance"]), np.ma.getmaskarray(ref["distance"]))
    np.testing.assert_array_equal(np.ma.filled(got["distance"], 0.0), np.ma.filled(ref["distance"], 0.0))
    if "tree_budget" in settings:  # rows of the outlier group's cells are there (density labels every row by its cell)
        assert (np.asarray(got["segment"]) == -1).any()
    engine.close()
