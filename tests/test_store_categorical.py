"""A summary store with categorical columns: built, refreshed, labelled and scored exactly as
`segment --categorical` runs, checked against numpy on explicitly one-hot-encoded, scaled rows."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from tillite import macros as M
from tillite import store as S
from tillite.engines import DuckDBEngine
from tillite.errors import ParameterError, StoreError
from tillite.model import Model
from tillite.pipeline import Settings, label, segment
from tillite.sqlgen import Source

from conftest import (
    assert_one_error_line, centroids_in_numpy_units, fetch_rows, mixed_data, one_hot_scaled, run_cli,
    sorted_cells, sse_at_centroids, write_table,
)

SETTINGS = Settings(k=6, categorical=("district",), refine_passes=3)
SPEC = S.PartitionSpec(("part",))


@pytest.fixture
def parted_db(tmp_path):
    """mixed_data (2 blobs x 3 districts, one NULL) in table t, split into 4 partitions by ``part``."""
    x, c, _ = mixed_data()
    path = tmp_path / "parted.duckdb"
    write_table(path, "t", {"id": np.arange(len(x)), "a": x[:, 0], "b": x[:, 1], "district": c, "part": np.arange(len(x)) % 4})
    return path


@pytest.fixture
def cat_store(parted_db):
    engine = DuckDBEngine(str(parted_db))
    info, model = S.build(engine, Source.of_table("t"), ["a", "b"], SPEC, SETTINGS, store="s")
    yield engine, info, model
    try:
        engine.close()
    except Exception:  # closed by the test already
        pass


def rows_now(engine) -> tuple[np.ndarray, np.ndarray]:
    """The table's numeric columns and districts (None for NULL), in id order, as numpy reads them."""
    got = engine.con.execute("SELECT a, b, district FROM t ORDER BY id").fetchall()
    return np.array([(r[0], r[1]) for r in got]), np.array([r[2] for r in got], dtype=object)


def segments_of(engine, view: str) -> np.ndarray:
    return engine.con.execute(f'SELECT segment FROM "{view}" ORDER BY id').fetchnumpy()["segment"]


def assert_sse_equals_numpy(engine, model: Model, view: str, cat_weight: float = 1.0) -> None:
    x, c = rows_now(engine)
    listed = model.categorical[0]["values"]
    seg = segments_of(engine, view)
    # outside reference: numpy's SSE of the same assignment on explicitly one-hot-encoded, scaled rows
    # (every value not listed at build, 'west' and 'east' included, in the "other" column)
    u = one_hot_scaled(x, c, listed, cat_weight=cat_weight)
    expected = sse_at_centroids(u, seg, centroids_in_numpy_units(model, x, c, listed, cat_weight=cat_weight), model.segment_ids())
    assert model.sse == pytest.approx(expected, rel=1e-9)
    ids, counts = np.unique(seg, return_counts=True)
    assert dict(zip(ids.tolist(), counts.tolist())) == dict(zip(model.segment_ids(), model.sizes))


@pytest.mark.parametrize("cat_weight", [1.0, 0.5])
def test_store_built_with_categorical_equals_segment_categorical_and_numpy(parted_db, cat_weight):
    settings = replace(SETTINGS, weights={"district": cat_weight})
    with DuckDBEngine(str(parted_db)) as engine:
        _, model = S.build(engine, Source.of_table("t"), ["a", "b"], SPEC, settings, store="s")
        ref = segment(engine, Source.of_table("t"), ["a", "b"], settings)
        assert model.categorical == ref.categorical
        assert model.sizes == ref.sizes
        assert model.sse == pytest.approx(ref.sse, rel=1e-9)
        S.label(engine, "s", "store_labels")
        assert_sse_equals_numpy(engine, model, "store_labels", cat_weight)


def test_store_cells_keep_only_numeric_sums_and_indicator_totals_equal_numpy_counts(cat_store):
    engine, info, _ = cat_store
    names = [r[0] for r in engine.con.execute(f"SELECT column_name FROM duckdb_columns() WHERE table_name = '{info.cells_table}'").fetchall()]
    assert names == ["part", "q0", "k0", "k1", "n", "ls0", "ls1", "ss0", "ss1"]
    cells, keys, skipped = S.store_cells(engine, info.cells_table, info.grid, info.columns, S.store_categories(info))
    _, c = rows_now(engine)
    grid_center = np.asarray(info.grid.center)
    # outside reference: numpy's count of each category's rows; an indicator's sum is its count (centre 0, scale 1 in the grid)
    for j, value in zip(range(2, 6), ["harbour", "north", None, None]):
        if j == 4:  # "(other)": no such rows at build
            expected = 0
        else:
            expected = int(np.sum([v == value for v in c])) if value is not None else int(np.sum([v is None for v in c]))
        assert grid_center[j] == 0.0
        assert cells.ls[:, j].sum() == expected
        np.testing.assert_array_equal(cells.ss[:, j], cells.ls[:, j])
    assert skipped == 0


