"""The summary store kept in PostgreSQL: build, refresh, status and labels equal the DuckDB store.

The demo rows (12,000 meter-days over 12 days) go into a DuckDB file and, row
for row, into a fresh database on a throwaway PostgreSQL server (see
throwaway_servers.py; skipped loudly without one, a failure when CI=true).
Both get the same partition changes.  References: a from-scratch cell pass on
PostgreSQL's current table (PostgreSQL's own GROUP BY, outside the store), the
DuckDB store over the same rows (an independent engine), PostgreSQL's own
count(*), and numpy on the labelled rows.
"""

from __future__ import annotations

import itertools
import shutil
import time

import duckdb
import numpy as np
import pytest
from sqlglot import exp

from tillite import sqlgen
from tillite import store as S
from tillite.demo import DEMO_COLUMNS, build_demo_database
from tillite.engines import DuckDBEngine, PostgresEngine
from tillite.pipeline import Settings, run_cell_pass
from tillite.sqlgen import Source

from conftest import refresh_held_open, sorted_cells, store_snapshot


COLS = list(DEMO_COLUMNS)
TABLE = "meter_days"
SRC = Source.of_table(TABLE)
SETTINGS = dict(k=5, refine_passes=0)

#: The demo table as PostgreSQL holds it, plus an INTEGER partition column (days since 2026-01-01).
PG_COLUMNS = (
    ("meter_id", "INTEGER"), ("district", "TEXT"), ("day", "DATE"), ("litres", "DOUBLE PRECISION"),
    ("night_share", "DOUBLE PRECISION"), ("peak_litres", "DOUBLE PRECISION"), ("flow_run_hours", "INTEGER"),
    ("zero_hours", "INTEGER"), ("day_number", "INTEGER"),
)

#: Partition changes, as text both pg_and_duck_demo read the same way: an update, a whole partition deleted,
#: rows deleted inside one, and a new partition appended (a copy of 2026-01-06 forty days later).
CHANGES = (
    "UPDATE meter_days SET litres = litres * 2.5 WHERE day = DATE '2026-01-03'",
    "DELETE FROM meter_days WHERE day = DATE '2026-01-04'",
    "DELETE FROM meter_days WHERE day = DATE '2026-01-05' AND meter_id % 3 = 0",
    "INSERT INTO meter_days SELECT meter_id, district, day + 40, litres, night_share, peak_litres, flow_run_hours, "
    "zero_hours, day_number + 40 FROM meter_days WHERE day = DATE '2026-01-06'",
)
MORE_CHANGES = ("DELETE FROM meter_days WHERE day = DATE '2026-01-07'",)

#: What CHANGES do to each partitioning: (changed, vanished, new), partition texts in sorted order.
EXPECTED = {
    "day": (["2026-01-03", "2026-01-05"], ["2026-01-04"], ["2026-02-15"]),
    "day_number": (["2", "4"], ["3"], ["45"]),
}

