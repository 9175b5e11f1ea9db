"""End-to-end checks of profile, cell pass, second phase, refine and label against outside references."""

from __future__ import annotations

import duckdb
import numpy as np
import pytest
from sklearn.cluster import KMeans
from sklearn.datasets import load_breast_cancer, load_wine, make_blobs
from sklearn.metrics import adjusted_rand_score

from tillite import features as F
from tillite.engines import DuckDBEngine, SourceError
from tillite.pipeline import InputError, Settings, label, run_cell_pass, run_profile, grid_for_profile, segment
from tillite.sqlgen import Source

from conftest import columns_of, write_table


def standardise(x: np.ndarray) -> np.ndarray:
    return (x - x.mean(axis=0)) / x.std(axis=0)


def view_rows(engine: DuckDBEngine, view: str, order_by: str) -> dict[str, np.ndarray]:
    return engine.con.execute(f'SELECT * FROM "{view}" ORDER BY "{order_by}"').fetchnumpy()


# ----------------------------------------------------------------------------- profile and cells


def test_model_center_and_scale_equal_numpy_mean_and_population_sd(blob_db, blobs_30k_4d_5c, open_engine):
    path, names = blob_db
    x, _ = blobs_30k_4d_5c
    model = segment(open_engine(path), Source.of_table("points"), names, Settings(k=5))
    # reference: numpy mean and population standard deviation (ddof=0) of the same rows
    np.testing.assert_allclose(model.center, x.mean(axis=0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(model.scale, x.std(axis=0), rtol=1e-9)
    assert model.rows == len(x) and model.skipped == 0


def test_cell_pass_cfs_equal_numpy_group_sums_on_the_same_cells(blob_db, blobs_30k_4d_5c, open_engine):
    path, names = blob_db
    x, _ = blobs_30k_4d_5c
    engine = open_engine(path)
    src = Source.of_table("points")
    settings = Settings(k=5, cell_budget=2_000)
    grid = grid_for_profile(run_profile(engine, src, names, settings), settings)
    cp = run_cell_pass(engine, src, names, grid)
    # reference: numpy standardisation, binning and per-cell sums of the rows
    u = (x - np.array(grid.center)) * np.array(grid.inv_scale)
    uniq, inverse = np.unique(grid.keys_of(x), axis=0, return_inverse=True)
    ref = F.from_groups(u, inverse.ravel(), len(uniq))
    order = np.lexsort(cp.keys.T[::-1])
    np.testing.assert_array_equal(cp.keys[order], uniq)
    np.testing.assert_array_equal(cp.cells.n[order], ref.n)
    np.testing.assert_allclose(cp.cells.ls[order], ref.ls, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(cp.cells.ss[order], ref.ss, rtol=1e-9, atol=1e-9)
    assert cp.usable == len(x) and cp.skipped == 0
    assert len(uniq) <= 4 * settings.cell_budget


def test_principal_axis_grid_is_used_above_six_columns_and_cfs_stay_full_width(tmp_path, open_engine):
    x, _ = make_blobs(n_samples=5_000, centers=4, n_features=9, random_state=5)
    names = [f"x{j}" for j in range(9)]
    path = write_table(tmp_path / "wide.duckdb", "wide", columns_of(x, names))
    engine = open_engine(path)
    settings = Settings(k=4, cell_budget=500)
    grid = grid_for_profile(run_profile(engine, Source.of_table("wide"), names, settings), settings)
    assert grid.dims == settings.principal_axes < 9
    cp = run_cell_pass(engine, Source.of_table("wide"), names, grid)
    assert cp.cells.d == 9
    # reference: the total CF equals numpy sums of the standardised rows
    u = (x - np.array(grid.center)) * np.array(grid.inv_scale)
    np.testing.assert_allclose(cp.cells.ls.sum(axis=0), u.sum(axis=0), rtol=1e-9, atol=1e-8)
    np.testing.assert_allclose(cp.cells.ss.sum(axis=0), (u * u).sum(axis=0), rtol=1e-9)


# ----------------------------------------------------------------------------- segments vs scikit-learn


def test_refined_sse_is_within_point_two_percent_of_sklearn_kmeans_on_blobs(blob_db, blobs_30k_4d_5c, open_engine):
    path, names = blob_db
    x, _ = blobs_30k_4d_5c
    model = segment(open_engine(path), Source.of_table("points"), names, Settings(k=5))
    # reference: scikit-learn KMeans(n_init=10) inertia on the same standardised rows
    inertia = KMeans(n_clusters=5, n_init=10, random_state=0).fit(standardise(x)).inertia_
    assert model.sse <= inertia * 1.002


def test_segments_recover_well_separated_blobs_with_ari_at_least_0_99(blob_db, blobs_30k_4d_5c, open_engine):
    path, names = blob_db
    engine = open_engine(path)
    model = segment(engine, Source.of_table("points"), names, Settings(k=5))
    label(engine, Source.of_table("points"), model, "points_labelled")
    got = engine.con.execute('SELECT "truth", "segment" FROM "points_labelled"').fetchnumpy()
    # reference: scikit-learn adjusted_rand_score against make_blobs' generating labels
    assert adjusted_rand_score(got["truth"], got["segment"]) >= 0.99


@pytest.mark.parametrize(
    "loader,k",
    [(load_wine, 3), (load_breast_cancer, 2)],
    ids=["wine", "breast_cancer"],
)
def test_refined_sse_is_within_point_two_percent_of_sklearn_on_bundled_real_data(tmp_path, open_engine, loader, k):
    data = loader()
    x = data.data
    names = [f"f{j}" for j in range(x.shape[1])]
    path = write_table(tmp_path / "real.duckdb", "real", columns_of(x, names))
    model = segment(open_engine(path), Source.of_table("real"), names, Settings(k=k, seed=1))
    # reference: scikit-learn KMeans(n_init=10) inertia on the same standardised rows
    inertia = KMeans(n_clusters=k, n_init=10, random_state=0).fit(standardise(x)).inertia_
    assert model.sse <= inertia * 1.002


def test_model_sse_equals_numpy_sse_of_the_final_partition(blob_db, blobs_30k_4d_5c, open_engine):
    path, names = blob_db
    x, _ = blobs_30k_4d_5c
    engine = open_engine(path)
    model = segment(engine, Source.of_table("points"), names, Settings(k=5))
    label(engine, Source.of_table("points"), model, "lab")
    seg = engine.con.execute('SELECT "segment" FROM "lab"').fetchnumpy()["segment"]
    z = standardise(x)
    c = np.array(model.centroids_scaled)
    # reference: numpy squared distances of each row to its labelled centroid
    row_sse = ((z - c[seg]) ** 2).sum()
    assert row_sse <= model.sse * (1 + 1e-9)
    assert row_sse == pytest.approx(model.sse, rel=1e-3)


def test_labels_equal_numpy_nearest_centroid_and_distance(blob_db, blobs_30k_4d_5c, open_engine):
    path, names = blob_db
    x, _ = blobs_30k_4d_5c
    engine = open_engine(path)
    model = segment(engine, Source.of_table("points"), names, Settings(k=5))
    label(engine, Source.of_table("points"), model, "lab")
    got = engine.con.execute('SELECT "a", "b", "c", "d", "segment", "distance" FROM "lab"').fetchnumpy()
    rows = np.column_stack([got[n] for n in names])
    z = (rows - np.array(model.center)) / np.array(model.scale)
    d2 = ((z[:, None, :] - np.array(model.centroids_scaled)[None, :, :]) ** 2).sum(axis=2)
    # reference: numpy argmin over squared distances to the model's centroids
    np.testing.assert_array_equal(got["segment"], d2.argmin(axis=1))
    np.testing.assert_allclose(got["distance"], np.sqrt(d2.min(axis=1)), rtol=1e-9, atol=1e-12)


def test_shift_by_1e9_gives_the_same_segments_and_sse(tmp_path, blobs_30k_4d_5c, open_engine):
    x, _ = blobs_30k_4d_5c
    names = ["a", "b", "c", "d"]
    near = write_table(tmp_path / "near.duckdb", "t", columns_of(x, names))
    far = write_table(tmp_path / "far.duckdb", "t", columns_of(x + 1e9, names))
    results = []
    for path in (near, far):
        engine = open_engine(path)
        model = segment(engine, Source.of_table("t"), names, Settings(k=5))
        label(engine, Source.of_table("t"), model, "lab")
        results.append((model, engine.con.execute('SELECT "segment" FROM "lab"').fetchnumpy()["segment"]))
    (m0, s0), (m1, s1) = results
    # reference: scikit-learn adjusted_rand_score between the two labellings
    assert adjusted_rand_score(s0, s1) == 1.0
    assert m1.sse == pytest.approx(m0.sse, rel=1e-6)


def test_weights_and_no_scaling_change_the_metric_as_documented(blob_db, blobs_30k_4d_5c, open_engine):
    path, names = blob_db
    x, _ = blobs_30k_4d_5c
    engine = open_engine(path)
    model = segment(engine, Source.of_table("points"), names, Settings(k=5, scaling="none", weights={"a": 2.0}))
    assert model.scale == [1.0] * 4 and model.weights == [2.0, 1.0, 1.0, 1.0]
    label(engine, Source.of_table("points"), model, "lab")
    seg = engine.con.execute('SELECT "segment" FROM "lab"').fetchnumpy()["segment"]
    w = np.array([2.0, 1.0, 1.0, 1.0])
    zc = (x - x.mean(axis=0)) * w
    # reference: numpy SSE of the labelled partition in the weighted original-unit metric
    sse = sum(((zc[seg == i] - zc[seg == i].mean(axis=0)) ** 2).sum() for i in range(5))
    assert sse == pytest.approx(model.sse, rel=1e-3)
    inertia = KMeans(n_clusters=5, n_init=10, random_state=0).fit(zc).inertia_
    assert model.sse <= inertia * 1.002


# ----------------------------------------------------------------------------- skipped rows, quoting, safety


def test_null_nan_and_inf_rows_are_skipped_counted_and_labelled_null(tmp_path, open_engine):
    rng = np.random.default_rng(0)
    x = rng.normal(size=(2_000, 2))
    x[:5, 0] = np.nan
    x[5:8, 1] = np.inf
    x[8:10, 0] = -np.inf
    data = columns_of(x, ["p", "q"])
    data["id"] = np.arange(len(x))
    path = write_table(tmp_path / "s.duckdb", "s", data)
    con = duckdb.connect(str(path))
    con.execute('INSERT INTO s VALUES (NULL, 1.0, 2000), (1.0, NULL, 2001)')
    con.close()
    engine = open_engine(path)
    model = segment(engine, Source.of_table("s"), ["p", "q"], Settings(k=3))
    assert model.skipped == 12 and model.rows == 2_002 and sum(model.sizes) == 1_990
    good = x[10:]
    # reference: numpy mean and population sd of the usable rows only
    np.testing.assert_allclose(model.center, good.mean(axis=0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(model.scale, good.std(axis=0), rtol=1e-9)
    label(engine, Source.of_table("s"), model, "lab")
    got = view_rows(engine, "lab", "id")
    assert np.ma.getmaskarray(got["segment"])[list(range(10)) + [2000, 2001]].all()
    assert not np.ma.getmaskarray(got["segment"])[10:2000].any()


def test_columns_needing_quotes_work_end_to_end(tmp_path, open_engine):
    x, y = make_blobs(n_samples=3_000, centers=3, n_features=3, cluster_std=0.5, random_state=2)
    names = ["select", "unit price", 'a"b']
    data = columns_of(x, names)
    data["truth"] = y
    path = write_table(tmp_path / "q.duckdb", "order", data)
    engine = open_engine(path)
    model = segment(engine, Source.of_table("order"), names, Settings(k=3))
    label(engine, Source.of_table("order"), model, "my labels")
    got = engine.con.execute('SELECT "truth", "segment" FROM "my labels"').fetchnumpy()
    assert adjusted_rand_score(got["truth"], got["segment"]) >= 0.99


def test_label_never_writes_the_source_and_refuses_its_name(blob_db, open_engine):
    path, names = blob_db
    engine = open_engine(path)
    before = engine.con.execute('SELECT count(*), sum(hash("a", "b", "c", "d", "truth")) FROM "points"').fetchall()
    model = segment(engine, Source.of_table("points"), names, Settings(k=5))
    with pytest.raises(InputError, match="source"):
        label(engine, Source.of_table("points"), model, "points")
    label(engine, Source.of_table("points"), model, "lab", materialize=True)
    with pytest.raises(InputError, match="already exists"):
        label(engine, Source.of_table("points"), model, "lab", materialize=True)
    label(engine, Source.of_table("points"), model, "lab", materialize=True, replace=True)
    after = engine.con.execute('SELECT count(*), sum(hash("a", "b", "c", "d", "truth")) FROM "points"').fetchall()
    assert before == after


def test_segment_reads_parquet_and_csv_files_in_place(tmp_path, blobs_30k_4d_5c):
    from tillite.engines import open_source

    x, y = blobs_30k_4d_5c
    names = ["a", "b", "c", "d"]
    con = duckdb.connect()
    frame = columns_of(x, names)  # noqa: F841
    pq, csv = tmp_path / "p.parquet", tmp_path / "p.csv"
    con.execute(f"COPY (SELECT * FROM frame) TO '{pq}' (FORMAT parquet)")
    con.execute(f"COPY (SELECT * FROM frame) TO '{csv}' (FORMAT csv, HEADER)")
    con.close()
    sses = []
    for path in (pq, csv):
        engine, src = open_source(str(path), None)
        sses.append(segment(engine, src, names, Settings(k=5)).sse)
        engine.close()
    assert sses[0] == pytest.approx(sses[1], rel=1e-9)


# ----------------------------------------------------------------------------- bad input


def test_missing_table_error_names_it_and_lists_tables(blob_db, open_engine):
    path, names = blob_db
    with pytest.raises(SourceError, match=r"table nope not found.*points"):
        segment(open_engine(path), Source.of_table("nope"), names, Settings(k=2))


def test_missing_column_error_names_it_and_lists_columns(blob_db, open_engine):
    path, _ = blob_db
    with pytest.raises(SourceError, match=r"column zz not found in points; columns there: a \(DOUBLE\)"):
        segment(open_engine(path), Source.of_table("points"), ["a", "zz"], Settings(k=2))


def test_non_numeric_column_error_names_column_and_type(tmp_path, open_engine):
    path = write_table(tmp_path / "t.duckdb", "t", {"x": np.arange(10.0)})
    con = duckdb.connect(str(path))
    con.execute("ALTER TABLE t ADD COLUMN name VARCHAR DEFAULT 'v'")
    con.close()
    with pytest.raises(SourceError, match=r"column name of t has type VARCHAR"):
        segment(open_engine(path), Source.of_table("t"), ["x", "name"], Settings(k=2))


def test_empty_table_and_all_skipped_rows_give_clear_errors(tmp_path, open_engine):
    path = write_table(tmp_path / "t.duckdb", "t", {"x": np.array([np.nan, np.nan]), "y": np.array([1.0, 2.0])})
    con = duckdb.connect(str(path))
    con.execute('CREATE TABLE empty AS SELECT * FROM t WHERE false')
    con.close()
    engine = open_engine(path)
    with pytest.raises(InputError, match="empty has no rows"):
        segment(engine, Source.of_table("empty"), ["x", "y"], Settings(k=2))
    with pytest.raises(InputError, match="no usable rows in t: all 2 rows"):
        segment(engine, Source.of_table("t"), ["x", "y"], Settings(k=2))


def test_constant_column_warns_and_carries_no_weight(tmp_path, open_engine):
    x, y = make_blobs(n_samples=2_000, centers=3, n_features=2, cluster_std=0.5, random_state=4)
    data = columns_of(x, ["p", "q"])
    data["flat"] = np.full(len(x), 7.0)
    path = write_table(tmp_path / "c.duckdb", "c", data)
    with pytest.warns(UserWarning, match="constant column.*flat"):
        model = segment(open_engine(path), Source.of_table("c"), ["p", "flat", "q"], Settings(k=3))
    assert model.weights[1] == 0.0 and model.scale[1] == 1.0 and model.constant_columns == ["flat"]
    assert np.isfinite(model.sse)
    np.testing.assert_allclose(np.array(model.centroids)[:, 1], 7.0)


def test_k_larger_than_distinct_rows_is_a_clear_error(tmp_path, open_engine):
    path = write_table(tmp_path / "t.duckdb", "t", {"x": np.array([1.0, 1.0, 2.0, 2.0] * 50)})
    with pytest.raises(InputError, match=r"k 3 is larger than the 2 distinct grid cells"):
        segment(open_engine(path), Source.of_table("t"), ["x"], Settings(k=3))


def test_missing_database_file_is_an_error_and_is_not_created(tmp_path):
    from tillite.engines import open_source

    missing = tmp_path / "nothing.duckdb"
    with pytest.raises(SourceError, match="does not exist"):
        open_source(str(missing), "t")
    assert not missing.exists()


# ----------------------------------------------------------------------------- refine passes and their labels


def segment_and_label(tmp_path, x: np.ndarray, k: int):
    names = [f"c{j}" for j in range(x.shape[1])]
    engine = DuckDBEngine(str(write_table(tmp_path / "r.duckdb", "t", columns_of(x, names))))
    stages: list[tuple[str, str]] = []
    model = segment(engine, Source.of_table("t"), names, Settings(k=k), progress=lambda s, m: stages.append((s, m)))
    label(engine, Source.of_table("t"), model, "labels")
    got = engine.con.execute('SELECT "segment", "distance" FROM "labels"').fetchnumpy()
    engine.close()
    return model, np.asarray(got["segment"]), np.asarray(got["distance"]), stages


def test_model_sizes_and_sse_are_those_of_its_labels_when_segments_overlap(tmp_path):
    x, _ = make_blobs(n_samples=60_000, centers=5, n_features=3, cluster_std=2.5, center_box=(-20, 20), random_state=1)
    model, seg, dist, _ = segment_and_label(tmp_path, x, 5)
    assert model.passes  # rows near the overlaps: the refine pass ran
    # reference: the labels' own counts (numpy bincount) and squared distances (numpy sum)
    assert np.bincount(seg, minlength=5).tolist() == model.sizes
    assert np.isclose((dist**2).sum(), model.sse, rtol=1e-9)
    # reference: scikit-learn KMeans objective on the same standardised rows
    inertia = KMeans(n_clusters=5, n_init=10, random_state=0).fit(standardise(x)).inertia_
    assert model.sse <= inertia * 1.002


def test_no_refine_pass_runs_when_every_cell_lies_wholly_in_its_segment(tmp_path):
    x, truth = make_blobs(n_samples=60_000, centers=4, n_features=3, cluster_std=0.3, center_box=(-20, 20), random_state=2)
    model, seg, dist, stages = segment_and_label(tmp_path, x, 4)
    assert model.passes == [] and any(s == "refine" and "no pass needed" in m for s, m in stages)
    # reference: make_blobs' generating labels (well separated) and numpy bincount of the labels
    assert adjusted_rand_score(truth, seg) == 1.0
    assert np.bincount(seg, minlength=4).tolist() == model.sizes
    # reference: numpy means and squared distances of each segment's rows, in the model's standardisation
    z = (x - np.asarray(model.center)) / np.asarray(model.scale)
    for s in range(4):
        np.testing.assert_allclose(model.centroids_scaled[s], z[seg == s].mean(axis=0), rtol=1e-9, atol=1e-9)
    assert np.isclose((dist**2).sum(), model.sse, rtol=1e-9)


def test_principal_axis_grids_give_no_cell_boxes():
    from tillite.pipeline import CellBoxes, Standardisation
    from tillite.sqlgen import Grid

    d = 8
    axes = np.linalg.qr(np.random.default_rng(0).normal(size=(d, 4)))[0]
    grid = Grid(center=(0.0,) * d, inv_scale=(1.0,) * d, width=0.5, axes=tuple(map(tuple, axes)))
    std = Standardisation(np.zeros(d), np.ones(d), np.ones(d), np.ones(d), np.zeros(d, bool))
    assert CellBoxes.of_grid(grid, np.zeros((3, 4)), std, np.zeros(3, int)) is None