def change_with_unseen_categories(con) -> None:
    """A new partition of 'west' rows (never seen at build), a listed category turned into an unseen one
    in partition 2, and NULLs turned into a listed category in partition 1."""
    con.execute("INSERT INTO t SELECT id + 100000, a + 0.5, b, 'west', 9 FROM t WHERE id < 900")
    con.execute("UPDATE t SET district = 'east' WHERE part = 2 AND district = 'north' AND id % 5 = 0")
    con.execute("UPDATE t SET district = 'harbour' WHERE part = 1 AND district IS NULL AND id % 7 = 0")


def test_refresh_with_never_seen_categories_equals_a_fresh_build_counting_them_as_other(cat_store):
    engine, info, before = cat_store
    change_with_unseen_categories(engine.con)
    report = S.refresh(engine, "s")
    assert report.new == ["9"] and report.changed == ["1", "2"]
    # outside reference: DuckDB's own count of the summarised partitions' rows outside the listed categories
    other = fetch_other_rows(engine, ("1", "2", "9"))
    assert report.other_rows["district"]["rows"] == other > 0
    assert any("district" in line and f"{other:,} row(s)" in line for line in report.describe().splitlines())
    after = S.load(engine, "s")
    assert after.model.categorical == before.categorical  # the categories stay those listed at build
    specs = S.store_categories(after)
    fresh, fresh_model = S.build(engine, Source.of_table("t"), ["a", "b"], SPEC, SETTINGS, store="fresh", grid=info.grid,
                                 categories=specs)
    got = sorted_cells(*S.store_cells(engine, after.cells_table, after.grid, after.columns, specs)[:2])
    ref = sorted_cells(*S.store_cells(engine, fresh.cells_table, fresh.grid, fresh.columns, specs)[:2])
    np.testing.assert_array_equal(got[0], ref[0])  # keys and category codes
    np.testing.assert_array_equal(got[1], ref[1])  # counts
    for g, r in ((got[2], ref[2]), (got[3], ref[3])):
        np.testing.assert_allclose(g, r, rtol=1e-12, atol=1e-12 * float(np.abs(r).max()))
    assert sorted(fresh_model.sizes) == sorted(after.model.sizes)
    assert fresh_model.sse == pytest.approx(after.model.sse, rel=1e-9)
    # the refreshed model against numpy, through the label view the refresh re-created
    S.label(engine, "s", "store_labels")
    assert_sse_equals_numpy(engine, after.model, "store_labels")


def fetch_other_rows(engine, parts) -> int:
    listed = ", ".join("'" + v + "'" for v in ("harbour", "north"))
    return engine.con.execute(f"SELECT count(*) FROM t WHERE CAST(part AS VARCHAR) IN {tuple(parts)} "
                              f"AND district IS NOT NULL AND district NOT IN ({listed})").fetchone()[0]


def test_a_row_moving_between_two_unlisted_values_changes_no_cell_and_no_fingerprint(cat_store):
    engine, _, _ = cat_store
    engine.con.execute("INSERT INTO t SELECT id + 100000, a, b, 'west', 9 FROM t WHERE id < 100")
    S.refresh(engine, "s")
    engine.con.execute("UPDATE t SET district = 'south' WHERE district = 'west'")
    report = S.refresh(engine, "s")
    # outside reference: the definition of "(other)": both values are unlisted, so the rows' indicators are equal
    assert report.changed == [] and report.new == []