_databases = itertools.count()


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo DuckDB file with day_number added, and its rows in PG_COLUMNS order."""
    path = tmp_path_factory.mktemp("demo") / "water.duckdb"
    build_demo_database(path, rows=12_000, days=12, seed=3)
    con = duckdb.connect(str(path))
    con.execute("ALTER TABLE meter_days ADD COLUMN day_number INTEGER")
    con.execute("UPDATE meter_days SET day_number = CAST(day - DATE '2026-01-01' AS INTEGER)")
    rows = con.execute(f"SELECT {', '.join(n for n, _ in PG_COLUMNS)} FROM meter_days").fetchall()
    con.close()
    return path, rows


@pytest.fixture
def pg_and_duck_demo(server, demo, tmp_path):
    """(PostgreSQL engine on a fresh database holding the demo rows, DuckDB engine on a fresh copy of the file)."""
    import psycopg
    from psycopg import sql

    name = f"store_{next(_databases)}"
    with psycopg.connect(server.conninfo, autocommit=True) as con:
        con.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
    conninfo = server.conninfo.replace("dbname=postgres", f"dbname={name}")
    with psycopg.connect(conninfo, autocommit=True) as con:
        columns = sql.SQL(", ").join(sql.SQL("{} {}").format(sql.Identifier(n), sql.SQL(t)) for n, t in PG_COLUMNS)
        con.execute(sql.SQL("CREATE TABLE {} ({})").format(sql.Identifier(TABLE), columns))
        with con.cursor().copy(sql.SQL("COPY {} FROM STDIN").format(sql.Identifier(TABLE))) as copy:
            for row in demo[1]:
                copy.write_row(row)
    shutil.copy(demo[0], tmp_path / "water.duckdb")
    pg, duck = PostgresEngine(conninfo), DuckDBEngine(str(tmp_path / "water.duckdb"))
    yield pg, duck
    pg.close()
    duck.close()


def run_pg(engine: PostgresEngine, statements) -> None:
    for text in statements:
        engine.con.execute(text)


def run_both(pg: PostgresEngine, duck: DuckDBEngine, statements) -> None:
    run_pg(pg, statements)
    for text in statements:
        duck.con.execute(text)


def pg_count(pg: PostgresEngine) -> int:
    return int(pg.con.execute('SELECT count(*) FROM "meter_days"').fetchone()[0])


def assert_same_cells(got, ref) -> None:
    """(cells, keys, skipped) equal: keys and n exactly, sums to 1e-9 relative."""
    a, b = sorted_cells(got[0], got[1]), sorted_cells(ref[0], ref[1])
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])
    np.testing.assert_allclose(a[2], b[2], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(a[3], b[3], rtol=1e-9, atol=1e-9)
    assert got[2] == ref[2]


def merged(engine, info):
    return S.merged_cells(engine, info.cells_table, info.grid, len(COLS))


def assert_pg_store_equals_fresh_cell_pass(pg: PostgresEngine, info) -> None:
    fresh = run_cell_pass(pg, SRC, COLS, info.grid)
    got = merged(pg, info)
    # reference: PostgreSQL's own GROUP BY over the current table, outside the store
    assert_same_cells(got, (fresh.cells, fresh.keys, fresh.skipped))
    # reference: PostgreSQL's count(*) of the rows
    assert int(got[0].n.sum()) + got[2] == pg_count(pg)


def build_pair(pg: PostgresEngine, duck: DuckDBEngine, partition_by: str, store: str | None = None):
    """The DuckDB store, then the PostgreSQL store on the same frozen grid (so cell keys can be compared)."""
    spec = S.PartitionSpec((partition_by,))
    duck_info, duck_model = S.build(duck, SRC, COLS, spec, Settings(**SETTINGS), store=store)
    pg_info, pg_model = S.build(pg, SRC, COLS, spec, Settings(**SETTINGS), store=store, grid=duck_info.grid)
    return (pg_info, pg_model), (duck_info, duck_model)


def view_definition(pg: PostgresEngine, name: str) -> str:
    return pg.con.execute("SELECT pg_get_viewdef(%s::regclass)", (name,)).fetchone()[0]


@pytest.mark.parametrize("partition_by", ["day", "day_number"])
def test_postgres_store_equals_a_fresh_cell_pass_and_the_duckdb_store_through_changes(pg_and_duck_demo, partition_by):
    pg, duck = pg_and_duck_demo
    (pg_info, _), (duck_info, _) = build_pair(pg, duck, partition_by)
    assert S.status(pg, TABLE)["partitions"] == 12
    assert_pg_store_equals_fresh_cell_pass(pg, pg_info)
    # reference: the DuckDB store over the same rows on the same grid
    assert_same_cells(merged(pg, pg_info), merged(duck, duck_info))
    assert S.refresh(pg, TABLE).unchanged == 12

    run_both(pg, duck, CHANGES)
    got, ref = S.refresh(pg, TABLE), S.refresh(duck, TABLE)
    # reference: the partitions CHANGES touched, and what the DuckDB store detected
    assert (got.changed, got.vanished, got.new) == EXPECTED[partition_by]
    assert (got.changed, got.vanished, got.new, got.unchanged) == (ref.changed, ref.vanished, ref.new, ref.unchanged)
    assert_pg_store_equals_fresh_cell_pass(pg, pg_info)
    assert_same_cells(merged(pg, pg_info), merged(duck, duck_info))

    run_both(pg, duck, MORE_CHANGES)
    got, ref = S.refresh(pg, TABLE), S.refresh(duck, TABLE)
    assert got.vanished == ref.vanished and len(got.vanished) == 1 and not (got.new or got.changed)
    assert_pg_store_equals_fresh_cell_pass(pg, pg_info)
    assert_same_cells(merged(pg, pg_info), merged(duck, duck_info))
    assert S.load(pg, TABLE).version == 2


def test_postgres_store_segments_equal_the_duckdb_store_after_a_refresh(pg_and_duck_demo):
    pg, duck = pg_and_duck_demo
    (_, pg_model), (_, duck_model) = build_pair(pg, duck, "day")
    # reference: the DuckDB store's model from the same cells
    np.testing.assert_allclose(pg_model.centroids, duck_model.centroids, rtol=1e-9, atol=1e-9)
    run_both(pg, duck, CHANGES)
    got, ref = S.refresh(pg, TABLE).model, S.refresh(duck, TABLE).model
    assert got.segment_ids() == ref.segment_ids() and got.sizes == ref.sizes
    np.testing.assert_allclose(got.centroids, ref.centroids, rtol=1e-9, atol=1e-9)


def test_failure_inside_a_postgres_refresh_leaves_the_store_row_for_row_as_before(pg_and_duck_demo):
    pg, _ = pg_and_duck_demo
    info, _ = S.build(pg, SRC, COLS, S.PartitionSpec(("day",)), Settings(**SETTINGS))
    S.label(pg, TABLE, "water_labels")
    before, view_before = store_snapshot(pg.con, info), view_definition(pg, "water_labels")
    run_pg(pg, CHANGES)

    def fail():
        raise RuntimeError("injected failure after the cell pass")

    with pytest.raises(RuntimeError, match="injected"):
        S.refresh(pg, TABLE, before_commit=fail)
    # reference: PostgreSQL's own rows of the store tables and its stored view definition, read back
    assert store_snapshot(pg.con, info) == before
    assert view_definition(pg, "water_labels") == view_before
    report = S.refresh(pg, TABLE)
    assert (report.changed, report.vanished, report.new) == EXPECTED["day"]
    assert_pg_store_equals_fresh_cell_pass(pg, info)


def test_second_concurrent_postgres_refresh_fails_at_once_with_store_busy(pg_and_duck_demo):
    pg, _ = pg_and_duck_demo
    info, _ = S.build(pg, SRC, COLS, S.PartitionSpec(("day",)), Settings(**SETTINGS))
    run_pg(pg, CHANGES)
    second = PostgresEngine(pg.conninfo)
    with refresh_held_open(pg, TABLE):
        t0 = time.perf_counter()
        with pytest.raises(S.StoreBusy, match="changed by another refresh"):
            S.refresh(second, TABLE)
        # FOR UPDATE NOWAIT: no waiting for the first refresh, which holds its row for up to 30 s
        assert time.perf_counter() - t0 < 10
    assert S.load(second, TABLE).version == 1
    assert S.refresh(second, TABLE).unchanged == 12  # the first refresh's work is all there
    assert_pg_store_equals_fresh_cell_pass(second, info)
    second.close()


def test_postgres_refresh_that_loaded_the_store_before_another_committed_fails_cleanly(pg_and_duck_demo):
    pg, _ = pg_and_duck_demo
    info, _ = S.build(pg, SRC, COLS, S.PartitionSpec(("day",)), Settings(**SETTINGS))
    run_pg(pg, CHANGES)
    other = PostgresEngine(pg.conninfo)
    done: list[S.RefreshReport] = []

    def meanwhile(stage: str, _message: str) -> None:
        if stage == "fingerprints" and not done:  # between this refresh's load and its transaction
            done.append(S.refresh(other, TABLE))

    with pytest.raises(S.StoreBusy, match="changed by another refresh"):
        S.refresh(pg, TABLE, progress=meanwhile)
    assert done and done[0].changed == EXPECTED["day"][0]
    assert S.load(pg, TABLE).version == 1
    assert_pg_store_equals_fresh_cell_pass(pg, info)
    other.close()


def test_postgres_labels_view_follows_the_refreshed_model_and_status_counts_rows(pg_and_duck_demo):
    pg, _ = pg_and_duck_demo
    S.build(pg, SRC, COLS, S.PartitionSpec(("day",)), Settings(**SETTINGS))
    assert S.label(pg, TABLE, "water_labels") == "view water_labels"
    run_pg(pg, CHANGES)
    model = S.refresh(pg, TABLE).model
    names = ", ".join(f'"{c}"' for c in COLS)
    got = pg.con.execute(f'SELECT {names}, "segment" FROM "water_labels"').fetchall()
    x = np.array([[np.nan if v is None else float(v) for v in r[:-1]] for r in got])
    segments = np.array([-99 if r[-1] is None else r[-1] for r in got])
    ok = np.isfinite(x).all(axis=1)
    z = (x[ok] - np.array(model.center)) / np.array(model.scale)
    d2 = ((z[:, None, :] - np.array(model.centroids_scaled)[None]) ** 2).sum(axis=2)
    # reference: numpy's nearest centroid of the refreshed model, and PostgreSQL's count(*)
    np.testing.assert_array_equal(segments[ok], np.array(model.segment_ids())[d2.argmin(axis=1)])
    assert (segments[~ok] == -99).all() and len(got) == pg_count(pg)
    st = S.status(pg, TABLE)
    assert st["partitions"] == 12 and st["rows"] == pg_count(pg)
    assert st["usable_rows"] + st["skipped_rows"] == pg_count(pg) and not st["warnings"]


def test_postgres_fingerprints_ignore_row_order_and_tell_null_from_values(pg_and_duck_demo):
    pg, _ = pg_and_duck_demo
    run_pg(pg, [
        'CREATE TABLE "probe" ("part" INTEGER, "a" DOUBLE PRECISION, "b" DOUBLE PRECISION)',
        # partitions 1 and 2: the same rows in another order; 3: the NULL in the other column; 4: the NULL
        # moved to the other row (same column sums); 5: a zero for the NULL; 6: 0.3 where 7 has the double above it
        "INSERT INTO probe VALUES (1, 1.5, NULL), (1, 2, 3), (2, 2, 3), (2, 1.5, NULL), (3, NULL, 1.5), (3, 2, 3), "
        "(4, 1.5, 3), (4, 2, NULL), (5, 1.5, 0), (5, 2, 3), (6, 0.3, 0), (6, 2, 3), (7, 0.30000000000000004, 0), (7, 2, 3)",
    ])
    got = pg.query(sqlgen.fingerprint_statement(Source.of_table("probe"), ["a", "b"], sqlgen.Partitioning.of_columns(["part"]), "postgres"))
    fp = dict(zip(got["pv0"], got["fingerprint"]))  # keyed by the partition value as text
    # reference: the definition of the fingerprint (a sum over rows: order-free; a hash of each row: NULLs,
    # column boundaries and the shortest exact digits of a double all count)
    assert fp["1"] == fp["2"]
    assert len({fp["1"], fp["3"], fp["4"], fp["5"], fp["6"], fp["7"]}) == 6
    assert all(int(r) == 2 for r in got["rows"])


def test_partition_filter_finds_each_partition_again_for_every_type_postgres_describes(pg_and_duck_demo):
    pg, _ = pg_and_duck_demo
    run_pg(pg, [
        'CREATE TABLE "typed" ("d" DATE, "i" INTEGER, "b" BIGINT, "s" SMALLINT, "t" TEXT, "v" VARCHAR(20), '
        '"ts" TIMESTAMP, "tz" TIMESTAMPTZ, "n" NUMERIC, "f" DOUBLE PRECISION, "r" REAL, "o" BOOLEAN, "x" DOUBLE PRECISION)',
        "INSERT INTO typed VALUES ('2026-01-03', -7, 9007199254740993, 3, 'it''s', 'a/b=c', '2026-01-03 04:05:06.789', "
        "'2026-01-03 04:05:06.789+02', 12.345678901234567890, 0.30000000000000004, 0.1, true, 1), "
        "(NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, 2)",
    ])
    src = Source.of_table("typed")
    names = [n for n, _ in pg.describe(src) if n != "x"]
    parts = sqlgen.Partitioning.of_columns(names)
    got = pg.query(sqlgen.fingerprint_statement(src, ["x"], parts, "postgres"))
    types = dict(pg.describe(src))
    for i in range(len(got["part"])):
        values = [None if np.ma.getmaskarray(got[f"pv{j}"])[i] else got[f"pv{j}"][i] for j in range(len(names))]
        only = parts.filter([types[n] for n in names], [values], "postgres")
        found = pg.query(exp.select(sqlgen.col("x")).from_(sqlgen.table_name("typed")).where(only))
        # reference: the row PostgreSQL holds for that partition, found again from its text values
        assert list(found["x"]) == [1.0 if values[0] is not None else 2.0], values
    assert len(got["part"]) == 2


def test_store_commands_run_on_a_postgresql_url(server, pg_and_duck_demo):
    from click.testing import CliRunner

    from tillite.cli import main

    pg, _ = pg_and_duck_demo
    url = server.url.replace("@/postgres?", f"@/{pg.conninfo.split('dbname=')[1]}?")  # this test's database
    runner = CliRunner()
    done = runner.invoke(main, ["store", "build", url, "-t", TABLE, "-c", ",".join(COLS), "--partition-by", "day_number", "--k", "4", "-q"])
    assert done.exit_code == 0, done.output
    done = runner.invoke(main, ["label", url, "--store", TABLE, "--into", "water_segments", "-q"])
    assert done.exit_code == 0 and "view water_segments" in done.output, done.output
    done = runner.invoke(main, ["store", "status", url, "--store", TABLE])
    assert done.exit_code == 0 and "partitions: 12" in done.output, done.output
    run_pg(pg, CHANGES)
    done = runner.invoke(main, ["refresh", url, "--store", TABLE, "--json", "-q"])
    assert done.exit_code == 0, done.output
    # reference: the partitions CHANGES touched
    assert '"vanished": [\n      "3"\n    ]' in done.output


# ----------------------------------------------------------------------------- integrity (issue 10)

from conftest import sixty_days_of_blobs, typed_partition_table  # noqa: E402


def copy_table_to_postgres(pg: PostgresEngine, duck_path, table: str, columns) -> None:
    """The DuckDB table's rows, as they are, into a new PostgreSQL table of the given column types."""
    from psycopg import sql

    con = duckdb.connect(str(duck_path))
    rows = con.execute(f"SELECT {', '.join(n for n, _ in columns)} FROM {table}").fetchall()
    con.close()
    spec = sql.SQL(", ").join(sql.SQL("{} {}").format(sql.Identifier(n), sql.SQL(t)) for n, t in columns)
    pg.con.execute(sql.SQL("CREATE TABLE {} ({})").format(sql.Identifier(table), spec))
    with pg.con.cursor().copy(sql.SQL("COPY {} FROM STDIN").format(sql.Identifier(table))) as copy:
        for row in rows:
            copy.write_row(row)


