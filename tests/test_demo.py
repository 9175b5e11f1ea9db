"""Tests of the invented demo-data generator (tillite.demo).

The data are invented; these checks are about the generator's contract (size,
types, determinism, ranges, failed reads, layout, errors), not about correctness
against an outside reference, except the k-means check, which uses scikit-learn's
KMeans and adjusted_rand_score as the outside yardstick for "the kinds separate".
"""

from __future__ import annotations

import math
import re
from functools import partial
from pathlib import Path

import duckdb
import numpy as np
import pytest

from tillite import demo
from tillite.errors import ParameterError
from tillite.demo import (
    DEMO_COLUMNS,
    DISTRICTS,
    KINDS,
    DemoSummary,
    build_demo_database,
    demo_select,
    write_demo_parquet,
)

from conftest import fetch_rows

ROWS = 5_000

EXPECTED_TYPES = [
    ("meter_id", "INTEGER"),
    ("district", "VARCHAR"),
    ("day", "DATE"),
    ("litres", "DOUBLE"),
    ("night_share", "DOUBLE"),
    ("peak_litres", "DOUBLE"),
    ("flow_run_hours", "INTEGER"),
    ("zero_hours", "INTEGER"),
]


_fetch = partial(fetch_rows, read_only=True)


@pytest.fixture(scope="module")
def demo_5k(tmp_path_factory: pytest.TempPathFactory) -> DemoSummary:
    path = tmp_path_factory.mktemp("demo") / "saltmere.duckdb"
    return build_demo_database(path, rows=ROWS, days=10, seed=7)


# --------------------------------------------------------------------------- shape and types


def test_summary_and_row_count(demo_5k: DemoSummary) -> None:
    assert demo_5k.rows == ROWS
    assert demo_5k.days == 10
    assert demo_5k.meters == math.ceil(ROWS / 10)
    assert demo_5k.table == "meter_days"
    assert demo_5k.seed == 7
    assert set(demo_5k.kinds) == {kind.name for kind in KINDS}
    assert sum(demo_5k.kinds.values()) == demo_5k.meters
    ((n, meters, days),) = _fetch(
        demo_5k.path, "SELECT count(*), count(DISTINCT meter_id), count(DISTINCT day) FROM meter_days"
    )
    assert (n, meters, days) == (ROWS, demo_5k.meters, 10)
    ((n_meters,),) = _fetch(demo_5k.path, "SELECT count(*) FROM meters")
    assert n_meters == demo_5k.meters


def test_column_order_and_types(demo_5k: DemoSummary) -> None:
    described = _fetch(demo_5k.path, "DESCRIBE meter_days")
    assert [(row[0], row[1]) for row in described] == EXPECTED_TYPES
    described = _fetch(demo_5k.path, "DESCRIBE meters")
    assert [(row[0], row[1]) for row in described] == [
        ("meter_id", "INTEGER"),
        ("district", "VARCHAR"),
        ("kind", "VARCHAR"),
    ]
    assert set(DEMO_COLUMNS) <= {name for name, _ in EXPECTED_TYPES}


def test_days_are_consecutive_from_2026_01_01(demo_5k: DemoSummary) -> None:
    ((first, last, bad),) = _fetch(
        demo_5k.path,
        """
        SELECT min(day), max(day),
               count(*) FILTER (WHERE day <> DATE '2026-01-01' + CAST(rn AS INTEGER))
        FROM (SELECT day, row_number() OVER (PARTITION BY meter_id ORDER BY day) - 1 AS rn FROM meter_days)
        """,
    )
    assert str(first) == "2026-01-01"
    assert str(last) == "2026-01-10"
    assert bad == 0


def test_last_meter_may_have_fewer_days(tmp_path: Path) -> None:
    summary = build_demo_database(tmp_path / "d.duckdb", rows=1_003, days=10, seed=3)
    assert summary.meters == 101
    rows = _fetch(summary.path, "SELECT meter_id, count(*) FROM meter_days GROUP BY ALL ORDER BY meter_id DESC LIMIT 2")
    assert rows == [(100, 3), (99, 10)]
    ((n,),) = _fetch(summary.path, "SELECT count(*) FROM meter_days")
    assert n == 1_003


