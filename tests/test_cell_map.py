"""Rows labelled through a cell map: the bound that lets rows near a centroid skip their cell key, and the
refine sums and labels computed with it.

Reference throughout: numpy, on the same rows: each row's nearest centroid (first on ties), its grid
cell (``Grid.keys_of``: numpy's floor of the same products the SQL takes), and a Python set of the
mapped cells.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from tillite.engines import DuckDBEngine
from tillite.sqlgen import (
    Assignment,
    CellMap,
    Grid,
    Source,
    create_relation_statement,
    label_select,
    refine_statement,
)

from conftest import columns_of, write_table

COLUMNS = ["a", "b", "c"]


def numpy_distances(x: np.ndarray, assign: Assignment) -> np.ndarray:
    """Squared weighted, scaled distance of each row to each centroid (rows x centroids)."""
    u = (x - np.asarray(assign.center)) * np.asarray(assign.inv_scale) * np.asarray(assign.weights)
    c = np.asarray(assign.centroids) * np.asarray(assign.weights)
    return ((u[:, None, :] - c[None, :, :]) ** 2).sum(axis=2)


def points_in_cells(grid: Grid, keys: np.ndarray, rng: np.random.Generator, per_cell: int) -> np.ndarray:
    """Points of the given cells: their corners, the middles of their faces and random points inside.

    A cell is where every grid coordinate t = (x - centre) @ F lies in [key, key + 1]; a point of it
    is a solution of t = target plus any move along the columns the grid does not see."""
    factors = grid.key_factors()
    pinv = np.linalg.pinv(factors.T)  # x - centre = pinv @ t solves it (F has full column rank here)
    free = np.eye(factors.shape[0]) - pinv @ factors.T  # moves that leave every t alone
    p = factors.shape[1]
    corners = np.array(np.meshgrid(*[[0.0, 0.5, 1.0]] * p)).reshape(p, -1).T
    out = []
    for key in keys:
        inside = np.vstack([corners, rng.uniform(0, 1, size=(per_cell, p))])
        t = key[None, :] + inside
        x = t @ pinv.T + rng.normal(scale=3.0, size=(len(t), factors.shape[0])) @ free.T
        out.append(x + np.asarray(grid.center)[None, :])
    return np.vstack(out)


GRIDS = {
    "columns": (Grid(center=(1.3, -0.4, 2.0), inv_scale=(0.37, 1.9, 0.8), width=0.29), (1.0, 1.0, 1.0)),
    "rotated axes": (
        Grid(center=(0.2, 0.1, -0.3), inv_scale=(0.5, 0.5, 0.5), width=0.4,
             axes=tuple(map(tuple, np.linalg.qr(np.random.default_rng(3).normal(size=(3, 3)))[0]))),
        (1.0, 1.0, 1.0),
    ),
    "two axes of three columns": (
        Grid(center=(0.0, 0.5, 0.0), inv_scale=(1.1, 0.6, 0.9), width=0.5, axes=((0.8, 0.6), (-0.6, 0.8), (0.0, 0.0))),
        (1.0, 2.0, 0.5),
    ),
    "a column without weight": (Grid(center=(0.0, 0.0, 0.0), inv_scale=(1.0, 1.0, 1.0), width=0.5), (1.0, 0.0, 1.5)),
}


@pytest.mark.parametrize("kind", list(GRIDS))
def test_no_point_of_a_mapped_cell_is_nearer_a_centroid_than_that_centroids_bound(kind):
    grid, weights = GRIDS[kind]
    rng = np.random.default_rng(11)
    assign = Assignment(center=(0.7, -0.2, 0.4), inv_scale=(0.45, 1.7, 0.75), weights=weights,
                        centroids=tuple(map(tuple, rng.normal(scale=1.5, size=(4, 3)))))
    p = grid.dims
    keys = np.unique(rng.integers(-12, 12, size=(60, p)).astype(float), axis=0)
    keys = keys[np.abs(keys).max(axis=1) >= 6]  # cells away from the centroids, as outlier cells are
    cell_map = CellMap(grid, tuple(map(tuple, keys)), tuple([-1] * len(keys)))
    bounds = cell_map.nearest_bound(assign)
    assert bounds.shape == (4,) and (bounds >= 0).all()
    if kind != "a column without weight":
        assert (bounds > 0).all()
    x = points_in_cells(grid, keys, rng, per_cell=20)
    # reference: numpy distances from points of the mapped cells (corners and faces included) to each centroid
    d = numpy_distances(x, assign)
    assert (d >= bounds[None, :]).all()
    if kind == "columns":
        # a grid of the columns makes each cell a box: the bound is the distance to the nearest box, exactly
        # (reference: each centroid clipped into each box, numpy)
        factors = np.diag(grid.key_factors())
        lo, hi = np.asarray(grid.center) + keys / factors, np.asarray(grid.center) + (keys + 1) / factors
        at = np.asarray(assign.center) + np.asarray(assign.centroids) / np.asarray(assign.inv_scale)
        nearest_points = np.clip(at[:, None, :], lo[None], hi[None])  # centroids x cells x columns
        exact = np.array([numpy_distances(nearest_points[i], assign)[:, i].min() for i in range(len(at))])
        assert np.allclose(bounds, exact, rtol=1e-6)


@pytest.fixture(scope="module")
def mapped_rows(tmp_path_factory):
    """Blobs, far rows, rows on the borders of the mapped cells and just below them, and NaN rows."""
    rng = np.random.default_rng(5)
    grid = Grid(center=(1.3, -0.4, 2.0), inv_scale=(0.37, 1.9, 0.8), width=0.29)
    assign = Assignment(center=(0.7, -0.2, 0.4), inv_scale=(0.45, 1.7, 0.75), weights=(1.0, 1.5, 1.0),
                        centroids=((0.0, 0.0, 0.0), (2.0, -1.0, 1.0), (-2.0, 1.0, 0.5)))
    centres = np.asarray(assign.center) + np.asarray(assign.centroids) / np.asarray(assign.inv_scale)
    blobs = np.vstack([c + rng.normal(scale=0.8, size=(4000, 3)) / np.asarray(assign.inv_scale) for c in centres])
    far = rng.uniform(-12, 14, size=(600, 3))
    x = np.vstack([blobs, far])
    keys = grid.keys_of(x)
    d = numpy_distances(x, assign)
    # map the cells of the rows farthest from every centroid, and a few cells on the blobs' edges
    order = np.argsort(-d.min(axis=1))
    chosen = np.unique(np.vstack([keys[order[:300]], keys[order[3000:3010]]]), axis=0)
    factors = np.diag(grid.key_factors())
    # rows on a border of each mapped cell (x = centre + key / factor), and the double just below it
    border = np.asarray(grid.center) + chosen / factors
    below = np.nextafter(border, -np.inf)
    nan = np.full((5, 3), np.nan)
    rows = np.vstack([x, border, below, nan])
    path = write_table(tmp_path_factory.mktemp("cellmap") / "m.duckdb", "t", columns_of(rows, COLUMNS))
    return path, rows, grid, assign, chosen


def numpy_segments(rows: np.ndarray, assign: Assignment, cell_map: CellMap) -> tuple[np.ndarray, np.ndarray]:
    """Each row's segment (nearest centroid, first on ties; the mapped cell's segment; -1 or nearest
    outside the map) and its squared distance to the centroid of that segment (NaN for -1)."""
    d = numpy_distances(rows, assign)
    ok = np.isfinite(rows).all(axis=1)
    ids = np.asarray(assign.segment_ids())
    nearest = ids[np.argmin(np.where(np.isfinite(d), d, np.inf), axis=1)]
    mapped = dict(zip(map(tuple, cell_map.key_array.tolist()), cell_map.segments))
    seg = np.array([mapped.get(tuple(k), n if cell_map.unmapped == "nearest" else -1)
                    for k, n in zip(cell_map.grid.keys_of(rows).tolist(), nearest)])
    seg = np.where(ok, seg, -2)  # -2: unusable row (SQL NULL)
    where = {sid: i for i, sid in enumerate(ids)}
    dist = np.array([d[r, where[s]] if s >= 0 else np.nan for r, s in enumerate(seg)])
    return seg, dist


MAPS = {
    "outlier group": ("nearest", lambda chosen: [-1] * len(chosen)),
    "density, noise outside": ("noise", lambda chosen: [int(i % 3) for i in range(len(chosen))]),
    "density and outliers, nearest outside": ("nearest", lambda chosen: [int(i % 4) - 1 for i in range(len(chosen))]),
}


@pytest.mark.parametrize("kind", list(MAPS))
@pytest.mark.parametrize("held", [False, True], ids=["inline", "held"])
def test_refine_sums_through_a_cell_map_equal_numpy(mapped_rows, kind, held):
    path, rows, grid, assign, chosen = mapped_rows
    unmapped, segments = MAPS[kind]
    cell_map = CellMap(grid, tuple(map(tuple, chosen)), tuple(segments(chosen)), unmapped)
    d = numpy_distances(rows[np.isfinite(rows).all(axis=1)], assign)
    bounds = cell_map.nearest_bound(assign)
    assert (d < bounds[None, :]).any(axis=1).mean() > 0.5  # most rows skip their cell key
    engine = DuckDBEngine(str(path), read_only=True)
    if held:
        assert engine.hold_temporary("held_map", cell_map.columns())
        cell_map = replace(cell_map, table="held_map")
    got = engine.query(refine_statement(Source.of_table("t"), COLUMNS, assign, engine.target, cell_map=cell_map))
    engine.close()
    seg, dist = numpy_segments(rows, assign, cell_map)
    v = (rows - np.asarray(assign.center)) * np.asarray(assign.inv_scale)  # ls sums are of standardised values
    segments_got = [None if np.ma.is_masked(s) else int(s) for s in got["segment"]]
    assert sorted(segments_got, key=lambda s: -9 if s is None else s) == [None if s == -2 else int(s) for s in np.unique(seg)]
    for r, s in enumerate(segments_got):
        rows_of = seg == (-2 if s is None else s)
        assert int(got["n"][r]) == int(rows_of.sum())
        if s is None:
            continue
        for j in range(3):
            assert np.isclose(float(got[f"ls{j}"][r]), v[rows_of, j].sum(), rtol=1e-9, atol=1e-9)
        if s >= 0:
            assert np.isclose(float(got["dist"][r]), dist[rows_of].sum(), rtol=1e-9)
        else:
            assert np.ma.is_masked(got["dist"][r]) or np.isnan(float(got["dist"][r]))


@pytest.mark.parametrize("materialize", [False, True], ids=["view", "table"])
def test_labels_through_a_cell_map_equal_numpy_on_the_border_rows(mapped_rows, tmp_path, materialize):
    path, rows, grid, assign, chosen = mapped_rows
    unmapped, segments = MAPS["density and outliers, nearest outside"]
    cell_map = CellMap(grid, tuple(map(tuple, chosen)), tuple(segments(chosen)), unmapped)
    copy = tmp_path / "labels.duckdb"
    copy.write_bytes(path.read_bytes())
    engine = DuckDBEngine(str(copy))
    select = label_select(Source.of_table("t"), COLUMNS, COLUMNS, assign, engine.target, cell_map=cell_map,
                          materialize=materialize)
    engine.execute(create_relation_statement("labels", select, materialize=materialize))
    pairs = engine.con.execute('SELECT "a", "b", "c", "segment", "distance" FROM "labels"').fetchnumpy()
    engine.close()
    seg, dist = numpy_segments(rows, assign, cell_map)
    assert (np.ma.getmaskarray(pairs["segment"])).sum() == (seg == -2).sum()  # NaN rows: no segment
    # row by row, matching each labelled row to its source row by its values
    values = np.column_stack([np.ma.filled(pairs[c], np.nan) for c in COLUMNS])
    ok = np.isfinite(values).all(axis=1)
    usable = np.isfinite(rows).all(axis=1)
    by_row = {tuple(r): (s, dd) for r, s, dd in zip(rows[usable].tolist(), seg[usable], dist[usable])}
    assert ok.sum() == usable.sum()
    for r, s, dd in zip(values[ok].tolist(), np.asarray(pairs["segment"])[ok], np.ma.filled(pairs["distance"], np.nan)[ok]):
        want_seg, want_d = by_row[tuple(r)]
        assert int(s) == want_seg
        if want_seg >= 0:
            assert np.isclose(dd, np.sqrt(want_d), rtol=1e-9, atol=1e-12)
        else:
            assert np.isnan(dd)