def test_label_view_of_the_store_equals_label_with_its_model_file_and_the_scoring_macros(cat_store, parted_db, tmp_path):
    engine, _, _ = cat_store
    change_with_unseen_categories(engine.con)
    S.refresh(engine, "s")
    from tillite.naming import name_store_segments

    named = S.load(engine, "s").model.segment_ids()[0]
    name_store_segments(engine, "s", {named: "first"})
    S.label(engine, "s", "store_labels")
    model_path = tmp_path / "store.model.json"
    S.load(engine, "s").model.write(model_path)
    model = Model.read(model_path)
    assert model.segment_ids() != list(range(model.k))  # the refresh matched ids: the macros must return ids, not positions
    label(engine, Source.of_table("t"), model, "file_labels")
    engine.close()
    M.install_into(parted_db, M.scoring_macros(model, "st"))
    # outside reference: DuckDB compares the views and the macros row by row (segment and distance)
    differ = fetch_rows(parted_db, """
        SELECT count(*) FROM store_labels s JOIN file_labels f USING (id)
        WHERE s.segment IS DISTINCT FROM f.segment OR abs(s.distance - f.distance) > 1e-12 * (1 + f.distance)
           OR st_segment(s.a, s.b, s.district) IS DISTINCT FROM s.segment
           OR abs(st_distance(s.a, s.b, s.district) - s.distance) > 1e-9 * (1 + s.distance)""")[0][0]
    counts = fetch_rows(parted_db, "SELECT (SELECT count(*) FROM store_labels), (SELECT count(*) FROM t)")[0]
    assert differ == 0 and counts[0] == counts[1]
    misnamed = fetch_rows(parted_db, "SELECT count(*) FROM store_labels s WHERE st_segment_name(s.a, s.b, s.district) "
                                     "IS DISTINCT FROM s.segment_name")[0][0]
    assert misnamed == 0 and fetch_rows(parted_db, f"SELECT count(*) FROM store_labels WHERE segment = {named} "
                                                   "AND segment_name = 'first'")[0][0] > 0
    unseen = fetch_rows(parted_db, "SELECT st_segment(a, b, 'never seen') = st_segment(a, b, 'west') FROM t LIMIT 20")
    assert all(r[0] for r in unseen)  # two values unseen at build are the same "(other)"


def test_status_shows_the_categories_fixed_at_build(cat_store):
    engine, _, _ = cat_store
    st = S.status(engine, "s")
    assert [(c["column"], c["categories"]) for c in st["categorical"]] == [("district", ["harbour", "north"])]
    assert st["outside_share"] == 0.0


def test_regrid_keeps_the_categories_listed_at_build(cat_store):
    engine, info, _ = cat_store
    engine.con.execute("INSERT INTO t SELECT id + 100000, a, b, 'west', 9 FROM t")  # 'west' now the largest category
    model = S.regrid(engine, "s")
    assert model.categorical == info.model.categorical


def test_subtract_rows_refuses_a_categorical_store_in_one_line(cat_store):
    engine, _, _ = cat_store
    with pytest.raises(StoreError, match="categorical"):
        S.subtract_rows(engine, "s", "0", np.zeros((1, 6)))


def test_store_with_categorical_and_within_is_refused_in_one_line(parted_db):
    with DuckDBEngine(str(parted_db)) as engine:
        with pytest.raises(ParameterError, match="categorical.*within"):
            S.build(engine, Source.of_table("t"), ["a"], SPEC, Settings(k=3, categorical=("district",), within="part"))


def test_store_commands_with_categorical_columns_run_from_the_cli(parted_db):
    res = run_cli("store", "build", parted_db, "-t", "t", "--categorical", "district", "--partition-by", "part", "--k", "3", "-q")
    assert res.exit_code == 0, res.output
    assert "district: 100%" in res.output  # only a categorical column: the segments are its categories
    with DuckDBEngine(str(parted_db)) as engine:
        engine.con.execute("INSERT INTO t SELECT id + 100000, a, b, 'west', 9 FROM t WHERE id < 50")
    res = run_cli("refresh", parted_db, "--store", "t", "-q")
    assert res.exit_code == 0, res.output
    # outside reference: the 50 rows inserted above, none of them a listed category
    assert "district: 50 row(s) of the 1 partition(s) summarised" in res.output
    res = run_cli("store", "status", parted_db, "--store", "t")
    assert "categories of district fixed at build: harbour, north" in res.output
    assert "on t (district (categorical))" in res.output
    assert run_cli("label", parted_db, "-t", "t", "--store", "t", "--into", "cli_labels", "-q").exit_code == 0
    res = run_cli("macros", "install", parted_db, "--store", "t", "--name", "cli")
    assert res.exit_code == 0, res.output
    # outside reference: DuckDB compares the store's label view with the macros of its current model, row by row
    differ = fetch_rows(parted_db, "SELECT count(*) FROM cli_labels WHERE cli_segment(district) IS DISTINCT FROM segment")
    assert differ[0][0] == 0


@pytest.mark.parametrize("args, needles", [
    (["--store", "t", "--model", "m.json", "--name", "x"], ["--model", "--store"]),
    (["--store", "t"], ["--store", "--name"]),
])
def test_macros_install_from_a_store_refuses_bad_option_sets_in_one_line(parted_db, args, needles):
    assert_one_error_line(run_cli("macros", "install", parted_db, *args), *needles, code=2)