def test_more_days_than_rows_gives_one_meter(tmp_path: Path) -> None:
    summary = build_demo_database(tmp_path / "d.duckdb", rows=1_000, days=5_000, seed=3)
    assert summary.meters == 1
    ((n, meters, days),) = _fetch(
        summary.path, "SELECT count(*), count(DISTINCT meter_id), count(DISTINCT day) FROM meter_days"
    )
    assert (n, meters, days) == (1_000, 1, 1_000)


# --------------------------------------------------------------------------- determinism


def _table_digest(path: Path, table: str = "meter_days") -> list[tuple]:
    # an order-independent digest plus the first rows in key order
    return _fetch(
        path,
        f"""
        SELECT count(*), sum(hash(meter_id, district, day, litres, night_share,
                                  peak_litres, flow_run_hours, zero_hours)::HUGEINT)
        FROM "{table}"
        """,
    ) + _fetch(path, f'SELECT * FROM "{table}" ORDER BY meter_id, day LIMIT 50')


def test_same_seed_gives_identical_tables(tmp_path: Path) -> None:
    a = build_demo_database(tmp_path / "a.duckdb", rows=3_000, days=30, seed=11)
    b = build_demo_database(tmp_path / "b.duckdb", rows=3_000, days=30, seed=11)
    assert a.kinds == b.kinds
    assert _table_digest(a.path) == _table_digest(b.path)
    con = duckdb.connect()
    try:
        con.execute(f"ATTACH '{a.path}' AS a (READ_ONLY)")
        con.execute(f"ATTACH '{b.path}' AS b (READ_ONLY)")
        for table in ("meter_days", "meters"):
            ((diff,),) = con.execute(
                f"SELECT count(*) FROM ((FROM a.{table} EXCEPT ALL FROM b.{table}) "
                f"UNION ALL (FROM b.{table} EXCEPT ALL FROM a.{table}))"
            ).fetchall()
            assert diff == 0, table
    finally:
        con.close()


def test_different_seeds_differ(tmp_path: Path) -> None:
    a = build_demo_database(tmp_path / "a.duckdb", rows=3_000, days=30, seed=11)
    b = build_demo_database(tmp_path / "b.duckdb", rows=3_000, days=30, seed=12)
    assert _table_digest(a.path) != _table_digest(b.path)
    la = np.array([r[0] for r in _fetch(a.path, "SELECT litres FROM meter_days ORDER BY meter_id, day")], dtype=float)
    lb = np.array([r[0] for r in _fetch(b.path, "SELECT litres FROM meter_days ORDER BY meter_id, day")], dtype=float)
    both = ~np.isnan(la) & ~np.isnan(lb)
    assert np.mean(la[both] == lb[both]) < 0.05


def test_prefix_stability_across_sizes(tmp_path: Path) -> None:
    # a row depends only on its (meter, day) number and the seed, not on the table size
    small = build_demo_database(tmp_path / "s.duckdb", rows=1_000, days=10, seed=5)
    large = build_demo_database(tmp_path / "l.duckdb", rows=4_000, days=10, seed=5)
    first = _fetch(small.path, "SELECT * FROM meter_days ORDER BY meter_id, day")
    head = _fetch(large.path, "SELECT * FROM meter_days WHERE meter_id < 100 ORDER BY meter_id, day")
    assert first == head


def test_demo_select_runs_standalone() -> None:
    sql = demo_select(rows=1_000, days=10, seed=7).sql(dialect="duckdb")
    con = duckdb.connect()
    try:
        ((n,),) = con.execute(f"SELECT count(*) FROM ({sql})").fetchall()
    finally:
        con.close()
    assert n == 1_000


