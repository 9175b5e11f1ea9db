"""Shared fixtures and helpers, each defined once: the make_blobs data sets (named by rows,
columns and centres), tables loaded from numpy arrays into throwaway DuckDB files and SQL run
straight on them, the CLI run in-process and its one-error-line check, a throwaway PostgreSQL
server, and a refresh held open inside its transaction."""

from __future__ import annotations

import threading
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner
from sklearn.datasets import make_blobs

from tillite.cli import main
from tillite.engines import DuckDBEngine
from tillite.model import Model

from engine_checks import make_rows
from throwaway_servers import start_postgres


def write_table(path: Path, table: str, data: dict[str, np.ndarray]) -> Path:
    """Create `table` in the DuckDB file at `path` from named numpy columns."""
    with duckdb_file(path) as con:
        frame = {name: np.asarray(values) for name, values in data.items()}  # noqa: F841 (scanned by name)
        con.execute(f'CREATE OR REPLACE TABLE "{table}" AS SELECT * FROM frame')
    return path


def numpy_sse(x: np.ndarray, labels: np.ndarray | None = None) -> float:
    """numpy direct: the sum of squared deviations of the rows from their group's mean (one group without labels)."""
    if labels is None:
        return float(((x - x.mean(axis=0)) ** 2).sum())
    return sum(float(((x[labels == g] - x[labels == g].mean(axis=0)) ** 2).sum()) for g in np.unique(labels))


@contextmanager
def duckdb_file(path: Path, read_only: bool = False) -> Iterator[duckdb.DuckDBPyConnection]:
    """A plain DuckDB connection to the file, closed on leaving (so a command can open the file next)."""
    con = duckdb.connect(str(path), read_only=read_only)
    try:
        yield con
    finally:
        con.close()


def fetch_rows(path: Path, sql: str, read_only: bool = False) -> list[tuple]:
    """Run SQL straight on the DuckDB file: its rows."""
    with duckdb_file(path, read_only) as con:
        return con.execute(sql).fetchall()


def fetch_columns(path: Path, sql: str, read_only: bool = False) -> dict[str, np.ndarray]:
    """Run SQL straight on the DuckDB file: its columns as numpy arrays."""
    with duckdb_file(path, read_only) as con:
        return con.execute(sql).fetchnumpy()


def altered_copy(path: Path, copy: Path, *statements: str) -> Path:
    """A copy of the DuckDB file at ``path``, with the SQL statements run on it."""
    copy.write_bytes(path.read_bytes())
    with duckdb_file(copy) as con:
        for statement in statements:
            con.execute(statement)
    return copy


def columns_of(x: np.ndarray, names: list[str]) -> dict[str, np.ndarray]:
    return {n: x[:, j] for j, n in enumerate(names)}


def run_cli(*args: object):
    """Invoke the `tillite` command in-process; stdout and stderr come back separately (click >= 8.2)."""
    return CliRunner().invoke(main, [str(a) for a in args])


def assert_one_error_line(result, *needles: str, code: int = 1, cli_words: bool = True) -> str:
    """The exit code, exactly one line starting 'Error:' on stderr naming every needle, no traceback.

    With code 1 that line is all of stderr (a usage error, code 2, is one line too: cli.OneLineErrorsGroup).
    ``cli_words``: the line speaks the CLI's words, not the API's (no ``=True``, no ``None``).
    """
    assert result.exit_code == code, (result.exit_code, result.output)
    assert isinstance(result.exception, SystemExit), repr(result.exception)
    assert "Traceback" not in result.output
    lines = result.stderr.strip().splitlines()
    errors = [ln for ln in lines if ln.startswith("Error:")]
    assert len(errors) == 1, lines
    if code == 1:
        assert len(lines) == 1, lines
    line = errors[0]
    for needle in needles:
        assert needle in line, (needle, line)
    if cli_words:
        assert "=True" not in line and "None" not in line, line
    return line


@pytest.fixture
def blobs_30k_4d_5c():
    """Five well-separated blobs (scikit-learn make_blobs), 4 columns, 30,000 rows."""
    x, y = make_blobs(n_samples=30_000, centers=5, n_features=4, cluster_std=0.6, center_box=(-12, 12), random_state=3)
    return x, y


@pytest.fixture(scope="module")
def blobs_3k_3d_3c():
    """Three well-separated blobs (scikit-learn make_blobs), 3 columns, 3,000 rows."""
    x, y = make_blobs(n_samples=3_000, centers=3, n_features=3, cluster_std=0.5, center_box=(-10, 10), random_state=1)
    return x, y