def assert_pg_store_equals_fresh_pass_of(pg: PostgresEngine, info, table: str) -> None:
    fresh = run_cell_pass(pg, Source.of_table(table), info.columns, info.grid)
    # reference: PostgreSQL's own GROUP BY over the current table, outside the store
    assert_same_cells(S.merged_cells(pg, info.cells_table, info.grid, len(info.columns)), (fresh.cells, fresh.keys, fresh.skipped))


TYPED_COLUMNS = (("a", "DOUBLE PRECISION"), ("b", "DOUBLE PRECISION"), ("p", "TEXT"), ("r", "TEXT"), ("s", "TEXT"), ("i", "INTEGER"), ("d", "DATE"))


@pytest.mark.parametrize("partition_by", [("p",), ("r", "s"), ("i", "d", "p")])
def test_postgres_partitions_are_told_apart_by_their_typed_values(pg_and_duck_demo, tmp_path, partition_by):
    pg, _ = pg_and_duck_demo
    copy_table_to_postgres(pg, typed_partition_table(tmp_path / "typed.duckdb"), "t", TYPED_COLUMNS)
    info, _ = S.build(pg, Source.of_table("t"), ["a", "b"], S.PartitionSpec(partition_by), Settings(k=2, refine_passes=0))
    st = S.status(pg, "t")
    assert st["rows"] == 30_000 and st["partitions"] == 3
    for where in ("p IS NULL", "p = 'NULL'"):
        pg.con.execute(f"UPDATE t SET a = a + 5 WHERE {where}")
        report = S.refresh(pg, "t")
        assert len(report.changed) == 1 and report.unchanged == 2, report.to_dict()
        assert_pg_store_equals_fresh_pass_of(pg, info, "t")