def test_sql_is_built_with_quoted_names_and_literals() -> None:
    sql = demo_select(rows=1_000, days=10, seed=424242).sql(dialect="duckdb")
    assert '"meter_id"' in sql and '"night_share"' in sql
    assert "424242" in sql  # the seed goes in as a literal
    assert ":" not in sql.replace("'2026-01-01'", "")  # no placeholders left over


# --------------------------------------------------------------------------- values


def test_failed_reads_share(tmp_path: Path) -> None:
    summary = build_demo_database(tmp_path / "f.duckdb", rows=200_000, days=50, seed=7)
    ((n, null_litres, nan_night, null_other),) = _fetch(
        summary.path,
        """
        SELECT count(*),
               count(*) FILTER (WHERE litres IS NULL),
               count(*) FILTER (WHERE isnan(night_share)),
               count(*) FILTER (WHERE meter_id IS NULL OR district IS NULL OR day IS NULL
                                OR night_share IS NULL OR peak_litres IS NULL
                                OR flow_run_hours IS NULL OR zero_hours IS NULL)
        FROM meter_days
        """,
    )
    # 0.15 % NULL litres and 0.05 % NaN night share: binomial sd is about 0.009 % and 0.005 %
    assert 0.0011 < null_litres / n < 0.0019
    assert 0.0002 < nan_night / n < 0.0008
    assert 0.0015 < (null_litres + nan_night) / n < 0.0025
    assert null_other == 0
    ((both,),) = _fetch(summary.path, "SELECT count(*) FROM meter_days WHERE litres IS NULL AND isnan(night_share)")
    assert both == 0


def test_value_ranges(demo_5k: DemoSummary) -> None:
    ((bad_share, bad_hours, bad_sum, bad_peak, bad_litres, bad_district),) = _fetch(
        demo_5k.path,
        f"""
        SELECT
          count(*) FILTER (WHERE NOT isnan(night_share) AND (night_share < 0 OR night_share > 1)),
          count(*) FILTER (WHERE flow_run_hours NOT BETWEEN 0 AND 24 OR zero_hours NOT BETWEEN 0 AND 24),
          count(*) FILTER (WHERE flow_run_hours + zero_hours > 24),
          count(*) FILTER (WHERE peak_litres < 0 OR peak_litres > litres),
          count(*) FILTER (WHERE litres < 0),
          count(*) FILTER (WHERE district NOT IN ({", ".join("'" + d + "'" for d in DISTRICTS)}))
        FROM meter_days
        """,
    )
    assert (bad_share, bad_hours, bad_sum, bad_peak, bad_litres, bad_district) == (0, 0, 0, 0, 0, 0)


def test_every_kind_appears_with_roughly_its_share(demo_5k: DemoSummary) -> None:
    rows = dict(_fetch(demo_5k.path, "SELECT kind, count(*) FROM meters GROUP BY kind"))
    assert set(rows) == {kind.name for kind in KINDS}
    assert rows == demo_5k.kinds
    total = sum(rows.values())
    for kind in KINDS:
        share = rows[kind.name] / total
        sd = math.sqrt(kind.share * (1 - kind.share) / total)
        assert abs(share - kind.share) < 5 * sd, kind.name


def test_meter_district_is_consistent(demo_5k: DemoSummary) -> None:
    ((mismatch, districts),) = _fetch(
        demo_5k.path,
        """
        SELECT count(*) FILTER (WHERE d.district <> m.district), count(DISTINCT d.district)
        FROM meter_days d JOIN meters m USING (meter_id)
        """,
    )
    assert mismatch == 0
    assert districts == len(DISTRICTS)
    ((per_meter,),) = _fetch(
        demo_5k.path, "SELECT max(n) FROM (SELECT count(DISTINCT district) n FROM meter_days GROUP BY meter_id)"
    )
    assert per_meter == 1