@pytest.fixture(scope="module")
def blobs_600_4d_5c():
    """Five overlapping blobs (scikit-learn make_blobs, cluster_std 1.5), 4 columns, 600 rows."""
    x, y = make_blobs(n_samples=600, n_features=4, centers=5, cluster_std=1.5, random_state=7)
    return x, y


@pytest.fixture(scope="module")
def blobs_6k_3d_5c():
    """Five blobs (scikit-learn make_blobs), 3 columns, 6,000 rows."""
    x, y = make_blobs(n_samples=6000, n_features=3, centers=5, cluster_std=1.0, random_state=4)
    return x, y


@pytest.fixture(scope="module")
def blobs_6k_3d_4c():
    """Four blobs (scikit-learn make_blobs, centres in [-8, 8]), 3 columns, 6,000 rows."""
    x, y = make_blobs(n_samples=6_000, centers=4, n_features=3, cluster_std=1.0, center_box=(-8, 8), random_state=5)
    return x, y


@pytest.fixture
def blob_db(tmp_path, blobs_30k_4d_5c):
    x, y = blobs_30k_4d_5c
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


@pytest.fixture(scope="module")
def engine_rows():
    """The cross-engine rows (engine_checks.make_rows): make_blobs, 5 centres, shifted far from 0, plus NULL/NaN/Inf rows."""
    return make_rows()


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


def sorted_cells(cells, keys: np.ndarray) -> tuple[np.ndarray, ...]:
    """(keys, n, ls, ss) of cells in key order, so two cell sets compare row by row."""
    order = np.lexsort(keys.T[::-1])
    return keys[order], cells.n[order], cells.ls[order], cells.ss[order]


def store_snapshot(con, info) -> dict[str, list[str]]:
    """Every row of a store's registry and cells tables, as sorted text (a DB-API connection)."""
    from tillite import store as S

    tables = [S.STORES, S.PARTS, S.LABELS, info.cells_table]
    return {t: sorted(map(repr, con.execute(f'SELECT * FROM "{t}"').fetchall())) for t in tables}


