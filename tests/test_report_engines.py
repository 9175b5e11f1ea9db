"""The report's statistics and breakdowns on PostgreSQL and Spark, compared with DuckDB and numpy.

The same rows (tests/engine_checks.py: make_blobs in columns whose names need
quoting, a text column, NULL/NaN/Inf rows) are loaded into each engine; one
model made by DuckDB is reported on by each engine.
"""

from __future__ import annotations

import numpy as np
import pytest

from tillite import report as R
from tillite.engines import DuckDBEngine, PostgresEngine, SparkEngine
from tillite.pipeline import Settings, segment
from tillite.sqlgen import Source

from engine_checks import COLUMNS, TABLE, write_duckdb, write_parquet, write_postgres
from throwaway_servers import start_spark

SETTINGS = dict(k=5, width=0.5, seed=0, cell_budget=2_000)
SRC = Source.of_table(TABLE)


@pytest.fixture(scope="module")
def duck_file(engine_rows, tmp_path_factory):
    return write_duckdb(tmp_path_factory.mktemp("report") / "points.duckdb", engine_rows)


@pytest.fixture(scope="module")
def reference(duck_file):
    """DuckDB's model, statistics and breakdown of the rows."""
    duck = DuckDBEngine(str(duck_file), read_only=True)
    try:
        model = segment(duck, SRC, COLUMNS, Settings(**SETTINGS))
        return model, R.segment_statistics(duck, SRC, model), R.breakdown(duck, SRC, model, "kind")
    finally:
        duck.close()


def numpy_labels(engine_rows, model) -> np.ndarray:
    """Each usable row's segment by numpy: nearest centroid in the model's weighted, scaled space."""
    u = (engine_rows.x - np.asarray(model.center)) / np.asarray(model.scale) * np.asarray(model.weights)
    c = np.asarray(model.centroids_scaled) * np.asarray(model.weights)
    d = ((u[:, None, :] - c[None, :, :]) ** 2).sum(axis=2)
    out = np.asarray(model.segment_ids())[np.argmin(np.where(np.isfinite(d), d, np.inf), axis=1)]
    return np.where(engine_rows.usable, out, -99)


def assert_same_statistics(got, ref, engine_rows, model, rank_tolerance: float) -> None:
    labels = numpy_labels(engine_rows, model)
    assert sorted(got) == sorted(ref)
    for sid in ref:
        x = engine_rows.x[labels == sid]
        # reference: DuckDB (counts exactly, moments to 1e-9) and numpy on the same rows
        assert got[sid]["n"] == ref[sid]["n"] == len(x)
        for j, c in enumerate(COLUMNS):
            g, r = got[sid]["columns"][c], ref[sid]["columns"][c]
            for key in ("mean", "sd", "min", "max"):
                np.testing.assert_allclose(g[key], r[key], rtol=1e-9, atol=1e-12)
            np.testing.assert_allclose(g["mean"], x[:, j].mean(), rtol=1e-9)
            for q in (25, 50, 75):
                rank = (x[:, j] <= g[f"q{q}"]).mean()
                assert abs(rank - q / 100) <= rank_tolerance + 1 / len(x), (sid, c, q, rank)


def assert_same_breakdown(got, ref) -> None:
    # reference: DuckDB's counts of the same (segment, kind) pairs
    assert dict(zip(got["categories"], zip(*got["counts"].values()))) == dict(zip(ref["categories"], zip(*ref["counts"].values())))


def assert_same_scan(engine, reference, duck_file) -> None:
    """GROUPING SETS over two breakdown columns (kind, and id: one category per row, so 20 kept and "other")."""
    model = reference[0]
    duck = DuckDBEngine(str(duck_file), read_only=True)
    try:
        ref_stats, ref_by = R.report_scan(duck, SRC, model, ["kind", "id"])
    finally:
        duck.close()
    stats, by = R.report_scan(engine, SRC, model, ["kind", "id"])
    # reference: DuckDB's one-scan figures on the same rows (counts exactly, moments to 1e-9)
    assert sorted(stats) == sorted(ref_stats)
    for sid in ref_stats:
        assert stats[sid]["n"] == ref_stats[sid]["n"]
        for c in COLUMNS:
            for key in ("mean", "sd", "min", "max"):
                np.testing.assert_allclose(stats[sid]["columns"][c][key], ref_stats[sid]["columns"][c][key], rtol=1e-9, atol=1e-12)
    for got, ref in zip(by, ref_by):
        assert_same_breakdown(got, ref)


# --------------------------------------------------------------------------- PostgreSQL


@pytest.fixture(scope="module")
def postgres(server, engine_rows):
    import psycopg

    with psycopg.connect(server.conninfo, autocommit=True) as con:
        write_postgres(con, engine_rows)
    engine = PostgresEngine(server.conninfo)
    yield engine
    engine.close()


def test_postgres_report_statistics_equal_duckdb_and_numpy(postgres, reference, engine_rows):
    model, stats, _ = reference
    got = R.segment_statistics(postgres, SRC, model)
    # PostgreSQL's percentile_cont is exact: numpy.percentile's default (linear) interpolation is the same rule
    labels = numpy_labels(engine_rows, model)
    for sid in got:
        x = engine_rows.x[labels == sid]
        for j, c in enumerate(COLUMNS):
            np.testing.assert_allclose(got[sid]["columns"][c]["q50"], np.percentile(x[:, j], 50), rtol=1e-12)
    # DuckDB's reservoir_quantile: within the 2% rank tolerance explained in test_report.py
    assert_same_statistics(got, stats, engine_rows, model, rank_tolerance=0.02)


def test_postgres_breakdown_equals_duckdb(postgres, reference):
    model, _, ref = reference
    assert_same_breakdown(R.breakdown(postgres, SRC, model, "kind"), ref)


def test_postgres_one_scan_with_two_breakdowns_equals_duckdb(postgres, reference, duck_file):
    assert_same_scan(postgres, reference, duck_file)


# --------------------------------------------------------------------------- Spark


@pytest.fixture(scope="module")
def spark_engine(tmp_path_factory, duck_file):
    folder = tmp_path_factory.mktemp("report-spark")
    session = start_spark(folder)
    parquet = write_parquet(duck_file, folder / "points.parquet")
    session.read.parquet(str(parquet)).createOrReplaceTempView(TABLE)
    yield SparkEngine(session=session)
    session.stop()


def test_spark_report_statistics_equal_duckdb_and_numpy(spark_engine, reference, engine_rows):
    model, stats, _ = reference
    got = R.segment_statistics(spark_engine, SRC, model)
    # Spark documents percentile_approx's rank error as 1/accuracy (accuracy 10,000 here)
    assert_same_statistics(got, stats, engine_rows, model, rank_tolerance=1e-4)


def test_spark_breakdown_equals_duckdb(spark_engine, reference):
    model, _, ref = reference
    assert_same_breakdown(R.breakdown(spark_engine, SRC, model, "kind"), ref)


def test_spark_one_scan_with_two_breakdowns_equals_duckdb(spark_engine, reference, duck_file):
    assert_same_scan(spark_engine, reference, duck_file)