def test_kind_profiles_match_the_scenario(demo_5k: DemoSummary) -> None:
    rows = _fetch(
        demo_5k.path,
        """
        SELECT kind, median(litres), median(night_share) FILTER (WHERE NOT isnan(night_share)),
               median(peak_litres), avg(flow_run_hours), avg(zero_hours),
               avg(CASE WHEN flow_run_hours = 24 THEN 1 ELSE 0 END)
        FROM meter_days JOIN meters USING (meter_id) GROUP BY kind
        """,
    )
    got = {row[0]: row[1:] for row in rows}
    for kind in KINDS:
        litres, night, peak, run, zero, p24 = got[kind.name]
        assert kind.litres / 1.6 < litres < kind.litres * 1.6, kind.name
        assert abs(night - kind.night) < 0.05, kind.name
        assert kind.peak / 1.6 < peak < kind.peak * 1.6, kind.name
        if kind.always_on:
            assert p24 > 0.6 and zero == 0, kind.name
        else:
            assert abs(run - kind.run) < 1.0 and abs(zero - kind.zero) < 1.5, kind.name
            assert p24 == 0, kind.name


def test_five_kmeans_segments_recover_the_kinds(demo_5k: DemoSummary) -> None:
    # outside yardstick: scikit-learn KMeans on standardised columns and adjusted_rand_score
    cluster = pytest.importorskip("sklearn.cluster")
    metrics = pytest.importorskip("sklearn.metrics")
    con = duckdb.connect(str(demo_5k.path), read_only=True)
    try:
        data = con.execute(
            f"""
            SELECT {", ".join(DEMO_COLUMNS)}, kind FROM meter_days JOIN meters USING (meter_id)
            WHERE litres IS NOT NULL AND NOT isnan(night_share)
            """
        ).fetchnumpy()
    finally:
        con.close()
    x = np.column_stack([np.asarray(data[c], dtype=float) for c in DEMO_COLUMNS])
    z = (x - x.mean(axis=0)) / x.std(axis=0)
    labels = cluster.KMeans(n_clusters=5, n_init=10, random_state=0).fit(z).labels_
    assert metrics.adjusted_rand_score(np.asarray(data["kind"]), labels) > 0.7


# --------------------------------------------------------------------------- parquet


def test_parquet_layout_and_rows(tmp_path: Path, demo_5k: DemoSummary) -> None:
    out = tmp_path / "pq"
    files = write_demo_parquet(out, rows=ROWS, days=10, seed=7)
    assert len(files) == 10
    assert files == sorted(files)
    for i, f in enumerate(files):
        assert f.name == "part-0.parquet"
        assert f.parent.parent == out
        assert re.fullmatch(r"day=\d{4}-\d{2}-\d{2}", f.parent.name)
        assert f.parent.name == f"day=2026-01-{i + 1:02d}"
    con = duckdb.connect()
    try:
        con.execute(f"ATTACH '{demo_5k.path}' AS db (READ_ONLY)")
        glob = str(out / "*" / "*.parquet")
        types = con.execute(
            f"DESCRIBE SELECT * FROM read_parquet('{glob}', hive_partitioning = true)"
        ).fetchall()
        assert {(r[0], r[1]) for r in types} == set(EXPECTED_TYPES)
        ((in_file,),) = con.execute(
            f"SELECT count(*) FROM (DESCRIBE SELECT * FROM read_parquet('{files[0]}', hive_partitioning = false))"
        ).fetchall()
        assert in_file == len(EXPECTED_TYPES) - 1  # day lives in the folder name
        cols = ", ".join(name for name, _ in EXPECTED_TYPES)
        ((diff,),) = con.execute(
            f"""
            SELECT count(*) FROM (
              (SELECT {cols} FROM read_parquet('{glob}', hive_partitioning = true)
               EXCEPT ALL SELECT {cols} FROM db.meter_days)
              UNION ALL
              (SELECT {cols} FROM db.meter_days
               EXCEPT ALL SELECT {cols} FROM read_parquet('{glob}', hive_partitioning = true)))
            """
        ).fetchall()
        assert diff == 0
        per_file = con.execute(
            f"SELECT count(DISTINCT filename) FROM read_parquet('{glob}', filename = true)"
        ).fetchall()
        assert per_file == [(10,)]
    finally:
        con.close()