def test_postgres_fingerprints_and_cells_come_from_one_snapshot_while_a_writer_commits_in_between(pg_and_duck_demo):
    import psycopg

    pg, _ = pg_and_duck_demo
    info, _ = S.build(pg, SRC, COLS, S.PartitionSpec(("day",)), Settings(**SETTINGS))
    day = "DATE '2026-01-03'"
    with psycopg.connect(pg.conninfo, autocommit=True) as writer:
        writer.execute(f"UPDATE meter_days SET litres = litres + 10 WHERE day = {day}")

        def commit_a_change_mid_refresh():  # a writer commits between the fingerprints and the cell pass
            writer.execute(f"UPDATE meter_days SET flow_run_hours = flow_run_hours + 1000 WHERE day = {day}")

        assert S.refresh(pg, TABLE, after_fingerprints=commit_a_change_mid_refresh).changed == ["2026-01-03"]
        writer.execute(f"UPDATE meter_days SET flow_run_hours = flow_run_hours - 1000 WHERE day = {day}")  # and restores
    assert S.refresh(pg, TABLE).changed == []
    assert_pg_store_equals_fresh_cell_pass(pg, info)


def test_postgres_refresh_finds_a_newly_arrived_group_that_the_warm_start_misses(pg_and_duck_demo, tmp_path):
    pg, duck = pg_and_duck_demo
    copy_table_to_postgres(pg, sixty_days_of_blobs(tmp_path / "blobs.duckdb"), "readings",
                           (("a", "DOUBLE PRECISION"), ("b", "DOUBLE PRECISION"), ("c", "DOUBLE PRECISION"), ("day", "BIGINT")))
    S.build(pg, Source.of_table("readings"), ["a", "b", "c"], S.PartitionSpec(("day",)), Settings(k=4, refine_passes=0))
    pg.con.execute("UPDATE readings SET a = a + 50 WHERE day = 17")
    report = S.refresh(pg, "readings")
    assert report.seeding["kept"] == "fresh" and report.seeding["segments_changed"]
    assert report.warnings[0].startswith("the segments changed") and 1000 in report.model.sizes


