"""Summary store and refresh: merged cells equal a fresh cell pass, failures change nothing, ids stay stable."""

from __future__ import annotations

import warnings

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner

from tillite import store as S
from tillite.cli import main
from tillite.demo import DEMO_COLUMNS, build_demo_database, write_demo_parquet
from tillite.engines import DuckDBEngine
from tillite.pipeline import Settings, run_cell_pass
from tillite.sqlgen import Source

from conftest import refresh_held_open, sorted_cells, store_snapshot

COLS = list(DEMO_COLUMNS)


@pytest.fixture
def demo_db(tmp_path):
    path = tmp_path / "water.duckdb"
    build_demo_database(path, rows=24_000, days=12, seed=3)
    return path


@pytest.fixture
def built(demo_db):
    engine = DuckDBEngine(str(demo_db))
    info, model = S.build(engine, Source.of_table("meter_days"), COLS, S.PartitionSpec(("day",)), Settings(k=5, refine_passes=0))
    yield engine, info, model
    engine.close()


def assert_store_equals_fresh_cell_pass(engine, info):
    merged, keys, skipped = S.merged_cells(engine, info.cells_table, info.grid, len(COLS))
    fresh = run_cell_pass(engine, Source.of_table("meter_days"), COLS, info.grid)
    a, b = sorted_cells(merged, keys), sorted_cells(fresh.cells, fresh.keys)
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])  # n exactly
    np.testing.assert_allclose(a[2], b[2], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(a[3], b[3], rtol=1e-9, atol=1e-9)
    assert skipped == fresh.skipped
    # reference: DuckDB's own count of the rows, outside our SQL
    total = engine.con.execute('SELECT count(*) FROM "meter_days"').fetchone()[0]
    assert int(merged.n.sum()) + skipped == total


def change_partitions(con):
    """An update, a delete of a whole partition, an append of a new one, and deleted rows inside one."""
    con.execute("UPDATE meter_days SET litres = litres * 2.5 WHERE day = DATE '2026-01-03'")
    con.execute("DELETE FROM meter_days WHERE day = DATE '2026-01-04'")
    con.execute("DELETE FROM meter_days WHERE day = DATE '2026-01-05' AND meter_id % 3 = 0")
    con.execute(
        "INSERT INTO meter_days SELECT meter_id, district, day + 40, litres, night_share, peak_litres, flow_run_hours, "
        "zero_hours FROM meter_days WHERE day = DATE '2026-01-06'"
    )


def test_build_then_refresh_with_no_change_scans_nothing_new(built):
    engine, info, _ = built
    report = S.refresh(engine, "meter_days")
    assert (report.new, report.changed, report.vanished) == ([], [], [])
    assert report.unchanged == 12
    assert_store_equals_fresh_cell_pass(engine, info)


def test_merged_store_equals_fresh_cell_pass_after_appends_updates_and_deletes(built):
    engine, info, _ = built
    change_partitions(engine.con)
    report = S.refresh(engine, "meter_days")
    assert report.changed == ["2026-01-03", "2026-01-05"]
    assert report.vanished == ["2026-01-04"] and report.new == ["2026-02-15"]
    assert_store_equals_fresh_cell_pass(engine, info)
    engine.con.execute("DELETE FROM meter_days WHERE day = DATE '2026-01-07'")
    S.refresh(engine, "meter_days")
    assert_store_equals_fresh_cell_pass(engine, info)


def test_refreshed_segments_equal_a_fresh_build_warm_started_from_the_same_centroids(built, tmp_path):
    engine, info, before = built
    change_partitions(engine.con)
    after = S.refresh(engine, "meter_days").model
    _, fresh = S.build(
        engine, Source.of_table("meter_days"), COLS, S.PartitionSpec(("day",)), Settings(k=5, refine_passes=0),
        store="fresh_copy", grid=info.grid, init_centroids=np.asarray(before.centroids),
    )
    by_id = dict(zip(after.segment_ids(), after.centroids))
    # the fresh build numbers segments in warm-start order, which is the old model's order
    for sid, centroid in zip(before.segment_ids(), fresh.centroids):
        np.testing.assert_allclose(by_id[sid], centroid, rtol=1e-9, atol=1e-9)
    assert sorted(fresh.sizes) == sorted(after.sizes)


def test_failure_after_the_cell_pass_leaves_the_store_exactly_as_before(built):
    engine, info, _ = built
    S.label(engine, "meter_days", "water_labels")
    before = store_snapshot(engine.con, info)
    view_sql = "SELECT sql FROM duckdb_views() WHERE view_name = 'water_labels'"
    view_before = engine.con.execute(view_sql).fetchall()
    change_partitions(engine.con)

    def fail():
        raise RuntimeError("injected failure after the cell pass")

    with pytest.raises(RuntimeError, match="injected"):
        S.refresh(engine, "meter_days", before_commit=fail)
    assert store_snapshot(engine.con, info) == before
    # the label view was re-created inside the transaction: it must be the old one still
    assert engine.con.execute(view_sql).fetchall() == view_before
    # and a later refresh still works
    S.refresh(engine, "meter_days")
    assert_store_equals_fresh_cell_pass(engine, info)


def test_two_refreshes_at_once_the_second_fails_cleanly(demo_db):
    first = DuckDBEngine(str(demo_db))
    S.build(first, Source.of_table("meter_days"), COLS, S.PartitionSpec(("day",)), Settings(k=5, refine_passes=0))
    change_partitions(first.con)
    second = DuckDBEngine.__new__(DuckDBEngine)
    second.path, second.read_only, second.dialect = str(demo_db), False, "duckdb"
    second._duckdb = duckdb
    second.con = first.con.cursor()  # a second connection to the same database
    with refresh_held_open(first, "meter_days"):
        with pytest.raises(S.StoreBusy, match="changed by another refresh"):
            S.refresh(second, "meter_days")
    info = S.load(first, "meter_days")
    assert info.version == 1
    assert_store_equals_fresh_cell_pass(first, info)
    first.close()


def test_segment_ids_stay_stable_and_vanished_ids_are_not_reused(built):
    engine, info, model = built
    change_partitions(engine.con)
    after = S.refresh(engine, "meter_days").model
    assert sorted(after.segment_ids()) == sorted(model.segment_ids())
    fewer = S.refresh(engine, "meter_days", k=4).model
    assert set(fewer.segment_ids()) < set(model.segment_ids())
    vanished = set(model.segment_ids()) - set(fewer.segment_ids())
    more = S.refresh(engine, "meter_days", k=5).model
    new_ids = set(more.segment_ids()) - set(fewer.segment_ids())
    assert len(new_ids) == 1 and not (new_ids & vanished) and min(new_ids) >= 5


def test_drift_report_names_sizes_shift_and_warns_on_large_moves(built):
    engine, _, _ = built
    engine.con.execute("UPDATE meter_days SET zero_hours = 0, flow_run_hours = 24 WHERE day >= DATE '2026-01-05'")
    report = S.refresh(engine, "meter_days", drift_threshold=0.2)
    assert {"segment", "size_before", "size_after", "shift_sd", "cells_moved"} <= set(report.drift[0])
    assert any("moved" in w for w in report.warnings)
    assert "shift (sd)" in report.describe()


def test_label_view_follows_the_current_model_after_a_refresh(built):
    engine, _, _ = built
    S.label(engine, "meter_days", "water_labels")
    change_partitions(engine.con)
    model = S.refresh(engine, "meter_days").model
    got = engine.con.execute('SELECT "litres", "night_share", "peak_litres", "flow_run_hours", "zero_hours", "segment" FROM "water_labels"').fetchnumpy()
    x = np.column_stack([np.ma.filled(np.ma.asarray(got[c], dtype=float), np.nan) for c in COLS])
    ok = np.isfinite(x).all(axis=1)
    z = (x[ok] - np.array(model.center)) / np.array(model.scale)
    d2 = ((z[:, None, :] - np.array(model.centroids_scaled)[None]) ** 2).sum(axis=2)
    # reference: numpy nearest centroid of the refreshed model
    np.testing.assert_array_equal(np.asarray(got["segment"])[ok], np.array(model.segment_ids())[d2.argmin(axis=1)])


def test_subtract_rows_equals_recomputing_the_partition(built):
    engine, info, _ = built
    rows = engine.con.execute(
        'SELECT "litres", "night_share", "peak_litres", "flow_run_hours", "zero_hours" FROM meter_days '
        "WHERE day = DATE '2026-01-08' AND meter_id % 4 = 1"
    ).fetchnumpy()
    S.subtract_rows(engine, "meter_days", "2026-01-08", np.column_stack([rows[c] for c in COLS]))
    engine.con.execute("DELETE FROM meter_days WHERE day = DATE '2026-01-08' AND meter_id % 4 = 1")
    assert_store_equals_fresh_cell_pass(engine, info)
    report = S.refresh(engine, "meter_days")
    assert report.changed == ["2026-01-08"]  # the delta marks the partition for re-verification


def test_status_warns_when_rows_fall_outside_the_built_range(built):
    engine, _, _ = built
    st = S.status(engine, "meter_days")
    assert st["partitions"] == 12 and st["rows"] == 24_000 and not st["warnings"]
    engine.con.execute(
        "INSERT INTO meter_days SELECT meter_id, district, day + 100, litres * 40, night_share, peak_litres * 40, "
        "flow_run_hours, zero_hours FROM meter_days WHERE day <= DATE '2026-01-03'"
    )
    S.refresh(engine, "meter_days")
    st = S.status(engine, "meter_days")
    assert st["outside_share"] > 0.05 and "outside the grid's built range" in st["warnings"][0]


def test_file_partitions_detect_new_changed_and_vanished_files(tmp_path):
    folder = tmp_path / "days"
    files = write_demo_parquet(folder, rows=6_000, days=6, seed=5)
    db = tmp_path / "store.duckdb"
    engine = DuckDBEngine(str(db))
    src = Source.of_files(str(folder / "**" / "*.parquet"), "parquet")
    info, _ = S.build(engine, src, COLS, S.PartitionSpec(files=True), Settings(k=3, refine_passes=0), store="days")
    assert S.refresh(engine, "days").unchanged == 6
    con = duckdb.connect()
    first = str(files[0])
    con.execute(f"COPY (SELECT * REPLACE (litres * 3 AS litres) FROM read_parquet('{first}')) TO '{first}.tmp' (FORMAT parquet)")
    import os

    os.replace(first + ".tmp", first)
    os.remove(files[1])
    report = S.refresh(engine, "days")
    assert report.changed == [first] and report.vanished == [str(files[1])]
    merged, _, _ = S.merged_cells(engine, info.cells_table, info.grid, len(COLS))
    # reference: DuckDB's count of the rows left in the files
    left = con.execute(f"SELECT count(*) FROM read_parquet('{folder}/**/*.parquet') WHERE litres IS NOT NULL AND NOT isnan(night_share)").fetchone()[0]
    assert int(merged.n.sum()) == left
    engine.close()


def test_store_commands_run_from_the_cli(demo_db):
    runner = CliRunner()
    res = runner.invoke(main, ["store", "build", str(demo_db), "-t", "meter_days", "-c", ",".join(COLS), "--partition-by", "day", "--k", "4", "-q"])
    assert res.exit_code == 0, res.output
    res = runner.invoke(main, ["label", str(demo_db), "--store", "meter_days", "--into", "water_segments", "-q"])
    assert res.exit_code == 0, res.output
    res = runner.invoke(main, ["store", "status", str(demo_db), "--store", "meter_days"])
    assert res.exit_code == 0 and "partitions: 12" in res.output
    con = duckdb.connect(str(demo_db))
    change_partitions(con)
    con.close()
    res = runner.invoke(main, ["refresh", str(demo_db), "--store", "meter_days", "--json", "-q"])
    assert res.exit_code == 0, res.output
    assert '"vanished": [' in res.output
    res = runner.invoke(main, ["refresh", str(demo_db), "--store", "nope"])
    assert res.exit_code == 1 and "store nope not found" in res.output


def test_store_refuses_spark_for_want_of_transactions_and_names_the_alternatives():
    from tillite.engines import SparkEngine

    spark = SparkEngine.__new__(SparkEngine)  # the engine's type alone; no Spark session is started
    spark.dialect = "spark"
    for attempt in (
        lambda: S.build(spark, Source.of_table("meter_days"), COLS, S.PartitionSpec(("day",)), Settings(k=3)),
        lambda: S.refresh(spark, "meter_days"),
    ):
        with pytest.raises(S.StoreError, match="multi-statement transactions.*Spark SQL does not have.*DuckDB or PostgreSQL"):
            attempt()


def test_regrid_rebuilds_on_a_new_grid_keeps_ids_and_relabels(built):
    engine, info, model = built
    S.label(engine, "meter_days", "water_labels")
    engine.con.execute(
        "INSERT INTO meter_days SELECT meter_id, district, day + 100, litres * 40, night_share, peak_litres * 40, "
        "flow_run_hours, zero_hours FROM meter_days WHERE day <= DATE '2026-01-03'"
    )
    S.refresh(engine, "meter_days")
    assert S.status(engine, "meter_days")["warnings"]
    after = S.regrid(engine, "meter_days")
    new_info = S.load(engine, "meter_days")
    assert new_info.grid != info.grid and not S.status(engine, "meter_days")["warnings"]
    assert set(after.segment_ids()) & set(model.segment_ids())
    assert_store_equals_fresh_cell_pass(engine, new_info)
    got = engine.con.execute('SELECT DISTINCT "segment" FROM "water_labels" WHERE "segment" IS NOT NULL').fetchall()
    assert {g for (g,) in got} <= set(after.segment_ids())


# ----------------------------------------------------------------------------- integrity (issue 10)

from conftest import sixty_days_of_blobs, typed_partition_table, write_table  # noqa: E402


def cells_of_store(engine, info):
    merged, keys, skipped = S.merged_cells(engine, info.cells_table, info.grid, len(info.columns))
    return sorted_cells(merged, keys) + (skipped,)


def assert_store_equals_fresh_pass(engine, info, table, rtol=1e-9):
    """The store's merged cells equal a from-scratch cell pass over ``table`` on the store's grid."""
    got = cells_of_store(engine, info)
    fresh = run_cell_pass(engine, Source.of_table(table), info.columns, info.grid)
    ref = sorted_cells(fresh.cells, fresh.keys)
    np.testing.assert_array_equal(got[0], ref[0])
    np.testing.assert_array_equal(got[1], ref[1])
    for g, r in ((got[2], ref[2]), (got[3], ref[3])):
        np.testing.assert_allclose(g, r, rtol=rtol, atol=rtol * max(1.0, float(np.abs(r).max(initial=0))))
    assert got[4] == fresh.skipped


def test_stores_whose_names_fold_alike_keep_separate_cells_each_equal_to_a_fresh_pass(demo_db):
    engine = DuckDBEngine(str(demo_db))
    engine.con.execute("CREATE TABLE meter_days_eu AS SELECT * REPLACE (litres * 3 AS litres) FROM meter_days")
    spec = S.PartitionSpec(("day",))
    a, _ = S.build(engine, Source.of_table("meter_days"), COLS, spec, Settings(k=4, refine_passes=0), store="sales-eu")
    b, _ = S.build(engine, Source.of_table("meter_days_eu"), COLS, spec, Settings(k=4, refine_passes=0), store="sales_eu")
    assert a.cells_table != b.cells_table
    engine.con.execute("UPDATE meter_days SET litres = litres + 100 WHERE day = DATE '2026-01-02'")
    assert S.refresh(engine, "sales-eu").changed == ["2026-01-02"]
    assert S.refresh(engine, "sales_eu").changed == []
    # reference: a from-scratch cell pass over each store's own table
    assert_store_equals_fresh_pass(engine, S.load(engine, "sales-eu"), "meter_days")
    assert_store_equals_fresh_pass(engine, S.load(engine, "sales_eu"), "meter_days_eu")
    engine.close()


def test_a_new_store_never_takes_a_table_the_user_made_and_drop_removes_only_its_own(demo_db):
    engine = DuckDBEngine(str(demo_db))
    engine.con.execute("CREATE TABLE tillite_cells_meter_days AS SELECT 42 AS mine")
    info, _ = S.build(engine, Source.of_table("meter_days"), COLS, S.PartitionSpec(("day",)), Settings(k=3, refine_passes=0))
    assert info.cells_table == "tillite_cells_meter_days_2"
    S.build(engine, Source.of_table("meter_days"), COLS, S.PartitionSpec(("day",)), Settings(k=3, refine_passes=0), store="other")
    S.label(engine, "meter_days", "water_labels")
    assert S.drop(engine, "meter_days") == ["tillite_cells_meter_days_2"]
    tables = {t for (t,) in engine.con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    assert "tillite_cells_meter_days_2" not in tables and {"tillite_cells_meter_days", "tillite_cells_other", "water_labels"} <= tables
    assert engine.con.execute("SELECT mine FROM tillite_cells_meter_days").fetchall() == [(42,)]
    with pytest.raises(S.StoreError, match="store meter_days not found; stores here: other"):
        S.load(engine, "meter_days")
    S.drop(engine, "other")
    tables = {t for (t,) in engine.con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    assert not {t for t in tables if t.startswith("tillite_")} - {"tillite_cells_meter_days"} and "water_labels" in tables
    engine.close()


def test_a_store_of_the_previous_version_is_read_and_its_first_refresh_rescans_every_partition(built):
    engine, info, _ = built
    # the previous version keyed partitions by their plain text
    for table in (S.PARTS, info.cells_table):
        engine.con.execute(f'UPDATE "{table}" SET part = substr(part, strpos(part, \':\') + 1)')
    report = S.refresh(engine, "meter_days")
    assert len(report.new) == 12 and len(report.vanished) == 12 and not report.changed
    assert_store_equals_fresh_cell_pass(engine, info)
    assert S.refresh(engine, "meter_days").unchanged == 12


@pytest.mark.parametrize("partition_by", [("p",), ("r", "s"), ("i", "d", "p")])
def test_partitions_are_told_apart_by_their_typed_values(tmp_path, partition_by):
    engine = DuckDBEngine(str(typed_partition_table(tmp_path / "typed.duckdb")))
    info, _ = S.build(engine, Source.of_table("t"), ["a", "b"], S.PartitionSpec(partition_by), Settings(k=2, refine_passes=0))
    st = S.status(engine, "t")
    # reference: DuckDB's own count of the rows and of the distinct partition values
    assert st["rows"] == 30_000 and st["partitions"] == 3
    for where in ("p IS NULL", "p = 'NULL'"):  # a change to one of the look-alike groups only
        engine.con.execute(f"UPDATE t SET a = a + 5 WHERE {where}")
        report = S.refresh(engine, "t")
        assert len(report.changed) == 1 and report.unchanged == 2, report.to_dict()
        assert_store_equals_fresh_pass(engine, info, "t")
    assert S.status(engine, "t")["rows"] == 30_000
    engine.close()


@pytest.mark.parametrize("named, changed", [
    ("p=NULL", "NULL"),  # SQL NULL, as status shows it
    ('p="NULL"', '"NULL"'),  # the text 'NULL', as status shows it (a JSON string)
    ("p='NULL'", '"NULL"'),  # the text 'NULL' as a SQL literal
])
def test_named_partitions_take_null_and_the_text_null_as_status_shows_them(tmp_path, named, changed):
    engine = DuckDBEngine(str(typed_partition_table(tmp_path / "typed.duckdb")))
    S.build(engine, Source.of_table("t"), ["a", "b"], S.PartitionSpec(("p",)), Settings(k=2, refine_passes=0))
    shown = {e["part"] for e in S.status(engine, "t")["partition_list"]}
    assert {"NULL", '"NULL"', "x"} == shown
    # both look-alike partitions change; the named one alone is rescanned (reference: the UPDATE's own WHERE)
    engine.con.execute("UPDATE t SET a = a + 5 WHERE p IS NULL OR p = 'NULL'")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # it matched a partition: no warning
        report = S.refresh(engine, "t", partitions=[named])
    assert report.changed == [changed] and report.unchanged == 0
    engine.close()


def test_a_named_partition_that_matches_nothing_is_a_warning_naming_it(built):
    engine, info, _ = built
    engine.close()
    res = CliRunner().invoke(main, ["refresh", engine.path, "--store", "meter_days", "--partitions",
                                    "day=2031-01-01,day=2026-01-03", "-q"])
    assert res.exit_code == 0, res.output
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("warning: --partitions day=2031-01-01 matched no partition"), lines
    assert "2026-01-03" not in lines[0]


def test_partition_labels_show_null_apart_from_the_string_null():
    assert S.part_label([None], ["p"]) == "NULL"
    assert S.part_label(["NULL"], ["p"]) == '"NULL"'
    assert S.part_label(["a/s=b", "c"], ["r", "s"]) != S.part_label(["a", "b/s=c"], ["r", "s"])


def test_fingerprints_and_cells_come_from_one_snapshot_while_a_writer_commits_in_between(built):
    engine, info, _ = built
    writer = engine.con.cursor()  # another connection to the same database, committing at once
    day = "DATE '2026-01-03'"
    writer.execute(f"UPDATE meter_days SET litres = litres + 10 WHERE day = {day}")

    def commit_a_change_mid_refresh():
        writer.execute(f"UPDATE meter_days SET flow_run_hours = flow_run_hours + 1000 WHERE day = {day}")

    report = S.refresh(engine, "meter_days", after_fingerprints=commit_a_change_mid_refresh)
    assert report.changed == ["2026-01-03"]
    writer.execute(f"UPDATE meter_days SET flow_run_hours = flow_run_hours - 1000 WHERE day = {day}")  # the writer restores the values
    assert S.refresh(engine, "meter_days").changed == []
    # reference: a from-scratch cell pass over the table as it now is
    assert_store_equals_fresh_cell_pass(engine, info)


@pytest.mark.parametrize("into", ["tillite_stores", "tillite_store_parts", "TILLITE_CELLS_METER_DAYS", "tillite_macro_registry"])
def test_labels_never_go_into_tillites_own_tables_whatever_the_flags(built, into):
    engine, info, _ = built
    before = store_snapshot(engine.con, info)
    with pytest.raises(S.InputError, match=f"--into {into}: names starting with tillite_ are kept"):
        S.label(engine, "meter_days", into, materialize=True, replace=True)
    assert store_snapshot(engine.con, info) == before
    engine.close()
    res = CliRunner().invoke(main, ["label", engine.path, "--store", "meter_days", "--into", into, "--materialize", "--replace"])
    assert res.exit_code == 1 and "Traceback" not in res.output
    assert [ln for ln in res.output.splitlines() if ln.strip()] == [f"Error: --into {into}: names starting with tillite_ are kept for tillite's own tables (store registry, cells, macro registry); choose another name"]


def test_k_given_to_a_refresh_is_kept_by_later_refreshes_and_shown_by_status(built):
    engine, _, _ = built
    assert S.refresh(engine, "meter_days", k=4).model.k == 4
    engine.con.execute("UPDATE meter_days SET litres = litres * 1.1 WHERE day = DATE '2026-01-09'")
    report = S.refresh(engine, "meter_days")
    assert report.model.k == 4 and not any("new" in w or "vanished" in w for w in report.warnings)
    assert S.status(engine, "meter_days")["settings"]["k"] == 4
    engine.close()
    res = CliRunner().invoke(main, ["store", "status", engine.path, "--store", "meter_days"])
    assert res.exit_code == 0 and "settings kept by refreshes: k=4" in res.output


def test_too_many_partitions_are_refused_naming_the_column_unless_asked(demo_db, monkeypatch):
    monkeypatch.setattr(S, "PARTITIONS_LIMIT", 5_000)
    monkeypatch.setattr(S, "PARTITIONS_WARN", 100)
    res = CliRunner().invoke(main, ["store", "build", str(demo_db), "-t", "meter_days", "-c", ",".join(COLS),
                                    "--partition-by", "litres", "--k", "3", "-q"])
    assert res.exit_code == 1 and "Traceback" not in res.output
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and "--partition-by litres gives more than 5,000 partitions" in lines[0] and "--many-partitions" in lines[0]
    res = CliRunner().invoke(main, ["store", "build", str(demo_db), "-t", "meter_days", "-c", ",".join(COLS),
                                    "--partition-by", "meter_id", "--k", "3", "-q"])
    # reference: the demo has 2,000 meters, over the warning level here
    assert res.exit_code == 0, res.output
    assert res.stderr.count("warning: --partition-by meter_id gives 2,000 partitions") == 1


def kmeans_reference_sse(con, k):
    """scikit-learn KMeans (n_init=10) inertia on the rows standardised by their exact mean and population sd."""
    from sklearn.cluster import KMeans

    x = np.column_stack(list(con.execute("SELECT a, b, c FROM readings").fetchnumpy().values()))
    z = (x - x.mean(axis=0)) / x.std(axis=0)
    return KMeans(n_clusters=k, n_init=10, random_state=0).fit(z).inertia_


def test_a_refresh_finds_a_newly_arrived_group_that_the_warm_start_misses_and_says_so(tmp_path):
    engine = DuckDBEngine(str(sixty_days_of_blobs(tmp_path / "blobs.duckdb")))
    S.build(engine, Source.of_table("readings"), ["a", "b", "c"], S.PartitionSpec(("day",)), Settings(k=4, refine_passes=0))
    engine.con.execute("UPDATE readings SET a = a + 50 WHERE day = 17")  # a new group of rows arrives in one day of 60
    report = S.refresh(engine, "readings")
    seeding = report.seeding
    assert seeding["kept"] == "fresh" and seeding["segments_changed"] and seeding["fresh_sse"] < 0.9 * seeding["warm_sse"]
    # the new group shows as a larger share of the variance left unexplained by the warm start: that is why it reseeded
    assert seeding["fresh"].startswith("run: the warm start leaves") and seeding["changed_share"] < S.RESEED_ROWS
    assert report.warnings[0].startswith("the segments changed: a fresh k-means++ seeding")
    assert "re-segmented from a fresh k-means++ seeding" in report.describe()
    # reference: scikit-learn KMeans on the rows themselves; the cell-level SSE can only be a little above it
    ref = kmeans_reference_sse(engine.con, 4)
    assert seeding["fresh_sse"] <= 1.05 * ref < seeding["warm_sse"]
    # the new group got its own segment: every row of day 17 in one segment, and nothing else in it
    assert 1000 in report.model.sizes
    # a further refresh with nothing new keeps the warm start (no warning)
    engine.con.execute("UPDATE readings SET b = b + 0.01 WHERE day = 3")
    again = S.refresh(engine, "readings")
    assert again.seeding["kept"] == "warm" and not any("segments changed" in w for w in again.warnings)
    assert again.seeding["fresh"].startswith("skipped")  # nothing new to find: no fresh k-means++ restarts
    engine.close()


@pytest.mark.parametrize("seeding, warm, runs", [
    ({"last_unexplained": 0.20, "changed_share": 0.01, "vanished": 0, "version": 3}, 0.201, False),
    ({"last_unexplained": 0.20, "changed_share": 0.01, "vanished": 0, "version": 3}, 0.203, True),
    ({"last_unexplained": 0.20, "changed_share": 0.05, "vanished": 0, "version": 3}, 0.20, True),
    ({"last_unexplained": 0.20, "changed_share": 0.01, "vanished": 1, "version": 3}, 0.20, True),
    ({"last_unexplained": 0.20, "changed_share": 0.01, "vanished": 0, "version": 20}, 0.20, True),
    ({"last_unexplained": None, "changed_share": 0.01, "vanished": 0, "version": 3}, 0.20, True),
])
def test_fresh_seeding_runs_only_when_the_documented_rule_gives_a_reason(seeding, warm, runs):
    # reference: the rule as README's "Store refresh" states it (1% more unexplained, 5% of rows, vanished, every 10th)
    assert (S.fresh_seeding_reason(warm, seeding) is not None) == runs


def test_refresh_warnings_are_printed_once_on_stderr(demo_db):
    runner = CliRunner()
    res = runner.invoke(main, ["store", "build", str(demo_db), "-t", "meter_days", "-c", ",".join(COLS), "--partition-by", "day", "--k", "4", "-q"])
    assert res.exit_code == 0 and res.output.startswith("store meter_days: cells in tillite_cells_meter_days; registry in tillite_stores")
    con = duckdb.connect(str(demo_db))
    con.execute("UPDATE meter_days SET zero_hours = 0, flow_run_hours = 24 WHERE day >= DATE '2026-01-05'")
    con.close()
    res = runner.invoke(main, ["refresh", str(demo_db), "--store", "meter_days", "--drift-warn", "0.1", "-q"])
    assert res.exit_code == 0
    warned = [ln for ln in res.stderr.splitlines() if ln.startswith("warning:")]
    assert warned and not [ln for ln in res.stdout.splitlines() if ln.startswith("warning:")]
    assert len(warned) == len(set(warned))


def test_a_refresh_while_another_process_holds_the_duckdb_file_says_the_file_is_locked(demo_db):
    import subprocess
    import sys

    S.build(DuckDBEngine(str(demo_db)), Source.of_table("meter_days"), COLS, S.PartitionSpec(("day",)), Settings(k=3, refine_passes=0))
    holder = subprocess.Popen(
        [sys.executable, "-c", f"import duckdb, sys; c = duckdb.connect({str(demo_db)!r}); print('open', flush=True); sys.stdin.read()"],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
    )
    try:
        assert holder.stdout.readline().strip() == "open"
        res = CliRunner().invoke(main, ["refresh", str(demo_db), "--store", "meter_days"])
    finally:
        holder.communicate("", timeout=30)
    assert res.exit_code == 1 and "Traceback" not in res.output
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith(f"Error: the database file {demo_db} is locked by another process"), lines
    assert "maybe a refresh" in lines[0] and "nothing was changed" in lines[0]


@pytest.mark.parametrize("change, needles", [
    ("ALTER TABLE meter_days RENAME TO meter_days_old", ["its source table meter_days cannot be read", "meter_days_old"]),
    ("ALTER TABLE meter_days DROP COLUMN zero_hours", ["column zero_hours of its source table meter_days not found"]),
    ("ALTER TABLE meter_days RENAME COLUMN day TO reading_day", ["column day of its source table meter_days not found",
                                                                 "reading_day"]),
])
@pytest.mark.parametrize("how", [[], ["--partitions", "day=2026-01-03"], ["--regrid"]])
def test_a_refresh_after_the_source_table_or_a_column_went_names_the_store_and_what_went(built, change, needles, how):
    engine, info, _ = built
    engine.con.execute(change)
    before = store_snapshot(engine.con, info)
    engine.close()
    res = CliRunner().invoke(main, ["refresh", engine.path, "--store", "meter_days", *how])
    assert res.exit_code == 1 and "Traceback" not in res.output
    lines = res.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("Error: store meter_days: ") and "nothing was changed" in lines[0], lines
    assert all(n in lines[0] for n in needles) and "Catalog Error" not in lines[0] and "Binder Error" not in lines[0], lines
    with duckdb.connect(engine.path) as con:
        assert store_snapshot(con, info) == before


def test_store_build_and_status_list_the_same_tables(demo_db):
    built = CliRunner().invoke(main, ["store", "build", str(demo_db), "-t", "meter_days", "-c", ",".join(COLS),
                                      "--partition-by", "day", "--k", "2", "-q"])
    assert built.exit_code == 0, built.output
    status = CliRunner().invoke(main, ["store", "status", str(demo_db), "--store", "meter_days"])
    assert status.exit_code == 0, status.output
    listed = [ln for ln in status.output.splitlines() if ln.startswith("store meter_days: cells in")]
    assert listed == [built.output.splitlines()[0]]
    # reference: DuckDB's own list of the tillite_ tables in the file
    with duckdb.connect(str(demo_db), read_only=True) as con:
        there = {t for (t,) in con.execute("SELECT table_name FROM information_schema.tables WHERE table_name LIKE 'tillite%'").fetchall()}
    assert set(listed[0].replace("store meter_days: cells in ", "").replace("; registry in", ",").split(", ")) == there


def test_a_file_store_is_named_after_its_folder(tmp_path):
    folder = tmp_path / "days"
    write_demo_parquet(folder, rows=3_000, days=3, seed=5)
    db = tmp_path / "store.duckdb"
    res = CliRunner().invoke(main, ["store", "build", str(folder / "**" / "*.parquet"), "--db", str(db), "-c", ",".join(COLS), "--k", "2", "-q"])
    assert res.exit_code == 0, res.output
    assert res.output.startswith("store days: cells in tillite_cells_days")
    res = CliRunner().invoke(main, ["store", "drop", str(db), "--store", "days"])
    assert res.exit_code == 0 and "tillite_cells_days" in res.output


def random_change(con, rng, next_id):
    """One random append, delete or update (the kinds a warehouse table sees); returns the next free row id."""
    days = [d for (d,) in con.execute("SELECT DISTINCT day FROM t ORDER BY day").fetchall()]
    kind = rng.choice(["append_rows", "append_day", "delete_rows", "delete_day", "update", "update_null"])
    day = int(rng.choice(days)) if days else 0
    if kind in ("append_rows", "append_day") or not days:
        if kind == "append_day" or not days:
            day = max(days, default=-1) + 1
        m = int(rng.integers(1, 300))
        frame = {  # noqa: F841 (scanned by name)
            "id": np.arange(next_id, next_id + m), "day": np.full(m, day),
            "a": rng.normal(rng.normal(0, 3), 1, m), "b": rng.normal(0, 2, m),
        }
        con.execute("INSERT INTO t SELECT id, day, a, b FROM frame")
        return next_id + m
    if kind == "delete_day":
        con.execute(f"DELETE FROM t WHERE day = {day}")
    elif kind == "delete_rows":
        con.execute(f"DELETE FROM t WHERE day = {day} AND id % {int(rng.integers(2, 6))} = 0")
    elif kind == "update":
        con.execute(f"UPDATE t SET a = a * {float(rng.uniform(0.5, 2.0))!r} + {float(rng.normal(0, 2))!r} WHERE day = {day} AND id % 3 = 1")
    else:
        con.execute(f"UPDATE t SET b = NULL WHERE day = {day} AND id % 7 = 2")
    return next_id


def test_property_a_refresh_after_random_changes_equals_a_fresh_build_on_the_same_grid(tmp_path):
    rng = np.random.default_rng(2026)  # fixed seed: the same change sets on every run
    n = 2_400
    write_table(tmp_path / "p.duckdb", "t", {"id": np.arange(n), "day": np.arange(n) % 12, "a": rng.normal(0, 3, n), "b": rng.normal(0, 2, n)})
    engine = DuckDBEngine(str(tmp_path / "p.duckdb"))
    spec, settings = S.PartitionSpec(("day",)), Settings(k=3, refine_passes=0)
    info, _ = S.build(engine, Source.of_table("t"), ["a", "b"], spec, settings, store="kept")
    next_id = n
    for round_ in range(8):
        for _ in range(int(rng.integers(1, 5))):
            next_id = random_change(engine.con, rng, next_id)
        S.refresh(engine, "kept")
        fresh, _ = S.build(engine, Source.of_table("t"), ["a", "b"], spec, settings, store=f"fresh{round_}", grid=info.grid)
        got, ref = cells_of_store(engine, info), cells_of_store(engine, fresh)
        np.testing.assert_array_equal(got[0], ref[0])  # cell keys identical
        np.testing.assert_array_equal(got[1], ref[1])  # counts identical
        for g, r in ((got[2], ref[2]), (got[3], ref[3])):  # sums within 1e-12 relative
            np.testing.assert_allclose(g, r, rtol=1e-12, atol=1e-12 * float(np.abs(r).max(initial=1.0)))
        assert got[4] == ref[4]
        # reference: DuckDB's count of the rows, outside the store
        assert int(got[1].sum()) + got[4] == engine.con.execute("SELECT count(*) FROM t").fetchone()[0]
    engine.close()


def cells_table_rows(engine, info):
    return sorted(map(repr, engine.con.execute(f'SELECT * FROM "{info.cells_table}"').fetchall()))


@pytest.mark.parametrize("named", [
    {"partitions": ["day=2026-01-03", "day=2026-01-04", "day=2026-01-05", "day=2026-02-15"]},
    {"where": "day BETWEEN DATE '2026-01-03' AND DATE '2026-01-05' OR day > DATE '2026-02-01'"},
])
def test_a_refresh_of_named_partitions_gives_the_same_cells_as_a_fingerprint_refresh(demo_db, tmp_path, named):
    import shutil

    copy = tmp_path / "copy.duckdb"
    spec, settings = S.PartitionSpec(("day",)), Settings(k=5, refine_passes=0)
    S.build(DuckDBEngine(str(demo_db)), Source.of_table("meter_days"), COLS, spec, settings)
    shutil.copy(demo_db, copy)
    by_name, by_print = DuckDBEngine(str(demo_db)), DuckDBEngine(str(copy))
    for engine in (by_name, by_print):
        change_partitions(engine.con)
    got = S.refresh(by_name, "meter_days", **named)
    ref = S.refresh(by_print, "meter_days")
    assert got.checked == "named partitions" and (got.new, got.changed, got.vanished) == (ref.new, ref.changed, ref.vanished)
    assert got.unchanged == 0
    # reference: the fingerprint refresh of the same database, row for row
    assert cells_table_rows(by_name, S.load(by_name, "meter_days")) == cells_table_rows(by_print, S.load(by_print, "meter_days"))
    assert S.refresh(by_name, "meter_days").changed == []  # the named refresh left true fingerprints behind
    assert_store_equals_fresh_cell_pass(by_name, S.load(by_name, "meter_days"))
    by_name.close()
    by_print.close()


@pytest.mark.parametrize("args, fault", [
    (["--where", "litres > 3"], "--where 'litres > 3': it names litres, which is not a partition column (day)"),
    (["--where", "day = (SELECT max(day) FROM meter_days)"], "it holds a subquery"),
    (["--where", "nextval('s') > 0"], "it holds a function call"),
    (["--where", "day"], "it is not a predicate"),
    (["--partitions", "day=someday"], "--partitions: a value of day (someday) does not read as DATE"),
    (["--partitions", "district=north"], "give COLUMN=VALUE with a partition column (day)"),
    (["--partitions", "day=2026-01-03", "--where", "day IS NULL"], "give --partitions or --where, not both"),
])
def test_named_partition_refresh_refuses_bad_input_in_one_line(built, args, fault):
    engine, info, _ = built
    before = store_snapshot(engine.con, info)
    engine.close()
    res = CliRunner().invoke(main, ["refresh", engine.path, "--store", "meter_days", *args])
    assert res.exit_code == 1 and "Traceback" not in res.output
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and fault in lines[0], lines
    con = duckdb.connect(engine.path)
    assert store_snapshot(con, info) == before
    con.close()


def test_segment_matching_assignment_equals_scipys_linear_sum_assignment():
    from scipy.optimize import linear_sum_assignment

    rng = np.random.default_rng(5)
    for trial in range(500):
        n, m = (int(v) for v in rng.integers(1, 10, 2))
        cost = rng.random((n, m)) * 10
        if trial % 3 == 0:
            cost = np.round(cost)  # ties
        rows, cols = S.min_cost_assignment(cost)
        ref_rows, ref_cols = linear_sum_assignment(cost)
        # reference: scipy's solver; the total cost is unique even where the assignment is not
        assert len(rows) == min(n, m) == len(set(cols.tolist())) == len(set(rows.tolist()))
        assert cost[rows, cols].sum() == pytest.approx(cost[ref_rows, ref_cols].sum(), abs=1e-9)


def test_partition_keys_are_one_to_one_with_typed_values_even_for_adversarial_text():
    from tillite import sqlgen

    tuples = [(None, None), ("NULL", None), (None, "NULL"), ("~", None), ("", None), (None, ""), ("", ""),
              ("a/s=b", "c"), ("a", "b/s=c"), ("1:a", "b"), ("1:a1:b", None), ("2:", "~"), ("é", "x"), ("e", "x")]
    con = duckdb.connect()
    con.execute("CREATE TABLE v (r VARCHAR, s VARCHAR)")
    con.executemany("INSERT INTO v VALUES (?, ?)", tuples)
    parts = sqlgen.Partitioning.of_columns(["r", "s"])
    inner = sqlgen.exp.select(*parts.projected()).from_("v")
    keyed = sqlgen.exp.select(sqlgen.exp.alias_(parts.key(), "part")).from_(sqlgen.subquery(inner, "x"))
    keys = [k for (k,) in con.execute(keyed.sql(dialect="duckdb")).fetchall()]
    # reference: Python's own count of the distinct typed tuples
    assert len(set(keys)) == len(set(tuples)) == len(tuples)


def test_store_drop_of_an_unknown_store_names_the_stores_there_in_one_line(built):
    engine, _, _ = built
    engine.close()
    res = CliRunner().invoke(main, ["store", "drop", engine.path, "--store", "nope"])
    assert res.exit_code == 1 and "Traceback" not in res.output
    assert [ln for ln in res.output.splitlines() if ln.strip()] == ["Error: store nope not found; stores here: meter_days"]
    res = CliRunner().invoke(main, ["store", "drop", engine.path, "--store", "meter_days"])
    assert res.exit_code == 0 and res.output.startswith("store meter_days dropped: tillite_cells_meter_days, tillite_stores")


def test_a_database_without_stores_is_told_so_in_one_line(tmp_path):
    db = write_table(tmp_path / "empty.duckdb", "t", {"a": np.arange(3.0)})
    res = CliRunner().invoke(main, ["refresh", str(db), "--store", "t"])
    assert res.exit_code == 1 and "Traceback" not in res.output
    assert [ln for ln in res.output.splitlines() if ln.strip()] == [
        "Error: no summary store here (table tillite_stores not found); build one with `tillite store build`"
    ]


def test_store_built_with_ward_keeps_ward(demo_db, tmp_path):
    """`store build --method ward` gives Ward's segments, the same as `tillite segment --method ward` on the
    same data (same frozen grid: same seed and budget), and refreshes keep the method."""
    runner = CliRunner()
    common = ["-t", "meter_days", "-c", ",".join(COLS), "--k", "4", "--method", "ward", "--refine-passes", "2", "-q"]
    res = runner.invoke(main, ["segment", str(demo_db), *common, "--out", str(tmp_path / "ward.json")])
    assert res.exit_code == 0, res.output
    res = runner.invoke(main, ["store", "build", str(demo_db), *common, "--partition-by", "day",
                               "--out", str(tmp_path / "store.json")])
    assert res.exit_code == 0, res.output
    from tillite.model import Model

    plain, stored = Model.read(str(tmp_path / "ward.json")), Model.read(str(tmp_path / "store.json"))
    assert stored.method == "ward" and stored.summary()["method"] == "ward"
    assert stored.sizes == plain.sizes
    np.testing.assert_allclose(stored.centroids, plain.centroids, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(stored.sse, plain.sse, rtol=1e-9)
    engine = DuckDBEngine(str(demo_db))
    try:
        S.label(engine, "meter_days", "ward_labels")
        # reference: DuckDB's own count of the labelled rows per segment, outside our SQL
        counts = dict(engine.con.execute('SELECT segment, count(*) FROM "ward_labels" GROUP BY segment').fetchall())
        assert [counts[i] for i in stored.segment_ids()] == stored.sizes
        engine.con.execute("UPDATE meter_days SET litres = litres * 1.1 WHERE day = DATE '2026-01-09'")
        report = S.refresh(engine, "meter_days")
        assert report.model.method == "ward" and S.status(engine, "meter_days")["settings"]["method"] == "ward"
    finally:
        engine.close()


def test_store_refuses_density_with_one_clear_line(demo_db):
    res = CliRunner().invoke(main, ["store", "build", str(demo_db), "-t", "meter_days", "-c", ",".join(COLS),
                                    "--partition-by", "day", "--k", "4", "--method", "density"])
    lines = res.output.strip().splitlines()
    # the command offers only the methods a store takes (a usage error); the API says why density is refused
    assert res.exit_code == 2 and len(lines) == 1 and "Traceback" not in res.output
    assert lines[0].startswith("Error:") and "--method" in lines[0] and "'kmeans', 'ward'" in lines[0], lines
    engine = DuckDBEngine(str(demo_db))
    try:
        with pytest.raises(S.ParameterError, match="method density cannot keep a store.*refresh"):
            S.build(engine, Source.of_table("meter_days"), COLS, S.PartitionSpec(("day",)), Settings(k=0, method="density"))
        assert S.STORES not in engine.tables()  # nothing was written
    finally:
        engine.close()


def _cli_ok(*args):
    res = CliRunner().invoke(main, [str(a) for a in args])
    assert res.exit_code == 0, res.output
    return res


def test_store_drop_leaves_its_label_views_as_plain_labels_that_label_model_replaces(demo_db, tmp_path):
    db, cols = str(demo_db), ",".join(COLS)
    _cli_ok("store", "build", db, "--table", "meter_days", "-c", cols, "--partition-by", "day", "--k", "3", "-q")
    _cli_ok("label", db, "--store", "meter_days", "--into", "meter_day_segments", "-q")
    dropped = _cli_ok("store", "drop", db, "--store", "meter_days")
    assert "plain labels, no longer refreshed: meter_day_segments" in dropped.output
    with duckdb.connect(db, read_only=True) as con:
        assert con.execute("SELECT comment FROM duckdb_views() WHERE view_name = 'meter_day_segments'").fetchone() == ("made by tillite: labels",)
    _cli_ok("segment", db, "--table", "meter_days", "-c", cols, "--k", "3", "-q", "-o", tmp_path / "m.json")
    _cli_ok("label", db, "--table", "meter_days", "--model", tmp_path / "m.json", "--into", "meter_day_segments", "-q")


def test_demo_runs_again_after_the_readme_store_example_and_takes_back_labels_of_a_gone_store(demo_db, tmp_path):
    db, cols = str(demo_db), ",".join(COLS)
    demo = ("demo", "--db", db, "--out", tmp_path / "demo.json", "--report", tmp_path / "r.html", "-q")
    _cli_ok(*demo)
    # the README's store section, as written there
    _cli_ok("store", "build", db, "--table", "meter_days", "-c", cols, "--partition-by", "day", "--k", "5", "-q")
    _cli_ok("label", db, "--store", "meter_days", "--into", "meter_day_store_segments", "-q")
    _cli_ok(*demo)
    # a view left marked by a store that no longer exists (as an earlier `store drop` left them) is taken back
    with duckdb.connect(db) as con:
        con.execute("COMMENT ON VIEW meter_day_segments IS 'made by tillite: labels of store gone'")
    _cli_ok(*demo)
    # a live store's labels under the demo's name: one line saying what to do
    _cli_ok("label", db, "--store", "meter_days", "--into", "meter_day_segments", "--replace", "-q")
    res = CliRunner().invoke(main, [str(a) for a in demo])
    assert res.exit_code == 1 and res.stderr.strip().startswith("Error:") and len(res.stderr.strip().splitlines()) == 1
    assert "store drop" in res.stderr


def test_a_refresh_that_finds_no_change_is_recorded_and_status_says_so(built):
    engine, _, _ = built
    report = S.refresh(engine, "meter_days")
    assert report.new == report.changed == report.vanished == []
    from tillite import store_history

    events = [r["event"] for r in store_history.history(engine, "meter_days")]
    assert events == ["build", "refresh"]
    st = S.status(engine, "meter_days")
    assert st["last_refresh"] and st["last_refresh_found_change"] is False
    path = engine.path
    engine.close()
    res = CliRunner().invoke(main, ["store", "status", path, "--store", "meter_days"])
    assert res.exit_code == 0, res.output
    assert "last refresh never" not in res.output and "(found no change)" in res.output
    assert "ids 0, 1, 2, 3, 4" in res.output


def _vacuum_tasks(engine):
    return engine.con.execute("SELECT current_setting('max_vacuum_tasks')").fetchone()[0]


def test_a_refresh_of_few_partitions_leaves_reclaiming_the_replaced_cells_to_every_nth_version(built, monkeypatch):
    engine, info, _ = built
    default = _vacuum_tasks(engine)  # reference: DuckDB's own setting (max_vacuum_tasks; 0 = no vacuum at a checkpoint)
    assert default > 0
    monkeypatch.setattr(S, "COMPACT_EVERY", 4)  # 12 partitions: one replaced is at most 1/4 of them
    seen = []
    for day in ("2026-01-02", "2026-01-03", "2026-01-04", "2026-01-05"):  # versions 1 to 4 (a build is version 0)
        engine.con.execute(f"UPDATE meter_days SET litres = litres * 1.5 WHERE day = DATE '{day}'")
        S.refresh(engine, info.name)
        seen.append(_vacuum_tasks(engine))
    assert seen == [0, 0, 0, default]
    engine.con.execute("UPDATE meter_days SET litres = litres * 1.5 WHERE day = DATE '2026-01-01'")
    S.refresh(engine, info.name)  # version 5: deferred again
    assert _vacuum_tasks(engine) == 0
    engine.con.execute("UPDATE meter_days SET litres = litres * 1.5 WHERE day >= DATE '2026-01-06'")
    S.refresh(engine, info.name)  # more than 1/4 of the partitions replaced: vacuumed now
    assert _vacuum_tasks(engine) == default
    assert_store_equals_fresh_cell_pass(engine, info)


def test_cells_replaced_by_deferred_refreshes_read_back_whole_from_the_closed_file(demo_db, monkeypatch):
    monkeypatch.setattr(S, "COMPACT_EVERY", 4)
    engine = DuckDBEngine(str(demo_db))
    info, _ = S.build(engine, Source.of_table("meter_days"), COLS, S.PartitionSpec(("day",)), Settings(k=5, refine_passes=0))
    engine.close()
    for day in ("2026-01-02", "2026-01-03"):
        con = duckdb.connect(str(demo_db))
        con.execute(f"UPDATE meter_days SET litres = litres * 1.5 WHERE day = DATE '{day}'")
        con.close()
        engine = DuckDBEngine(str(demo_db))
        S.refresh(engine, info.name)
        engine.close()  # its checkpoint leaves the replaced cells unreclaimed
    engine = DuckDBEngine(str(demo_db))
    assert_store_equals_fresh_cell_pass(engine, info)
    engine.close()