def test_parquet_refuses_a_non_empty_directory(tmp_path: Path) -> None:
    out = tmp_path / "pq"
    out.mkdir()
    (out / "keep.txt").write_text("not ours")
    with pytest.raises(FileExistsError, match=re.escape(str(out))):
        write_demo_parquet(out, rows=1_000, days=5, seed=1)
    assert (out / "keep.txt").read_text() == "not ours"


# --------------------------------------------------------------------------- errors and replace


@pytest.mark.parametrize("rows", [999, 0, -5, 100_000_001])
def test_rows_out_of_range(tmp_path: Path, rows: int) -> None:
    with pytest.raises(ValueError, match=re.escape(f"{rows!r}")):
        build_demo_database(tmp_path / "x.duckdb", rows=rows)
    with pytest.raises(ValueError, match="rows"):
        write_demo_parquet(tmp_path / "pq", rows=rows)
    assert not (tmp_path / "x.duckdb").exists()


@pytest.mark.parametrize("days", [0, -1])
def test_days_out_of_range(tmp_path: Path, days: int) -> None:
    with pytest.raises(ValueError, match="days"):
        build_demo_database(tmp_path / "x.duckdb", rows=1_000, days=days)


@pytest.mark.parametrize("bad", [1000.0, "1000", True])
def test_rows_must_be_an_int(tmp_path: Path, bad: object) -> None:
    with pytest.raises(TypeError, match="rows"):
        build_demo_database(tmp_path / "x.duckdb", rows=bad)  # type: ignore[arg-type]


def test_existing_table_raises_unless_replace(tmp_path: Path) -> None:
    path = tmp_path / "r.duckdb"
    first = build_demo_database(path, rows=1_000, days=10, seed=1)
    with pytest.raises(FileExistsError, match=re.escape(str(path))):
        build_demo_database(path, rows=2_000, days=10, seed=2)
    ((n,),) = _fetch(path, "SELECT count(*) FROM meter_days")
    assert n == 1_000  # untouched
    second = build_demo_database(path, rows=2_000, days=10, seed=2, replace=True)
    assert second.meters == 200 and first.meters == 100
    ((n, meters),) = _fetch(path, "SELECT (SELECT count(*) FROM meter_days), (SELECT count(*) FROM meters)")
    assert (n, meters) == (2_000, 200)


def test_custom_table_name_is_quoted(tmp_path: Path) -> None:
    name = 'select "odd" name'
    summary = build_demo_database(tmp_path / "q.duckdb", rows=1_000, days=10, seed=1, table=name)
    assert summary.table == name
    ((n,),) = _fetch(summary.path, 'SELECT count(*) FROM "select ""odd"" name"')
    assert n == 1_000


def test_table_name_must_not_clash_with_meters(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="meters"):
        build_demo_database(tmp_path / "x.duckdb", rows=1_000, table="Meters")
    with pytest.raises(ValueError, match="table"):
        build_demo_database(tmp_path / "x.duckdb", rows=1_000, table="")


def test_public_names() -> None:
    assert DEMO_COLUMNS == ("litres", "night_share", "peak_litres", "flow_run_hours", "zero_hours")
    assert abs(sum(kind.share for kind in KINDS) - 1.0) < 1e-12
    assert len(DISTRICTS) == 6
    for name in demo.__all__:
        assert hasattr(demo, name)


# --------------------------------------------------------------------------- what the demo replaces


def _comments(path: Path) -> dict[str, str | None]:
    return dict(_fetch(path, "SELECT table_name, comment FROM duckdb_tables()"))


def test_demo_tables_carry_tillites_mark_and_the_documented_columns(demo_5k: DemoSummary) -> None:
    assert _comments(demo_5k.path) == {"meter_days": demo.DEMO_MARK, "meters": demo.DEMO_MARK}
    assert demo.DEMO_MARK.startswith("made by tillite")  # the mark on label views, stores and cell maps too
    assert demo.DEMO_TABLE_COLUMNS == tuple(EXPECTED_TYPES)
    got = _fetch(demo_5k.path, "SELECT column_name, data_type FROM information_schema.columns "
                               "WHERE table_name = 'meters' ORDER BY ordinal_position")
    assert tuple(got) == demo.METERS_TABLE_COLUMNS