def test_postgres_refresh_of_named_partitions_gives_the_same_cells_as_a_fingerprint_refresh(pg_and_duck_demo):
    pg, _ = pg_and_duck_demo
    info, _ = S.build(pg, SRC, COLS, S.PartitionSpec(("day",)), Settings(**SETTINGS))
    run_pg(pg, CHANGES)
    got = S.refresh(pg, TABLE, where="day BETWEEN DATE '2026-01-03' AND DATE '2026-01-05' OR day > DATE '2026-02-01'")
    assert (got.changed, got.vanished, got.new) == EXPECTED["day"]
    assert S.refresh(pg, TABLE).unchanged == 12  # 12 - 1 vanished + 1 new, all verified by the named refresh
    assert_pg_store_equals_fresh_cell_pass(pg, info)


def test_postgres_within_store_equals_the_duckdb_one_and_refreshes_only_the_changed_district(pg_and_duck_demo):
    from engine_checks import assert_same_within_model

    pg, duck = pg_and_duck_demo
    spec, settings = S.PartitionSpec(("day",)), Settings(**{**SETTINGS, "k": 3}, within="district")
    duck_info, duck_model = S.build(duck, SRC, COLS, spec, settings)
    _, pg_model = S.build(pg, SRC, COLS, spec, settings, grid=duck_info.grid)
    # reference: the DuckDB store over the same rows on the same grid
    assert_same_within_model(pg_model, duck_model)
    district = duck_model.within["groups"][0]["value"]
    run_both(pg, duck, [f"UPDATE meter_days SET litres = litres * 1.5 WHERE day = DATE '2026-01-03' AND district = '{district}'"])
    got, ref = S.refresh(pg, TABLE), S.refresh(duck, TABLE)
    assert got.groups == ref.groups == {"resegmented": [district], "new": [], "vanished": [],
                                        "kept": len(duck_model.within["groups"]) - 1}
    assert_same_within_model(got.model, ref.model)
    assert [g["ids"] for g in got.model.within["groups"]] == [g["ids"] for g in ref.model.within["groups"]]


