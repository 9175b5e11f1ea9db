"""Trust rules: the same data and options give the same model file; segments do not depend on a
column's unit; the model describes exactly the labels; what is printed is true.

References: scikit-learn's adjusted_rand_score against the unscaled run and against make_blobs'
truth; DuckDB's own count(*) of the label view for the sizes.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import duckdb
import numpy as np
import pytest
from sklearn.datasets import make_blobs
from sklearn.metrics import adjusted_rand_score

from tillite.engines import DuckDBEngine
from tillite.pipeline import InputError, Settings, label, segment
from tillite.sqlgen import Source

from conftest import write_table

METHODS = {
    "kmeans": dict(k=4),
    "ward": dict(k=4, method="ward"),
    "density": dict(k=0, method="density"),
    "density distance": dict(k=0, method="density", adjacency="distance"),  # radius chosen from the data
}


def comparable(model) -> str:
    """The model file without what the README says may differ between identical runs: timings, creation time."""
    data = model.to_dict()
    data.pop("timings")
    data.pop("created")
    return json.dumps(data, sort_keys=True)


@pytest.fixture(scope="module")
def large_db(tmp_path_factory) -> Path:
    """Several DuckDB row groups (parallel scans) and more rows than the profile sample takes."""
    x, _ = make_blobs(n_samples=260_000, centers=4, n_features=3, cluster_std=1.0, center_box=(-8, 8), random_state=5)
    return write_table(tmp_path_factory.mktemp("rep") / "large.duckdb", "t", {"a": x[:, 0], "b": x[:, 1], "c": x[:, 2]})


@pytest.mark.parametrize("method", list(METHODS))
def test_three_runs_with_one_seed_write_the_same_model_file(large_db, method):
    runs = []
    for _ in range(3):
        engine = DuckDBEngine(str(large_db), read_only=True)
        try:
            model = segment(engine, Source.of_table("t"), ["a", "b", "c"], Settings(**METHODS[method], seed=11, sample_rows=5_000))
        finally:
            engine.close()
        runs.append(comparable(model))
    assert runs[0] == runs[1] == runs[2]
    assert json.loads(runs[0])["params"]["sample_repeats"] == "yes"


def _model_on_threads(db: Path, relation: str, threads: int) -> str:
    engine = DuckDBEngine(str(db), read_only=True)
    try:
        engine.con.execute(f"SET threads = {threads}")
        model = segment(engine, Source.of_table(relation), ["a", "b", "c"], Settings(k=4, seed=11, sample_rows=5_000))
        assert engine.con.execute("SELECT current_setting('threads')").fetchone()[0] == threads  # restored after the profile
    finally:
        engine.close()
    return comparable(model)


@pytest.mark.parametrize("relation", ["t", "t_view"])
def test_one_two_and_four_duckdb_threads_write_the_same_model_file(large_db, relation):
    # a base table gets the two-stage block sample (SYSTEM on one thread, then BERNOULLI);
    # a view the BERNOULLI REPEATABLE sample; both must not depend on the thread count
    with duckdb.connect(str(large_db)) as con:
        con.execute("CREATE OR REPLACE VIEW t_view AS SELECT * FROM t")
    runs = [_model_on_threads(large_db, relation, threads) for threads in (1, 2, 4)]
    assert runs[0] == runs[1] == runs[2]


def test_a_large_base_table_is_profiled_from_a_block_sample(large_db):
    from tillite import stages

    with duckdb.connect(str(large_db)) as con:
        con.execute("CREATE OR REPLACE VIEW t_view AS SELECT * FROM t")
    engine = DuckDBEngine(str(large_db), read_only=True)
    try:
        # 260,000 rows, a sample of 5,000: 2.9% of the rows, 23% of the vectors in the block stage
        assert stages.block_sample_pays(engine, Source.of_table("t"), 150.0 * 5_000 / 260_000)
        assert not stages.block_sample_pays(engine, Source.of_table("t"), 150.0 * 50_000 / 260_000)  # would read most vectors
        assert not stages.block_sample_pays(engine, Source.of_table("t_view"), 150.0 * 5_000 / 260_000)
    finally:
        engine.close()


def test_the_profile_sample_follows_the_seed(large_db):
    widths = set()
    for seed in (1, 2):
        engine = DuckDBEngine(str(large_db), read_only=True)
        try:
            model = segment(engine, Source.of_table("t"), ["a", "b", "c"], Settings(k=4, seed=seed, sample_rows=5_000))
        finally:
            engine.close()
        widths.add(tuple(model.grid["center"]))
    assert len(widths) == 2  # another seed, another sample (another grid centre): the seed is what repeats it


# ----------------------------------------------------------------------------- numerics


def segments_and_model(tmp_path: Path, x: np.ndarray, settings: Settings, name: str = "t") -> tuple[np.ndarray, object]:
    path = write_table(tmp_path / f"{name}.duckdb", "t", {"id": np.arange(len(x)), "a": x[:, 0], "b": x[:, 1], "c": x[:, 2]})
    engine = DuckDBEngine(str(path))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # no column may be taken for a constant one
            model = segment(engine, Source.of_table("t"), ["a", "b", "c"], settings)
        label(engine, Source.of_table("t"), model, "labels")
        got = engine.con.execute("SELECT segment FROM labels ORDER BY id").fetchnumpy()["segment"]
    finally:
        engine.close()
    return np.asarray(got), model


UNITS = {
    "x 1e-300": lambda x: x * 1e-300,
    "x 1e-13": lambda x: x * 1e-13,
    "x 1e13": lambda x: x * 1e13,
    "x 1e150": lambda x: x * 1e150,
    "x 1e152": lambda x: x * 1e152,  # squares near 1e304: summed in SQL they overflowed before
    "+ 1e13": lambda x: x + 1e13,  # spread about 4 on values near 1e13
}


@pytest.mark.parametrize("method", ["kmeans", "ward", "density"])
@pytest.mark.parametrize("unit", list(UNITS))
def test_segments_do_not_depend_on_the_unit_of_the_columns(tmp_path, blobs_6k_3d_4c, unit, method):
    x, _ = blobs_6k_3d_4c
    settings = Settings(**METHODS[method])
    ref, _ = segments_and_model(tmp_path, x, settings, "ref")
    got, model = segments_and_model(tmp_path, UNITS[unit](x), settings, "scaled")
    # reference: scikit-learn adjusted_rand_score against the run on the unscaled data
    assert adjusted_rand_score(ref, got) == 1.0
    assert model.constant_columns == []


def test_a_truly_constant_column_is_still_found_constant_at_any_magnitude(tmp_path, blobs_6k_3d_4c):
    x, _ = blobs_6k_3d_4c
    ref = None
    for level in (0.0, 1e-300, 3.7, 1e13, 1e150):
        data = x.copy()
        data[:, 2] = level
        with pytest.warns(UserWarning, match="constant column"):
            got, model = _labels_allowing_warnings(tmp_path, data, level)
        assert model.constant_columns == ["c"]
        ref = got if ref is None else ref
        # reference: scikit-learn adjusted_rand_score against the run with the constant column at 0
        assert adjusted_rand_score(ref, got) == 1.0


def _labels_allowing_warnings(tmp_path, data, level):
    path = write_table(tmp_path / f"c{level:g}.duckdb", "t", {"id": np.arange(len(data)), "a": data[:, 0], "b": data[:, 1], "c": data[:, 2]})
    engine = DuckDBEngine(str(path))
    try:
        model = segment(engine, Source.of_table("t"), ["a", "b", "c"], Settings(k=4))
        label(engine, Source.of_table("t"), model, "labels")
        got = engine.con.execute("SELECT segment FROM labels ORDER BY id").fetchnumpy()["segment"]
    finally:
        engine.close()
    return np.asarray(got), model


def test_only_constant_columns_is_an_error_not_one_segment_and_empty_ones(tmp_path):
    path = write_table(tmp_path / "flat.duckdb", "t", {"a": np.full(500, 2.5), "b": np.full(500, -1e13)})
    engine = DuckDBEngine(str(path), read_only=True)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with pytest.raises(InputError, match="nothing to segment on"):
                segment(engine, Source.of_table("t"), ["a", "b"], Settings(k=4))
    finally:
        engine.close()


# ----------------------------------------------------------------------------- results


@pytest.mark.parametrize("method", ["kmeans", "ward", "density"])
@pytest.mark.parametrize("extra", [{}, {"tree_budget": 50}, {"refine_passes": 1}], ids=["plain", "outlier group", "one pass"])
def test_model_sizes_are_the_label_view_counts(tmp_path, large_db, method, extra):
    if method == "density" and extra:
        pytest.skip("density has no refine passes and no CF tree")
    engine = DuckDBEngine(str(large_db))
    try:
        model = segment(engine, Source.of_table("t"), ["a", "b", "c"], Settings(**METHODS[method], sample_rows=5_000, **extra))
        label(engine, Source.of_table("t"), model, "labels")
        got = engine.con.execute("SELECT segment, count(*) FROM labels WHERE segment >= 0 GROUP BY 1").fetchall()
    finally:
        engine.close()
    # reference: DuckDB's own count of the label view
    counts = dict(got)
    assert {int(i): int(n) for i, n in counts.items()} == dict(zip(model.segment_ids(), model.sizes))
    assert model.params["sizes_from"] == "labels"


@pytest.mark.parametrize("rows", [2_000, 20_000])
@pytest.mark.parametrize("min_count", [None, 1, 0.5, 0])
def test_density_on_small_tables_finds_four_clear_blobs(tmp_path, rows, min_count):
    x, y = make_blobs(n_samples=rows, centers=[[-9, -9, 0], [9, -9, 0], [-9, 9, 0], [9, 9, 9]], n_features=3,
                      cluster_std=1.0, random_state=2)
    got, model = segments_and_model(tmp_path, x, Settings(k=0, method="density", min_count=min_count))
    # reference: make_blobs' truth
    assert model.k == 4
    assert adjusted_rand_score(y, got) == 1.0


def test_scaling_none_does_not_speak_of_scaled_units(tmp_path, blobs_6k_3d_4c):
    _, model = segments_and_model(tmp_path, blobs_6k_3d_4c[0], Settings(k=4, scaling="none"))
    text = model.describe()
    assert "scaled units" not in text and "original units" in text


def test_noise_drop_says_shares_exclude_noise(tmp_path):
    x, _ = make_blobs(n_samples=4_000, centers=[[-9, -9, 0], [9, 9, 0]], n_features=3, cluster_std=1.0, random_state=2)
    x = np.vstack([x, np.random.default_rng(0).uniform(-30, 30, size=(200, 3))])
    _, model = segments_and_model(tmp_path, x, Settings(k=0, method="density", noise="drop"))
    assert model.extras["noise_rows"] > 0
    assert f"{model.extras['noise_rows']:,} noise rows" in model.describe()
    assert "not counted" in model.describe()


def test_equal_rows_far_from_the_grid_centre_are_constant_though_their_sums_leave_round_off():
    from tillite.stages import unresolved_spread

    rng = np.random.default_rng(3)
    far = np.full(5_000, 7_342.123456789)  # grid units: equal rows far from the centre
    near = rng.normal(0.0, 1.0, 5_000)  # a real spread around the centre
    tiny = 7_342.0 + rng.normal(0.0, 1e-3, 5_000)  # far away, but a spread well above round-off
    for x, expected in ((far, True), (near, False), (tiny, False)):
        n, ls, ss = float(len(x)), float(x.sum()), float((x * x).sum())
        scatter = max(ss - ls * ls / n, 0.0)  # the one-pass formula the cells' sums give
        # reference: numpy's range of the same rows (max - min: exactly 0 only for the equal rows)
        assert (np.ptp(x) == 0.0) == expected
        assert bool(unresolved_spread(np.array([scatter]), np.array([ss]))[0]) == expected


# ----------------------------------------------------------------------------- values near the ends of doubles


def test_a_column_near_1e307_with_a_small_relative_spread_segments_like_the_unshifted_data(tmp_path, blobs_6k_3d_4c):
    from tillite import report as R
    from tillite.stages import robust_mean_sd

    x, _ = blobs_6k_3d_4c
    big = x.copy()
    big[:, 0] = 1e307 + x[:, 0] * 1e305  # squares overflow, sums of 6,000 values too; centred values do not
    ref, _ = segments_and_model(tmp_path, x, Settings(k=4), "ref")
    got, model = segments_and_model(tmp_path, big, Settings(k=4), "big")
    # reference: scikit-learn adjusted_rand_score against the run on the unshifted data
    assert adjusted_rand_score(ref, got) == 1.0
    # reference: numpy mean and std of the unshifted column, moved to the big column's units
    assert model.center[0] == pytest.approx(1e307 + x[:, 0].mean() * 1e305, rel=1e-12)
    assert model.scale[0] == pytest.approx(x[:, 0].std() * 1e305, rel=1e-9)
    mean, sd = robust_mean_sd(big[:500])
    assert np.isfinite(mean).all() and np.isfinite(sd).all()
    assert mean[0] == pytest.approx(1e307 + x[:500, 0].mean() * 1e305, rel=1e-12)
    assert sd[0] == pytest.approx(x[:500, 0].std() * 1e305, rel=1e-9)
    # the grid's coefficients are finite numbers of an ordinary size
    coefficients = np.asarray(model.grid["inv_scale"]) * np.asarray(model.grid["axes"]).T / model.grid["width"]
    assert np.isfinite(coefficients).all()
    # reference: numpy's per-segment means of the labelled rows (report statistics are centred and scaled in SQL)
    engine = DuckDBEngine(str(tmp_path / "big.duckdb"))
    try:
        stats, _ = R.report_scan(engine, Source.of_table("t"), model)
    finally:
        engine.close()
    for sid, st in stats.items():
        rows = big[got == sid]
        assert st["columns"]["a"]["mean"] == pytest.approx(1e307 + x[got == sid, 0].mean() * 1e305, rel=1e-12)
        assert st["columns"]["a"]["sd"] == pytest.approx(x[got == sid, 0].std() * 1e305, rel=1e-6)
        assert st["columns"]["a"]["max"] == rows[:, 0].max()


@pytest.mark.parametrize("values,options,needles", [
    ("1e-320 * range", [], ["column a", "spread", "1/sd overflows"]),  # subnormal: 1/sd is beyond the largest double
    ("(random() - 0.5) * 1e308", [], ["column a", "overflow doubles"]),  # centred values summed across columns overflow
    ("random() * 1e200", ["--scaling", "none"], ["column a", "squared"]),  # unscaled: squares of 1e200 overflow
], ids=["subnormal spread", "spread near the largest double", "unscaled squares"])
def test_a_column_doubles_cannot_carry_is_refused_in_one_line_naming_it(tmp_path, values, options, needles):
    from conftest import assert_one_error_line, run_cli

    path = tmp_path / "ends.duckdb"
    with duckdb.connect(str(path)) as con:
        con.execute(f"CREATE TABLE t AS SELECT {values} AS a, random() AS b FROM range(5000)")
    res = run_cli("segment", path, "-t", "t", "-c", "a,b", "--k", 3, "-q", "-o", tmp_path / "m.json", *options)
    assert_one_error_line(res, *needles)
    assert not (tmp_path / "m.json").exists()


def test_segments_within_groups_of_a_column_near_1e307_are_those_of_the_unshifted_data(tmp_path):
    from conftest import WITHIN_GROUPS, grouped_blobs

    data = grouped_blobs(WITHIN_GROUPS)
    data["id"] = np.arange(len(data["a"]))
    big = {**data, "a": 1e307 + data["a"] * 1e305}  # a group's refine sums of a - centre would overflow
    runs = []
    for name, table in (("ref", data), ("big", big)):
        path = write_table(tmp_path / f"{name}.duckdb", "t", table)
        with DuckDBEngine(str(path)) as engine:
            model = segment(engine, Source.of_table("t"), ["a", "b", "c"], Settings(k=4, within="grp", cell_budget=200))
            label(engine, Source.of_table("t"), model, "labels")
            got = engine.con.execute("SELECT coalesce(grp, '(null)') || ':' || segment FROM labels ORDER BY id").fetchall()
        assert model.passes  # coarse cells: the groups need refine passes over the rows
        runs.append([g for (g,) in got])
    # reference: scikit-learn adjusted_rand_score of the (group, segment) labels against the unshifted run
    assert adjusted_rand_score(runs[0], runs[1]) == 1.0