def test_rebuild_replaces_the_demos_own_marked_tables(tmp_path: Path) -> None:
    path = tmp_path / "own.duckdb"
    build_demo_database(path, rows=1_000, days=10, seed=1)
    build_demo_database(path, rows=2_000, days=10, seed=2, replace=True)
    assert _fetch(path, "SELECT count(*) FROM meter_days") == [(2_000,)]
    assert _comments(path) == {"meter_days": demo.DEMO_MARK, "meters": demo.DEMO_MARK}


@pytest.mark.parametrize("users_table", [
    "CREATE TABLE meter_days (precious INTEGER); INSERT INTO meter_days VALUES (1)",
    "CREATE TABLE meters (precious INTEGER); INSERT INTO meters VALUES (1)",
    "CREATE TABLE t (precious INTEGER); INSERT INTO t VALUES (1); CREATE VIEW meter_days AS SELECT * FROM t",
])
def test_rebuild_refuses_a_users_table_of_the_demos_names(tmp_path: Path, users_table: str) -> None:
    path = tmp_path / "user.duckdb"
    with duckdb.connect(str(path)) as con:
        con.execute(users_table)
    name = "meters" if "TABLE meters" in users_table else "meter_days"
    with pytest.raises(ParameterError, match=f"{name} was not made by the demo") as err:
        build_demo_database(path, rows=1_000, days=10, replace=True)
    assert str(path) in str(err.value)
    assert _fetch(path, f"SELECT * FROM {name}") == [(1,)]  # the user's row, as it was
    assert "precious" in [c for (c,) in _fetch(path, f"SELECT column_name FROM information_schema.columns WHERE table_name = '{name}'")]


def test_rebuild_replaces_an_unmarked_demo_of_an_earlier_version(tmp_path: Path) -> None:
    path = tmp_path / "old.duckdb"
    build_demo_database(path, rows=1_000, days=10, seed=1)
    with duckdb.connect(str(path)) as con:  # as the version before the mark built them
        con.execute("COMMENT ON TABLE meter_days IS NULL; COMMENT ON TABLE meters IS NULL")
    build_demo_database(path, rows=2_000, days=10, seed=2, replace=True)
    assert _fetch(path, "SELECT count(*) FROM meter_days") == [(2_000,)]
    assert _comments(path) == {"meter_days": demo.DEMO_MARK, "meters": demo.DEMO_MARK}


def test_rebuild_refuses_unmarked_tables_of_the_demos_shape_holding_other_meters(tmp_path: Path) -> None:
    path = tmp_path / "lookalike.duckdb"
    build_demo_database(path, rows=1_000, days=10, seed=1)
    with duckdb.connect(str(path)) as con:  # a user's own tables with the demo's columns
        con.execute("COMMENT ON TABLE meter_days IS NULL; COMMENT ON TABLE meters IS NULL; "
                    "UPDATE meters SET kind = 'apartment block' WHERE meter_id = 0")
    with pytest.raises(ParameterError, match="meter_days was not made by the demo"):
        build_demo_database(path, rows=2_000, days=10, seed=2, replace=True)
    assert _fetch(path, "SELECT count(*) FROM meter_days") == [(1_000,)]


@pytest.mark.parametrize("content", [b"a,b\n1,2\n", b""])
def test_a_file_that_is_not_duckdb_is_refused_naming_it_and_left_as_it_was(tmp_path: Path, content: bytes) -> None:
    path = tmp_path / "notes.duckdb"
    path.write_bytes(content)
    with pytest.raises(ParameterError, match=re.escape(f"path {path} exists and is not a DuckDB database")):
        build_demo_database(path, rows=1_000, days=10, replace=True)
    assert path.read_bytes() == content
