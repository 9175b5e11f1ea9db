"""Shared fixtures: tables loaded from numpy arrays into throwaway DuckDB files."""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import pytest
from sklearn.datasets import make_blobs

from tillite.engines import DuckDBEngine


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