#: A new partition whose district was never seen at build ('newtown'), and a listed district renamed in one day.
UNSEEN_DISTRICTS = (
    "INSERT INTO meter_days SELECT meter_id, 'newtown', day + 50, litres, night_share, peak_litres, flow_run_hours, "
    "zero_hours, day_number + 50 FROM meter_days WHERE day = DATE '2026-01-08'",
    "UPDATE meter_days SET district = 'riverside' WHERE day = DATE '2026-01-09' AND meter_id % 2 = 0",
)


def test_postgres_store_with_a_categorical_column_equals_the_duckdb_store_through_unseen_categories(pg_and_duck_demo):
    pg, duck = pg_and_duck_demo
    spec, settings = S.PartitionSpec(("day",)), Settings(categorical=("district",), max_categories=4, **SETTINGS)
    duck_info, _ = S.build(duck, SRC, ["litres", "night_share"], spec, settings)
    specs = S.store_categories(duck_info)
    pg_info, _ = S.build(pg, SRC, ["litres", "night_share"], spec, settings, grid=duck_info.grid, categories=specs)
    run_both(pg, duck, CHANGES + UNSEEN_DISTRICTS)
    pg_report, duck_report = S.refresh(pg, TABLE), S.refresh(duck, TABLE)
    # reference: the DuckDB store over the same rows (an independent engine)
    assert pg_report.other_rows == duck_report.other_rows
    # reference: PostgreSQL's own count of the new partition's rows (all 'newtown', never seen at build)
    newtown = int(pg.con.execute("SELECT count(*) FROM meter_days WHERE district = 'newtown'").fetchone()[0])
    assert pg_report.other_rows["district"]["rows"] >= newtown > 0
    pg_info, duck_info = S.load(pg, TABLE), S.load(duck, TABLE)
    assert_same_cells(S.store_cells(pg, pg_info.cells_table, pg_info.grid, pg_info.columns, specs),
                      S.store_cells(duck, duck_info.cells_table, duck_info.grid, duck_info.columns, specs))
    assert pg_info.model.sizes == duck_info.model.sizes
    assert pg_info.model.categorical == duck_info.model.categorical
