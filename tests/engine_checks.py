"""The data and the comparisons shared by the PostgreSQL and Spark engine tests.

Every engine gets the same rows: scikit-learn make_blobs in three columns whose
names need quoting (``unit price``, ``select``), an id, a text column, and a few
unusable rows (NULL, NaN, +Inf, -Inf).  Each check compares an engine with
DuckDB running the same sqlgen tree (an independent SQL engine) and, where it
can, with numpy on the raw rows.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

import duckdb
import numpy as np
from sklearn.datasets import make_blobs
from sqlglot import exp

from tillite import sqlgen
from tillite.engines import Engine
from tillite.model import Model
from tillite.stages import CellPass, RefineResult, null_mask
from tillite.sqlgen import Source

COLUMNS = ["litres", "unit price", "select"]
TABLE = "points"
ROWS = 20_000
#: rows made unusable: litres NULL, unit price NaN, select +Inf / -Inf
NULL_IDS = (0, 1, 2, 3, 4)
NAN_IDS = (5, 6, 7, 8, 9)
POSINF_IDS = (10, 11, 12)
NEGINF_IDS = (13,)


@dataclass
class Rows:
    """The test rows column by column; ``null`` marks NULLs of litres."""

    ids: np.ndarray
    x: np.ndarray  # ROWS x 3, with NaN/Inf in place
    null: np.ndarray  # litres is NULL here
    kind: list[str | None]

    @property
    def usable(self) -> np.ndarray:
        return np.isfinite(self.x).all(axis=1) & ~self.null

    def tuples(self) -> list[tuple]:
        """(id, litres, unit price, select, kind) with None for NULL."""
        out = []
        for i in range(len(self.ids)):
            litres = None if self.null[i] else float(self.x[i, 0])
            out.append((int(self.ids[i]), litres, float(self.x[i, 1]), float(self.x[i, 2]), self.kind[i]))
        return out


def make_rows(n: int = ROWS) -> Rows:
    """make_blobs (scikit-learn) with 5 centres, shifted far from 0, plus the unusable rows."""
    x, y = make_blobs(n_samples=n, centers=5, n_features=3, cluster_std=0.7, center_box=(-10, 10), random_state=11)
    x = x * np.array([40.0, 0.5, 3.0]) + np.array([350.0, 2.0, -7.0])
    null = np.zeros(n, dtype=bool)
    null[list(NULL_IDS)] = True
    x[list(NAN_IDS), 1] = np.nan
    x[list(POSINF_IDS), 2] = np.inf
    x[list(NEGINF_IDS), 2] = -np.inf
    kind: list[str | None] = [f"blob {v}" for v in y]
    kind[20] = None
    return Rows(ids=np.arange(n, dtype=np.int64), x=x, null=null, kind=kind)


def write_postgres(con, rows: Rows) -> None:
    """The rows as table ``points`` on a PostgreSQL connection (psycopg, autocommit), copied in with COPY."""
    from psycopg import sql

    con.execute(sql.SQL("CREATE TABLE {} (id BIGINT, {} DOUBLE PRECISION, {} DOUBLE PRECISION, {} DOUBLE PRECISION, kind TEXT)").format(
        sql.Identifier(TABLE), *[sql.Identifier(c) for c in COLUMNS]))
    with con.cursor().copy(sql.SQL("COPY {} FROM STDIN").format(sql.Identifier(TABLE))) as copy:
        for row in rows.tuples():
            copy.write_row(row)


def write_duckdb(path: Path, rows: Rows) -> Path:
    """The rows as table ``points`` in a DuckDB file.

    DuckDB's numpy scan reads NaN as NULL, so NULLs and NaNs are set afterwards.
    """
    con = duckdb.connect(str(path))
    try:
        frame = {"id": rows.ids, "litres": rows.x[:, 0], "unit price": rows.x[:, 1], "select": rows.x[:, 2],  # noqa: F841
                 "kind": np.array(rows.kind, dtype=object)}
        con.execute(f'CREATE TABLE "{TABLE}" AS SELECT * FROM frame')
        con.execute(f'UPDATE "{TABLE}" SET litres = NULL WHERE id IN ({", ".join(map(str, NULL_IDS))})')
        con.execute(f'UPDATE "{TABLE}" SET "unit price" = \'NaN\'::DOUBLE WHERE id IN ({", ".join(map(str, NAN_IDS))})')
        nan, null = con.execute(f'SELECT count(*) FILTER (isnan("unit price")), count(*) FILTER ("unit price" IS NULL) FROM "{TABLE}"').fetchone()
        assert (nan, null) == (len(NAN_IDS), 0)
    finally:
        con.close()
    return path


def write_parquet(duckdb_path: Path, parquet_path: Path) -> Path:
    """A Parquet copy of the DuckDB table (DuckDB's writer keeps NULL and NaN apart)."""
    con = duckdb.connect(str(duckdb_path), read_only=True)
    try:
        con.execute(f"COPY \"{TABLE}\" TO '{parquet_path}' (FORMAT PARQUET)")
    finally:
        con.close()
    return parquet_path


def ordered_rows(engine: Engine, relation: str, order_by: str = "id") -> dict[str, np.ndarray]:
    """Every row of a relation ordered by a column, through the engine (a sqlglot tree)."""
    return engine.query(exp.select(exp.Star()).from_(sqlgen.table_name(relation)).order_by(sqlgen.col(order_by)))


def assert_same_cell_pass(got: CellPass, ref: CellPass) -> None:
    """Same cells and counts exactly; sums to 1e-9 relative (summation order differs between engines)."""
    assert (got.usable, got.skipped) == (ref.usable, ref.skipped)
    g, r = np.lexsort(got.keys.T[::-1]), np.lexsort(ref.keys.T[::-1])
    np.testing.assert_array_equal(got.keys[g], ref.keys[r])
    np.testing.assert_array_equal(got.cells.n[g], ref.cells.n[r])
    np.testing.assert_allclose(got.cells.ls[g], ref.cells.ls[r], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(got.cells.ss[g], ref.cells.ss[r], rtol=1e-9, atol=1e-9)


def assert_same_refine(got: RefineResult, ref: RefineResult) -> None:
    assert got.skipped == ref.skipped
    np.testing.assert_array_equal(got.updated.n, ref.updated.n)
    np.testing.assert_allclose(got.updated.centroids, ref.updated.centroids, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(got.assigned.sse, ref.assigned.sse, rtol=1e-9)
    np.testing.assert_allclose(got.updated.sse, ref.updated.sse, rtol=1e-9)


def assert_same_model(got: Model, ref: Model) -> None:
    assert (got.rows, got.skipped) == (ref.rows, ref.skipped)
    assert got.sizes == ref.sizes
    np.testing.assert_allclose(got.center, ref.center, rtol=1e-9)
    np.testing.assert_allclose(got.scale, ref.scale, rtol=1e-9)
    np.testing.assert_allclose(got.centroids, ref.centroids, rtol=1e-9)
    np.testing.assert_allclose(got.sse, ref.sse, rtol=1e-9)
    assert got.grid["cells"] == ref.grid["cells"]


def assert_same_labels(got: dict[str, np.ndarray], ref: dict[str, np.ndarray], rows: Rows) -> None:
    """Row for row: segment (NULL where the row is unusable), distance, and the data's NULL/NaN kept apart."""
    np.testing.assert_array_equal(np.asarray(got["id"]), np.asarray(ref["id"]))
    seg_null = null_mask(got["segment"])
    np.testing.assert_array_equal(seg_null, null_mask(ref["segment"]))
    # reference: numpy's isfinite on the raw rows says which rows are unusable
    np.testing.assert_array_equal(seg_null, ~rows.usable)
    np.testing.assert_array_equal(np.ma.getdata(got["segment"])[~seg_null], np.ma.getdata(ref["segment"])[~seg_null])
    # the distance is NULL where the segment is, and for the outlier group (-1, rows labelled through a cell map)
    dist_null = seg_null | (np.ma.getdata(got["segment"]) == -1)
    np.testing.assert_allclose(np.ma.getdata(got["distance"])[~dist_null].astype(float),
                               np.ma.getdata(ref["distance"])[~dist_null].astype(float), rtol=1e-9, atol=1e-12)
    assert np.all(null_mask(got["distance"]) == dist_null)
    assert np.all(null_mask(ref["distance"]) == dist_null)
    assert_null_and_nan_apart(got, rows)
    assert_null_and_nan_apart(ref, rows)


def assert_null_and_nan_apart(got: dict[str, np.ndarray], rows: Rows) -> None:
    """NULL comes back masked, NaN as an unmasked NaN, infinities as infinities."""
    litres = got["litres"]
    assert np.ma.isMaskedArray(litres) and np.ma.getmaskarray(litres)[list(NULL_IDS)].all()
    unit = got["unit price"]
    assert not np.ma.getmaskarray(unit).any(), "NaN in the data must come back as NaN, not NULL"
    assert np.isnan(np.asarray(unit)[list(NAN_IDS)]).all()
    assert np.isposinf(np.asarray(got["select"])[list(POSINF_IDS)]).all()
    assert list(np.asarray(got["kind"][:3])) == rows.kind[:3] and np.ma.getmaskarray(got["kind"])[20]


def every_third_cell(duck: Engine, source: Source, model: Model) -> sqlgen.CellMap:
    """A cell map sending every third cell of the model's grid to the outlier group (-1), from DuckDB's cell pass."""
    from tillite.pipeline import run_cell_pass

    grid = sqlgen.Grid.from_dict(model.grid)
    keys = run_cell_pass(duck, source, model.columns, grid).keys[::3]
    return sqlgen.CellMap(grid, tuple(map(tuple, keys.tolist())), tuple([-1] * len(keys)))


def with_every_third_cell_mapped(duck: Engine, source: Source, model: Model) -> Model:
    """The model with ``every_third_cell``'s map: its labels read one, as an outlier group's do."""
    cell_map = every_third_cell(duck, source, model)
    return replace(model, cell_map={"keys": [list(k) for k in cell_map.keys], "segments": list(cell_map.segments),
                                    "unmapped": "nearest"})


def assert_same_within_model(got: Model, ref: Model) -> None:
    """`segment --within kind`: the same groups (NULL included), sizes, centroids and SSE per group."""
    assert (got.rows, got.skipped) == (ref.rows, ref.skipped)
    assert [g["name"] for g in got.within["groups"]] == [g["name"] for g in ref.within["groups"]]
    for g, r in zip(got.within["groups"], ref.within["groups"]):
        assert (g["rows"], g["skipped"], g["sizes"]) == (r["rows"], r["skipped"], r["sizes"]), g["name"]
        np.testing.assert_allclose(g["centroids"], r["centroids"], rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(g["sse"], r["sse"], rtol=1e-9, atol=1e-12)


def assert_same_within_labels(got: dict[str, np.ndarray], ref: dict[str, np.ndarray], rows: Rows) -> None:
    """Labels of a --within model row for row; the group column comes back as the source's ``kind``."""
    assert_same_labels(got, ref, rows)
    assert [None if v is None else str(v) for v in np.asarray(got["kind"], dtype=object)] == \
        [None if v is None else str(v) for v in np.asarray(ref["kind"], dtype=object)]