def typed_partition_table(path):
    """30,000 rows: VARCHAR partitions SQL NULL, 'NULL' and 'x'; pairs (r, s) whose values hold / and =; mixed types."""
    rng = np.random.default_rng(11)
    n = 30_000
    write_table(path, "base", {"a": rng.normal(size=n), "b": rng.normal(size=n), "grp": np.repeat(np.arange(3), n // 3)})
    con = duckdb.connect(str(path))
    con.execute(
        "CREATE TABLE t AS SELECT a, b, CASE grp WHEN 0 THEN NULL WHEN 1 THEN 'NULL' ELSE 'x' END AS p, "
        "CASE grp WHEN 0 THEN 'a/s=b' WHEN 1 THEN 'a' ELSE 'q' END AS r, CASE grp WHEN 0 THEN 'c' WHEN 1 THEN 'b/s=c' ELSE 'q' END AS s, "
        "CASE grp WHEN 2 THEN NULL ELSE grp END AS i, DATE '2026-01-01' + CAST(grp % 2 AS INTEGER) AS d FROM base"
    )
    con.execute("DROP TABLE base")
    con.close()
    return path


def sixty_days_of_blobs(path):
    """make_blobs (scikit-learn) rows a, b, c spread over 60 daily partitions of 1,000 rows."""
    x, _ = make_blobs(n_samples=60_000, centers=4, n_features=3, cluster_std=1.0, center_box=(-10, 10), random_state=7)
    return write_table(path, "readings", {"a": x[:, 0], "b": x[:, 1], "c": x[:, 2], "day": np.repeat(np.arange(60), 1000)})


def grouped_blobs(spec: dict, n_features: int = 3, seed: int = 0) -> dict[str, np.ndarray]:
    """Columns a, b, c, ... and ``grp``: per group value (None: NULL) scikit-learn make_blobs with
    (rows, centres, shift, scale) from ``spec``; ``truth`` holds the generating blob per row."""
    cols, groups, truth = [], [], []
    for i, (value, (rows, centers, shift, scale)) in enumerate(spec.items()):
        x, y = make_blobs(n_samples=rows, centers=centers, n_features=n_features, cluster_std=0.5, center_box=(-10, 10),
                          random_state=seed + i)
        cols.append(x * scale + shift)
        groups += [value] * rows
        truth.append(y)
    x = np.vstack(cols)
    data = columns_of(x, [chr(ord("a") + j) for j in range(n_features)])
    data["grp"] = np.array(groups, dtype=object)
    data["truth"] = np.concatenate(truth)
    return data


#: Three groups (one of them NULL) of four well-separated blobs each, at other places and scales.
WITHIN_GROUPS = {"harbour": (6_000, 4, 0.0, 1.0), "dune": (4_000, 4, 50.0, 3.0), None: (3_000, 4, -40.0, 0.5)}


@pytest.fixture(scope="module")
def within_db(tmp_path_factory):
    """A DuckDB file with table ``meters`` (WITHIN_GROUPS) and one table per group holding that group alone."""
    path = tmp_path_factory.mktemp("within") / "within.duckdb"
    write_table(path, "meters", grouped_blobs(WITHIN_GROUPS))
    con = duckdb.connect(str(path))
    try:
        con.execute("CREATE TABLE only_harbour AS SELECT * FROM meters WHERE grp = 'harbour'")
        con.execute("CREATE TABLE only_dune AS SELECT * FROM meters WHERE grp = 'dune'")
        con.execute("CREATE TABLE only_null AS SELECT * FROM meters WHERE grp IS NULL")
    finally:
        con.close()
    return path


def within_days_table(path: Path, spec: dict | None = None, days: int = 6, seed: int = 0) -> Path:
    """Table ``meters`` of ``grouped_blobs(spec)`` (default WITHIN_GROUPS) with a ``day`` partition column (0..days-1,
    seeded) and ``id``, the row's number: a --within store's data, every group spread over every day."""
    data = grouped_blobs(spec or WITHIN_GROUPS, seed=seed)
    n = len(data["a"])
    data["day"] = np.random.default_rng(seed).integers(0, days, n)
    data["id"] = np.arange(n)
    return write_table(path, "meters", data)


# ----------------------------------------------------------------------------- categorical columns


CATEGORIES = np.array(["harbour", "north", None], dtype=object)


def mixed_data(n: int = 12_000, seed: int = 5):
    """2 numeric blobs (scikit-learn make_blobs) x 3 category groups (one of them NULL): 6 clusters that only
    numbers and categories together tell apart."""
    x, blob = make_blobs(n_samples=n, centers=[(-4.0, -4.0), (4.0, 4.0)], cluster_std=1.0, random_state=seed)
    group = np.random.default_rng(seed).integers(0, 3, n)
    truth = blob * 3 + group
    return x, CATEGORIES[group], truth


def one_hot_scaled(x: np.ndarray, c: np.ndarray, listed, weights=(1.0, 1.0), cat_weight: float = 1.0) -> np.ndarray:
    """Rows as numpy sees them: numeric columns z-scored (population sd), then one 0/1 column per listed
    category, "other" and NULL, centred and divided by sqrt(1 - sum p^2), times the weights."""
    z = (x - x.mean(axis=0)) / x.std(axis=0)
    is_null = np.array([v is None for v in c])
    onehot = [np.array([v == name for v in c], dtype=float) for name in listed]
    onehot.append((~is_null & ~np.isin(c.astype(str), list(listed))).astype(float))
    onehot.append(is_null.astype(float))
    ind = np.column_stack(onehot)
    p = ind.mean(axis=0)
    ind = (ind - p) / np.sqrt(1.0 - (p * p).sum())
    return np.hstack([z * np.asarray(weights)[None, :], ind * cat_weight])


def sse_at_centroids(u: np.ndarray, seg: np.ndarray, centroids_u: np.ndarray, ids) -> float:
    """numpy direct: the squared distances of the rows ``u`` to the centroid of their segment id, summed."""
    pos = {sid: i for i, sid in enumerate(ids)}
    own = centroids_u[[pos[s] for s in seg]]
    return float(((u - own) ** 2).sum())


def centroids_in_numpy_units(model: Model, x: np.ndarray, c: np.ndarray, listed, weights=(1.0, 1.0), cat_weight=1.0):
    """The model's centroids (original units: numeric means, category shares) in numpy's scaled units."""
    cent = np.asarray(model.centroids)
    num = (cent[:, :2] - x.mean(axis=0)) / x.std(axis=0) * np.asarray(weights)
    is_null = np.array([v is None for v in c])
    ind = np.column_stack([np.array([v == name for v in c], float) for name in listed]
                          + [(~is_null & ~np.isin(c.astype(str), list(listed))).astype(float), is_null.astype(float)])
    p = ind.mean(axis=0)
    return np.hstack([num, (cent[:, 2:] - p) / np.sqrt(1.0 - (p * p).sum()) * cat_weight])
