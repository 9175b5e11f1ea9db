"""Shared fixtures: tables loaded from numpy arrays into throwaway DuckDB files, a throwaway
PostgreSQL server, and a refresh held open inside its transaction."""

from __future__ import annotations

import threading
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import duckdb
import numpy as np
import pytest
from sklearn.datasets import make_blobs

from tillite.engines import DuckDBEngine

from throwaway_servers import start_postgres


def write_table(path: Path, table: str, data: dict[str, np.ndarray]) -> Path:
    """Create `table` in the DuckDB file at `path` from named numpy columns."""
    con = duckdb.connect(str(path))
    try:
        frame = {name: np.asarray(values) for name, values in data.items()}  # noqa: F841 (scanned by name)
        con.execute(f'CREATE OR REPLACE TABLE "{table}" AS SELECT * FROM frame')
    finally:
        con.close()
    return path


def columns_of(x: np.ndarray, names: list[str]) -> dict[str, np.ndarray]:
    return {n: x[:, j] for j, n in enumerate(names)}


@pytest.fixture
def blobs():
    """Well-separated blobs (scikit-learn make_blobs), 4 columns, 5 centres."""
    x, y = make_blobs(n_samples=30_000, centers=5, n_features=4, cluster_std=0.6, center_box=(-12, 12), random_state=3)
    return x, y


@pytest.fixture
def blob_db(tmp_path, blobs):
    x, y = blobs
    names = ["a", "b", "c", "d"]
    data = columns_of(x, names)
    data["truth"] = y
    path = write_table(tmp_path / "blobs.duckdb", "points", data)
    return path, names


@pytest.fixture
def open_engine():
    engines = []

    def opener(path, read_only=False):
        e = DuckDBEngine(str(path), read_only=read_only)
        engines.append(e)
        return e

    yield opener
    for e in engines:
        e.close()


@pytest.fixture(scope="module")
def server():
    """A throwaway PostgreSQL server for the tests of one module."""
    pg = start_postgres()
    yield pg
    pg.stop()


@contextmanager
def refresh_held_open(engine, store: str) -> Iterator[None]:
    """A refresh of ``store`` running in a thread, held inside its transaction for the with-block.

    On leaving, the held refresh is let go and must finish without error.
    """
    from tillite import store as S

    inside, release = threading.Event(), threading.Event()
    errors: list[Exception] = []

    def hold():
        inside.set()
        release.wait(30)

    def run_first():
        try:
            S.refresh(engine, store, before_commit=hold)
        except Exception as err:  # pragma: no cover - reported below
            errors.append(err)

    t = threading.Thread(target=run_first)
    t.start()
    try:
        assert inside.wait(30)
        yield
    finally:
        release.set()
        t.join(30)
    assert not errors