@pytest.mark.parametrize("args, needles, code", [
    (["--categorical", "district", "--within", "part"], ["--categorical", "--within"], 1),
    (["--categorical", "nope"], ["nope", "not found"], 1),
    (["--categorical", "id"], ["id", "10,000", "distinct"], 1),
    (["-c", "a", "--categorical", "district", "--max-categories", "0"], ["--max-categories", "0"], 1),
    (["-c", "a", "--categorical", ","], ["--categorical", "column names"], 2),
    ([], ["--columns", "--categorical"], 2),
])
def test_bad_categorical_store_input_is_one_error_line(parted_db, args, needles, code):
    res = run_cli("store", "build", parted_db, "-t", "t", "--partition-by", "part", "--k", "3", "-q", *args)
    assert_one_error_line(res, *needles, code=code)


def test_store_report_shows_each_category_share_per_segment(cat_store):
    from tillite import report as R

    engine, _, _ = cat_store
    change_with_unseen_categories(engine.con)
    S.refresh(engine, "s")
    model = S.load(engine, "s").model
    S.label(engine, "s", "store_labels")
    content = R.report_of_store(engine, "s", ["district"])
    _, c = rows_now(engine)
    seg = segments_of(engine, "store_labels")
    listed = model.categorical[0]["values"]
    for entry in content["profile"]:
        rows = seg == entry["segment"]
        # outside reference: numpy's share of each category (unlisted ones as other) among the segment's labelled rows
        shares = [np.mean([v == name for v in c[rows]]) for name in listed]
        shares += [np.mean([v is not None and v not in listed for v in c[rows]]), np.mean([v is None for v in c[rows]])]
        np.testing.assert_allclose(entry["mean"][2:], shares, atol=1e-12)


def test_a_ward_store_with_categorical_equals_segment_ward_categorical(parted_db):
    settings = Settings(k=6, categorical=("district",), method="ward", refine_passes=2)
    with DuckDBEngine(str(parted_db)) as engine:
        _, stored = S.build(engine, Source.of_table("t"), ["a", "b"], SPEC, settings, store="w")
        plain = segment(engine, Source.of_table("t"), ["a", "b"], settings)
        # reference: numpy's SSE on the one-hot rows, through the store's own label view
        S.label(engine, "w", "ward_labels")
        assert_sse_equals_numpy(engine, stored, "ward_labels")
    assert stored.method == "ward" and stored.sizes == plain.sizes
    assert stored.sse == pytest.approx(plain.sse, rel=1e-9)


def test_a_file_store_with_categorical_counts_a_new_files_unseen_category_as_other(tmp_path):
    import duckdb

    x, c, _ = mixed_data(n=4_000)
    folder = tmp_path / "files"
    folder.mkdir()
    db = tmp_path / "rows.duckdb"
    write_table(db, "t", {"id": np.arange(len(x)), "a": x[:, 0], "b": x[:, 1], "district": c, "part": np.arange(len(x)) % 3})
    con = duckdb.connect(str(db))
    for p in range(3):
        con.execute(f"COPY (SELECT * FROM t WHERE part = {p}) TO '{folder}/p{p}.parquet' (FORMAT parquet)")
    store_db = tmp_path / "store.duckdb"
    src = Source.of_files(str(folder / "*.parquet"), "parquet")
    with DuckDBEngine(str(store_db)) as engine:
        info, _ = S.build(engine, src, ["a", "b"], S.PartitionSpec(files=True), SETTINGS, store="files")
        con.execute(f"COPY (SELECT id + 10000 AS id, a, b, 'west' AS district, 3 AS part FROM t WHERE part = 0) "
                    f"TO '{folder}/p3.parquet' (FORMAT parquet)")
        report = S.refresh(engine, "files")
        specs = S.store_categories(info)
        cells, _, _ = S.store_cells(engine, info.cells_table, info.grid, info.columns, specs)
    # outside reference: DuckDB's count of the new file's rows (all 'west', unseen at build), and of every file's rows
    west = con.execute(f"SELECT count(*) FROM read_parquet('{folder}/p3.parquet')").fetchone()[0]
    total = con.execute(f"SELECT count(*) FROM read_parquet('{folder}/*.parquet')").fetchone()[0]
    con.close()
    assert report.new == [str(folder / "p3.parquet")]
    assert report.other_rows["district"]["rows"] == west
    other = info.columns.index("district=(other)")
    assert cells.ls[:, other].sum() == west and int(cells.n.sum()) == total
