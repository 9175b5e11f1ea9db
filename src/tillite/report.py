"""Reports over labelled data, computed in SQL (only aggregates come back): the demo's
kind x segment table, and the segment report (`tillite report`) as plain data that
report_render.py draws as HTML with inline SVG, or writes as Markdown."""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from sqlglot import exp

from . import features as F
from . import sqlgen
from .engines import Engine, TilliteError
from .errors import ParameterError
from .features import CF
from .model import Model, write_text_atomically
from .sqlgen import Grid, Source, col, table_name

__all__ = [
    "crosstab_statement", "crosstab", "build_report", "assemble", "segment_statistics", "breakdown",
    "calinski_harabasz_of", "principal_axes", "map_figure", "write_report", "CAUTION", "FORMATS",
]


def crosstab_statement(labels: str, lookup: str, key: str, category: str, segment: str = "segment") -> exp.Select:
    """Rows per (category, segment): labels joined to a lookup table on key."""
    lab, look = "l", "m"
    return (
        exp.select(
            exp.alias_(col(category, look), "category", quoted=True),
            exp.alias_(col(segment, lab), "segment", quoted=True),
            exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True),
        )
        .from_(exp.alias_(table_name(labels), lab, table=True))
        .join(exp.alias_(table_name(lookup), look, table=True), on=exp.EQ(this=col(key, lab), expression=col(key, look)))
        .group_by(col(category, look), col(segment, lab))
    )


def crosstab(engine: Engine, labels: str, lookup: str, key: str, category: str) -> str:
    """A text table of row counts: one line per category, one column per segment."""
    got = engine.query(crosstab_statement(labels, lookup, key, category))
    cats = sorted({str(c) for c in got["category"]})
    seg_values = got["segment"]
    null = np.ma.getmaskarray(seg_values) if np.ma.isMaskedArray(seg_values) else np.zeros(len(seg_values), bool)
    segs = sorted({int(s) for s, m in zip(np.ma.getdata(seg_values), null) if not m})
    heads = [str(s) for s in segs] + (["skipped"] if null.any() else [])
    table = {c: [0] * len(heads) for c in cats}
    for c, s, m, n in zip(got["category"], np.ma.getdata(seg_values), null, got["n"]):
        table[str(c)][len(segs) if m else segs.index(int(s))] += int(n)
    if not cats:
        return f"rows by {category} (rows) and segment (columns): no rows matched {lookup} on {key}"
    first = max([len(category)] + [len(c) for c in cats])
    widths = [max([len(h)] + [len(f"{table[c][i]:,}") for c in cats]) for i, h in enumerate(heads)]
    lines = [f"rows by {category} (rows) and segment (columns):", "  ".join([category.ljust(first)] + [h.rjust(w) for h, w in zip(heads, widths)])]
    for c in cats:
        lines.append("  ".join([c.ljust(first)] + [f"{v:,}".rjust(w) for v, w in zip(table[c], widths)]))
    return "\n".join(lines)


# =========================================================================== the report
#
# Everything a person looks at comes back from the engine as aggregates: one
# GROUP BY segment over the labels (count, mean, population sd, min, max and the
# engine's approximate quartiles per column), one GROUP BY (segment, category)
# per breakdown column, and the grid cells' CFs for the map (a cell pass, or a
# store's kept cells).  Drawing is plain Python writing inline SVG: no plotting
# package, nothing fetched from the network.

REPORT_FORMAT = "tillite-report"
REPORT_VERSION = 1
FORMATS = ("html", "md", "json")
TOP_CATEGORIES = 20
#: Raster of the map: cells of one segment on the same spot of a MAP_BINS x MAP_BINS grid are one dot.
MAP_BINS = 64

#: The caution every report carries (the demo's report adds its own example: demo.REPORT_CAUTION).
CAUTION = (
    "A segment is a statistical grouping of rows that look alike on the chosen columns, not a diagnosis "
    "or a finding about any one row. What a segment seems to show is for the usual procedures of the field "
    "to confirm before anyone acts on it."
)

#: Okabe & Ito's colour-blind-safe categorical palette (their "Color Universal Design" set, from memory).
OKABE_ITO = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000")
OUTLIER_COLOUR = "#999999"
OUTLIER_DESCRIPTION = "outlier group: rows of sparse cells, set apart from every segment"
#: Diverging blue - light grey - orange scale for the profile heatmap (no red/green contrast).
DIVERGING = ((0x21, 0x66, 0xAC), (0xF7, 0xF7, 0xF7), (0xE0, 0x82, 0x14))
#: Colour used for categories beyond the palette in breakdowns ("other" is grey).
OTHER_COLOUR = "#BBBBBB"


def segment_colour(position: int, segment_id: int) -> str:
    """Okabe-Ito by position in the model, grey for the outlier group (-1)."""
    return OUTLIER_COLOUR if segment_id < 0 else OKABE_ITO[position % len(OKABE_ITO)]


# --------------------------------------------------------------------------- statistics in the engine


def assigned_rows(
    engine: Engine, source: Source, model: Model, by: Sequence[str], labels: Source | None = None,
    cell_map: sqlgen.CellMap | None = None,
) -> exp.Select:
    """The model's and the breakdown columns with each row's segment: assigned in SQL (through ``cell_map``,
    the model's map as ``stages.temporary_cell_map`` holds it, else inline), or read from a materialized
    labels table (``labels``, made by `tillite label --materialize` with this model)."""
    if labels is not None:
        return sqlgen.labelled_rows_select(labels, model.columns, by)
    return sqlgen.report_rows_select(source, model.columns, by, model.assignment(), engine.target,
                                     cell_map=cell_map or model.cell_map_spec())


def _query_assigned(engine: Engine, model: Model, labels: Source | None, statement: Callable[..., exp.Select]) -> dict:
    """Run ``statement(cell_map)`` with the model's cell map held as a temporary relation where the engine
    holds one (a join on a small table rather than thousands of literals planned in the statement)."""
    from .stages import temporary_cell_map

    with temporary_cell_map(engine, model.cell_map_spec() if labels is None else None) as held:
        return engine.query(statement(held))


def report_scan(
    engine: Engine, source: Source, model: Model, by: Sequence[str] = (), top: int = TOP_CATEGORIES,
    labels: Source | None = None,
) -> tuple[dict[int, dict[str, Any]], list[dict[str, Any]]]:
    """Per-segment statistics (no quartiles) and the breakdowns by ``by``, from ONE statement that assigns
    each row once (or reads ``labels``) and groups by (segment, category): the groups are pooled exactly here."""
    got = _query_assigned(engine, model, labels, lambda held: sqlgen.report_scan_statement(
        assigned_rows(engine, source, model, by, labels, held), model.columns, by, *_scan_units(model)))
    segs = _masked_ints(got["s"])
    keep = [i for i, s in enumerate(segs) if s is not None]  # groups with a NULL segment hold the skipped rows
    sets = _grouping_sets(got, len(by), keep)
    stats = _pooled_statistics(got, model, [i for i in keep if sets[i] == 0], segs)
    breakdowns = [_ranked_breakdown(got, model, column, f"c{b}", [i for i in keep if sets[i] == b], segs, top)
                  for b, column in enumerate(by)]
    return stats, breakdowns


def _grouping_sets(got: dict[str, np.ndarray], m: int, rows: Sequence[int]) -> dict[int, int]:
    """Which breakdown column each result row groups by: GROUPING(c_b), g{b}, is 0 in the set of c_b."""
    if m <= 1:
        return {i: 0 for i in rows}
    flags = np.column_stack([np.ma.getdata(got[f"g{b}"]).astype(np.int64) for b in range(m)])
    return {i: int(np.flatnonzero(flags[i] == 0)[0]) for i in rows}


def _scan_units(model: Model) -> tuple[list[float], list[float]]:
    """The centre and inverse scale report_scan_statement measures means and sds in (the model's own)."""
    return list(model.center), [1.0 / s for s in model.scale]


def pooled_mean_sd(n: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> tuple[float, float]:
    """Mean and population sd of groups pooled exactly (the pooled variance is the groups' mean variance
    plus the variance of their means), in units relative to the first mean and the largest spread, so
    means near 1e307 or sds near 1e200 neither overflow nor lose their digits."""
    total = n.sum()
    ref = float(mean[0])
    size = float(max(np.abs(mean - ref).max(), sd.max())) if len(mean) else 0.0
    size = size if size > 0 and math.isfinite(size) else 1.0
    m, s = (mean - ref) / size, sd / size
    mu = float((n * m).sum() / total)
    var = float((n * (s**2 + (m - mu) ** 2)).sum() / total)
    return ref + size * mu, size * math.sqrt(max(var, 0.0))


def _pooled_statistics(got: dict[str, np.ndarray], model: Model, rows: Sequence[int], segs: list[int | None]) -> dict[int, dict[str, Any]]:
    """Per segment: n and per column mean, population sd, min, max pooled exactly from its groups' figures
    (means and sds come in the units of ``_scan_units``: moved back to the column's own here)."""
    n_all = np.ma.getdata(got["n"]).astype(np.float64)
    out: dict[int, dict[str, Any]] = {}
    for sid in sorted({segs[i] for i in rows}):
        idx = [i for i in rows if segs[i] == sid]
        n = n_all[idx]
        total = n.sum()
        per = {}
        for j, name in enumerate(model.columns):
            mean = np.array([_float(got[f"mean{j}"][i]) for i in idx], dtype=np.float64)
            sd = np.array([_float(got[f"sd{j}"][i]) for i in idx], dtype=np.float64)
            mu, spread = pooled_mean_sd(n, mean, sd)
            lo, hi = min(_float(got[f"min{j}"][i]) for i in idx), max(_float(got[f"max{j}"][i]) for i in idx)
            per[name] = {"mean": _within(float(model.center[j]) + mu * float(model.scale[j]), lo, hi),
                         "sd": 0.0 if lo == hi else spread * float(model.scale[j]), "min": lo, "max": hi}
        out[int(sid)] = {"n": int(total), "columns": per}
    return out


def _within(mean: float, lo: float | None, hi: float | None) -> float:
    """A mean moved back to the column's units, kept inside the rows' own min and max: a segment whose rows are
    all 0 reads 0, not the round-off of centre + (-centre / scale) * scale (about 1e-13)."""
    if lo is None or hi is None:
        return mean
    return min(max(mean, lo), hi)


def _ranked_breakdown(
    got: dict[str, np.ndarray], model: Model, column: str, key: str, rows: Sequence[int], segs: list[int | None], top: int
) -> dict[str, Any]:
    """Rows per (segment, category): the ``top`` categories by usable rows (ties by text, missing last), the rest as "other"."""
    cats = _masked_texts(got[key])
    n_all = np.ma.getdata(got["n"])
    totals: dict[str | None, int] = {}
    for i in rows:
        totals[cats[i]] = totals.get(cats[i], 0) + int(n_all[i])
    order = sorted(totals, key=lambda c: (-totals[c], c is None, c or ""))
    kept = order[:top]
    names = ["(missing)" if c is None else c for c in kept] + (["other"] if len(order) > top else [])
    slot = {c: b for b, c in enumerate(kept)}
    counts = {sid: [0] * len(names) for sid in model.segment_ids()}
    for i in rows:
        counts.setdefault(int(segs[i]), [0] * len(names))[slot.get(cats[i], top)] += int(n_all[i])
    return {"column": column, "categories": names, "counts": {str(k): v for k, v in counts.items()}}


def quartile_sample_percent(model: Model, rows: int = sqlgen.QUARTILE_SAMPLE_ROWS) -> float:
    """The share of rows (in %) the quartile sample reads: about ``rows`` rows of the model's table."""
    return min(100.0, 100.0 * rows / max(int(model.rows), 1))


def sample_quartiles(
    engine: Engine, source: Source, model: Model, percent: float | None = None, labels: Source | None = None
) -> tuple[dict[int, dict[str, Any]], int]:
    """Per segment: sampled rows and per column q25, q50, q75 from a seeded Bernoulli sample of the rows
    (all rows when the table is small); returns them and the sample's size."""
    percent = quartile_sample_percent(model) if percent is None else percent
    got = _query_assigned(engine, model, labels, lambda held: sqlgen.quartile_statement(
        sqlgen.sampled_rows(assigned_rows(engine, source, model, [], labels, held), percent, engine.target),
        model.columns, engine.target))
    return quartiles_of(got, model.columns)


def quartiles_of(got: dict[str, np.ndarray], columns: Sequence[str]) -> tuple[dict[int, dict[str, Any]], int]:
    """The quartile statement's result per segment (rows with no segment left out), and the rows sampled."""
    out: dict[int, dict[str, Any]] = {}
    segs = _masked_ints(got["s"])
    sampled = 0
    for i, sid in enumerate(segs):
        if sid is None:
            continue
        per = {}
        for j, name in enumerate(columns):
            if f"q_{j}" in got:  # one list of the three quartiles (DuckDB)
                listed = got[f"q_{j}"][i]
                values = [None] * 3 if np.ma.is_masked(listed) or listed is None else list(listed)
            else:
                values = [got[f"q{int(round(q * 100))}_{j}"][i] for q in sqlgen.QUARTILES]
            per[name] = {f"q{int(round(q * 100))}": _float(v) for q, v in zip(sqlgen.QUARTILES, values)}
        n = int(np.ma.getdata(got["n"])[i])
        sampled += n
        out[sid] = {"n": n, "columns": per}
    return out, sampled


def with_quartiles(stats: dict[int, dict[str, Any]], quartiles: dict[int, dict[str, Any]]) -> dict[int, dict[str, Any]]:
    """The statistics with each segment's sampled quartiles (None where the sample holds none of its rows)."""
    for sid, st in stats.items():
        q = quartiles.get(sid, {"n": 0, "columns": {}})
        st["sampled"] = q["n"]
        for name, per in st["columns"].items():
            per.update(q["columns"].get(name, dict.fromkeys(("q25", "q50", "q75"))))
    return stats


def segment_statistics(engine: Engine, source: Source, model: Model) -> dict[int, dict[str, Any]]:
    """Per segment id: n and per column (mean, sd, min, q25, q50, q75, max): one GROUP BY over the
    labels, the quartiles from the seeded sample (sample_quartiles)."""
    stats, _ = report_scan(engine, source, model)
    return with_quartiles(stats, sample_quartiles(engine, source, model)[0])


def breakdown(engine: Engine, source: Source, model: Model, column: str, top: int = TOP_CATEGORIES) -> dict[str, Any]:
    """Rows per (segment, category) of ``column``: the ``top`` categories by rows, the rest as "other"."""
    return report_scan(engine, source, model, [column], top)[1][0]


def map_cells(engine: Engine, source: Source, model: Model) -> tuple[CF, np.ndarray]:
    """The grid cells' CFs (in the grid's units) and keys: one cell pass with the model's grid."""
    from .stages import run_cell_pass

    cp = run_cell_pass(engine, source, model.columns, Grid.from_dict(model.grid))
    return cp.cells, cp.keys


# --------------------------------------------------------------------------- figures from summaries


def overall_from_segments(stats: dict[int, dict[str, Any]], columns: Sequence[str]) -> tuple[np.ndarray, np.ndarray, int]:
    """Exact overall mean and population sd per column, pooled from the segments' (n, mean, sd)."""
    n = np.array([s["n"] for s in stats.values()], dtype=np.float64)
    mean = np.array([[s["columns"][c]["mean"] for c in columns] for s in stats.values()], dtype=np.float64)
    sd = np.array([[s["columns"][c]["sd"] for c in columns] for s in stats.values()], dtype=np.float64)
    both = np.array([pooled_mean_sd(n, mean[:, j], sd[:, j]) for j in range(len(columns))]).reshape(-1, 2)
    return both[:, 0], both[:, 1], int(n.sum())


def calinski_harabasz_of(stats: dict[int, dict[str, Any]], model: Model) -> float | None:
    """Calinski-Harabasz in the model's distance space (weighted, scaled), exactly from the segments' CFs.

    Per segment the CF is (n, n*mean, n*(sd^2 + mean^2)) per column; B and W follow
    from them without any row.  None with fewer than 2 segments.
    """
    k = len(stats)
    n = np.array([s["n"] for s in stats.values()], dtype=np.float64)
    total = n.sum()
    if k < 2 or total <= k:
        return None
    f = np.asarray(model.weights, dtype=np.float64) / np.asarray(model.scale, dtype=np.float64)
    mean = np.array([[s["columns"][c]["mean"] for c in model.columns] for s in stats.values()], dtype=np.float64) * f
    sd = np.array([[s["columns"][c]["sd"] for c in model.columns] for s in stats.values()], dtype=np.float64) * np.abs(f)
    mu = (n[:, None] * mean).sum(axis=0) / total
    between = float((n[:, None] * (mean - mu[None, :]) ** 2).sum())
    within = float((n[:, None] * sd**2).sum())
    if within <= 0:
        return None
    return (between / (k - 1)) / (within / (total - k))


def cells_in_model_space(cells_grid: CF, model: Model) -> CF:
    """Cells from the grid's units, (x - grid centre) * grid inv_scale, into the model's weighted scaled units."""
    grid = Grid.from_dict(model.grid)
    w = np.asarray(model.weights, dtype=np.float64)
    scale = np.asarray(model.scale, dtype=np.float64)
    a = w / (np.asarray(grid.inv_scale) * scale)
    b = w * (np.asarray(grid.center) - np.asarray(model.center)) / scale
    return F.affine(cells_grid, a, b)


def principal_axes(cells: CF) -> tuple[np.ndarray, np.ndarray]:
    """Eigenvalues (descending) and eigenvectors (columns) of the covariance from the summed cell CFs.

    Diagonal: exact (per-column square sums).  Off-diagonal: between-cell part from
    the cell centroids, as the CFs keep no cross products; the grid cells are small,
    so the within-cell covariance they miss is small too.
    """
    n = cells.n
    total = n.sum()
    mean = cells.ls.sum(axis=0) / total
    cent = F.centroids(cells)
    dev = cent - mean[None, :]
    cov = (dev * n[:, None]).T @ dev / total
    within = (cells.ss - cells.ls**2 / np.where(n > 0, n, 1.0)[:, None]).sum(axis=0) / total
    cov[np.diag_indices_from(cov)] += np.maximum(within, 0.0)
    values, vectors = np.linalg.eigh(cov)
    order = np.argsort(values)[::-1]
    return np.maximum(values[order], 0.0), vectors[:, order]


def cell_segments(cells: CF, model: Model, keys: np.ndarray | None = None) -> np.ndarray:
    """Each cell's segment id, as the labels give it: through the model's cell map where it
    lists the cell (outlier group, density segments), else the nearest centroid."""
    from .segmenters import nearest

    w = np.asarray(model.weights, dtype=np.float64)
    centroids = np.asarray(model.centroids_scaled, dtype=np.float64) * w[None, :]
    ids = np.asarray(model.segment_ids())
    out = ids[nearest(F.centroids(cells), centroids)[0]] if cells.m else np.zeros(0, int)
    spec = model.cell_map_spec()
    if spec is not None and keys is not None and len(keys) == cells.m:
        mapped = {tuple(k): s for k, s in zip(spec.keys, spec.segments)}
        for i, k in enumerate(map(tuple, np.asarray(keys, dtype=np.float64))):
            if k in mapped:
                out[i] = mapped[k]
            elif spec.unmapped == "noise":
                out[i] = -1
    return out


def map_figure(cells_grid: CF, model: Model, keys: np.ndarray | None = None, bins: int = MAP_BINS) -> dict[str, Any]:
    """The cells on the first two principal axes; cells on the same spot of a bins x bins raster are summed."""
    return map_of_cells(cells_in_model_space(cells_grid, model), model, keys, bins)


def map_of_cells(cells: CF, model: Model, keys: np.ndarray | None = None, bins: int = MAP_BINS) -> dict[str, Any]:
    """``map_figure`` of cells already in the model's weighted scaled units."""
    keep = cells.n > 0
    cells = CF(cells.n[keep], cells.ls[keep], cells.ss[keep])
    keys = None if keys is None or len(keys) != len(keep) else np.asarray(keys)[keep]
    values, vectors = principal_axes(cells)
    axes = vectors[:, :2] if vectors.shape[1] >= 2 else np.column_stack([vectors[:, 0], np.zeros(len(vectors))])
    share = (values[:2] / values.sum()).tolist() if values.sum() > 0 else [0.0, 0.0]
    xy = F.centroids(cells) @ axes
    seg = cell_segments(cells, model, keys)
    w = np.asarray(model.weights, dtype=np.float64)
    cxy = (np.asarray(model.centroids_scaled, dtype=np.float64) * w[None, :]) @ axes
    lo, hi = xy.min(axis=0), xy.max(axis=0)
    span = np.where(hi > lo, hi - lo, 1.0)
    spot = np.floor((xy - lo) / span * (bins - 1e-9)).astype(np.int64)
    key = (seg.astype(np.int64) + 1) * bins * bins + spot[:, 0] * bins + spot[:, 1]
    uniq, inverse = np.unique(key, return_inverse=True)
    inverse = inverse.ravel()
    n = np.bincount(inverse, weights=cells.n)
    x = np.bincount(inverse, weights=cells.n * xy[:, 0]) / n
    y = np.bincount(inverse, weights=cells.n * xy[:, 1]) / n
    s = (uniq // (bins * bins)) - 1
    return {
        "variance_share": share,
        "axes": axes.T.tolist(),
        "cells": int(cells.m),
        "dots": {"x": x.tolist(), "y": y.tolist(), "n": n.tolist(), "segment": s.astype(int).tolist()},
        "centroids": [{"segment": int(sid), "x": float(p[0]), "y": float(p[1])} for sid, p in zip(model.segment_ids(), cxy)],
    }


def stored_map(cells_grid: CF, keys: np.ndarray | None, model: Model) -> dict[str, Any]:
    """The map kept in the model file: map_figure's dots, numbers to 6 significant digits ({} without cells)."""
    if cells_grid.m == 0 or not (cells_grid.n > 0).any():
        return {}
    figure = map_figure(cells_grid, model, keys, bins=MAP_BINS)
    return _rounded(figure)


def attach_group_maps(model: Model, cells: Mapping[str | None, CF]) -> None:
    """Each group of a --within model in ``cells`` (its value -> its cells in its own scaled units) gets its
    report map (``report_map`` of its entry), as a single model keeps its map; other groups keep theirs (a
    store's groups that a refresh did not re-segment)."""
    from .model import group_models
    from .segmenters import one_blas_thread

    for entry, one in group_models(model):
        if entry["value"] not in cells:
            continue
        group_cells = cells[entry["value"]]
        w = np.asarray(one.weights, dtype=np.float64)
        try:
            with np.errstate(all="ignore"), one_blas_thread():
                weighted = F.affine(group_cells, w, np.zeros_like(w))
                entry["report_map"] = _rounded(map_of_cells(weighted, one)) if (group_cells.n > 0).any() else {}
        except (ValueError, FloatingPointError, np.linalg.LinAlgError):
            entry["report_map"] = {}


def _rounded(value: Any) -> Any:
    if isinstance(value, float):
        return float(f"{value:.6g}")
    if isinstance(value, list):
        return [_rounded(v) for v in value]
    if isinstance(value, dict):
        return {k: _rounded(v) for k, v in value.items()}
    return value


def report_map(engine: Engine, source: Source, model: Model) -> dict[str, Any] | None:
    """The map: the one kept in the model file, else (older model files) one cell pass with the model's grid."""
    if model.report_map:
        return {**model.report_map, "from": "model"}
    if not model.grid:
        return None
    cells_grid, keys = map_cells(engine, source, model)
    return {**map_figure(cells_grid, model, keys, bins=MAP_BINS), "from": "cell pass"} if cells_grid.m else None


# --------------------------------------------------------------------------- the report's content


def build_report(
    engine: Engine,
    source: Source,
    model: Model,
    by: Sequence[str] = (),
    cells: tuple[CF, np.ndarray] | None = None,
    history: list[dict[str, Any]] | None = None,
    store: str | None = None,
) -> dict[str, Any]:
    """Everything the report shows, as plain data (what --format json writes).

    Two statements: one scan for the statistics and every breakdown, one over
    a seeded sample for the quartiles.  ``cells``: the cells' CFs in the grid's
    units and their keys (a store's kept cells) to draw the map from; without
    them the map kept in the model file, else (older files) one cell pass.
    """
    stats, breakdowns = report_scan(engine, source, model, by)
    quartiles, sampled = sample_quartiles(engine, source, model)
    stats = with_quartiles(stats, quartiles)
    if cells is not None:
        figure = map_figure(cells[0], model, cells[1]) if cells[0].m else None
    else:
        figure = report_map(engine, source, model)
    return assemble(model, stats, _no_cells(model), breakdowns, history or [], store, None, figure=figure, sampled=sampled)


def _no_cells(model: Model) -> CF:
    d = len(model.columns)
    return CF(np.zeros(0), np.zeros((0, d)), np.zeros((0, d)))


def assemble(
    model: Model,
    stats: dict[int, dict[str, Any]],
    cells_grid: CF,
    breakdowns: list[dict[str, Any]],
    history: list[dict[str, Any]],
    store: str | None = None,
    keys: np.ndarray | None = None,
    figure: dict[str, Any] | None = None,
    sampled: int | None = None,
) -> dict[str, Any]:
    """The report's content from the engine's aggregates (no engine needed: testable on its own).

    ``figure``: the map already drawn (kept in the model file), else drawn from ``cells_grid``;
    ``sampled``: rows of the sample the quartiles come from.
    """
    columns = list(model.columns)
    ids = model.segment_ids() + ([-1] if -1 in stats and -1 not in model.segment_ids() else [])
    present = {sid: stats[sid] for sid in ids if sid in stats}
    mu, sd, usable = overall_from_segments(present, columns) if present else (np.zeros(len(columns)), np.ones(len(columns)), 0)
    safe_sd = np.where(sd > 0, sd, 1.0)
    segments, profile, spread = [], [], {c: [] for c in columns}
    for i, sid in enumerate(ids):
        st = stats.get(sid, {"n": 0, "columns": {c: dict.fromkeys(("mean", "sd", "min", "max", "q25", "q50", "q75")) for c in columns}})
        segments.append({
            "segment": sid,
            "name": model.segment_name(sid),
            "rows": st["n"],
            "share": st["n"] / usable if usable else 0.0,
            "description": model.segment_description(i) if i < len(model.sizes) else OUTLIER_DESCRIPTION,
            "colour": segment_colour(i, sid),
        })
        means = [st["columns"][c]["mean"] for c in columns]
        profile.append({
            "segment": sid,
            "mean": means,
            "z": [None if m is None else float((m - mu[j]) / safe_sd[j]) for j, m in enumerate(means)],
        })
        for c in columns:
            spread[c].append({"segment": sid, **st["columns"][c]})
    return {
        "format": REPORT_FORMAT,
        "version": REPORT_VERSION,
        "header": {
            "source": model.source,
            "store": store,
            "rows": model.rows,
            "skipped": model.skipped,
            "segmented": usable,
            "columns": columns,
            "method": model.method,
            "k": model.k,
            "built": model.created,
            "sse": model.sse,
            "sse_basis": model.sse_basis(),
            "calinski_harabasz": calinski_harabasz_of(present, model),
            "quartile_sample": sampled,
            "quartile_sample_percent": quartile_sample_percent(model),
            "caution": CAUTION,
        },
        "overall": {"mean": mu.tolist(), "sd": sd.tolist()},
        "segments": segments,
        "profile": profile,
        "spread": spread,
        "map": figure if figure is not None else (map_figure(cells_grid, model, keys) if cells_grid.m else None),
        "breakdowns": breakdowns,
        "history": _history_series(history, ids),
    }


def _history_series(history: list[dict[str, Any]], ids: Sequence[int]) -> list[dict[str, Any]]:
    return [
        {"at": h["at"], "event": h["event"], "new": h["new"], "changed": h["changed"], "vanished": h["vanished"],
         "rows": h["rows"], "k": h["k"], "sizes": {str(k): v for k, v in h["sizes"].items()},
         "largest_shift": max(h["shifts"].values(), default=None), "shifts": {str(k): v for k, v in h["shifts"].items()}}
        for h in history
    ]


def _float(v: Any) -> float | None:
    if np.ma.is_masked(v) or v is None:
        return None
    f = float(v)
    return f if math.isfinite(f) else None


def _masked_ints(values: np.ndarray) -> list[int | None]:
    mask = np.ma.getmaskarray(values) if np.ma.isMaskedArray(values) else np.zeros(len(values), bool)
    data = np.ma.getdata(values)
    return [None if m or v is None else int(v) for v, m in zip(data, mask)]


def _masked_texts(values: np.ndarray) -> list[str | None]:
    mask = np.ma.getmaskarray(values) if np.ma.isMaskedArray(values) else np.zeros(len(values), bool)
    data = np.ma.getdata(values)
    return [None if m or v is None else str(v) for v, m in zip(data, mask)]


# --------------------------------------------------------------------------- writing


def write_report(content: dict[str, Any], path: str | os.PathLike, fmt: str = "html") -> Path:
    """Write the report atomically as html (one self-contained file), md or json."""
    from .report_render import render_html, render_markdown

    if fmt not in FORMATS:
        raise TilliteError(f"--format must be one of {', '.join(FORMATS)}, got {fmt!r}")
    text = {"html": render_html, "md": render_markdown, "json": lambda c: json.dumps(c, indent=2)}[fmt](content)
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise TilliteError(f"folder {folder} for --out {path} does not exist")
    return write_text_atomically(path, text, "report")


# --------------------------------------------------------------------------- entry points


def _say(progress: Any, stage: str, message: str) -> None:
    if progress is not None:
        progress(stage, message)


def report_of_model(
    engine: Engine, source: Source, model: Model, by: Sequence[str] = (), progress: Any = None, labels: str | None = None,
    caution: str = CAUTION,
) -> dict[str, Any]:
    """The report of a model over its source: one scan for statistics and breakdowns, the quartiles from a
    seeded sample, the map from the model file (a cell pass for older model files).

    ``labels``: a labels table made by `tillite label --materialize` with this model; its segment column
    is read instead of assigning every row again (the rows are then those of the table).
    ``caution``: the report's caution (the demo gives one naming its own example).
    """
    content = _report_of_model(engine, source, model, by, progress, labels)
    content["header"]["caution"] = caution
    return content


def _report_of_model(
    engine: Engine, source: Source, model: Model, by: Sequence[str], progress: Any, labels: str | None
) -> dict[str, Any]:
    import time

    from .stages import check_columns, check_model_columns, model_source

    check_model_columns(engine, source, model)
    source = model_source(engine, source, model)  # categorical columns: their indicators' means are the shares
    present = check_columns(engine, source, list(model.columns), chosen=False)
    by = breakdown_columns(engine, by, present, source, source.label)
    if model.within:
        if labels:
            raise TilliteError("--labels is not taken with a model of segments within groups (segment --within) yet; "
                               "leave it out: the report assigns the rows in its one scan")
        if model.within["column"] not in present:
            raise TilliteError(f"--within column {model.within['column']} of the model not found in {source.label}")
        return within_report(engine, source, model, by, progress)
    labelled = _labels_table(engine, labels, model, by) if labels else None
    t0 = time.perf_counter()
    stats, breakdowns = report_scan(engine, source, model, by, labels=labelled)
    how = f"read from {labels}" if labels else "one scan"
    _say(progress, "report", f"per-segment statistics{' and breakdowns by ' + ', '.join(by) if by else ''}, {how}, {time.perf_counter() - t0:.2f} s")
    t1 = time.perf_counter()
    quartiles, sampled = sample_quartiles(engine, source, model, labels=labelled)
    _say(progress, "report", f"quartiles from a sample of {sampled:,} rows, {time.perf_counter() - t1:.2f} s")
    t2 = time.perf_counter()
    figure = report_map(engine, source, model)
    where = "kept in the model file" if model.report_map else "one cell pass (the model file has no map)"
    _say(progress, "report", f"map {where}, {time.perf_counter() - t2:.2f} s")
    return assemble(model, with_quartiles(stats, quartiles), _no_cells(model), breakdowns, [], None, None,
                    figure=figure, sampled=sampled)


def breakdown_columns(engine: Engine, by: Sequence[str], present: Sequence[str], source: Source, label: str) -> list[str]:
    """The --by columns as the engine resolves them against the table's (``Target.resolve_name``), each once;
    one line naming those the source (``label``) lacks, listing its own columns (not the ones tillite derives)."""
    if isinstance(by, str):
        raise ParameterError(f"{{by}} must be a list of column names, e.g. [{by!r}], not the text {by!r}", "by")
    by = list(dict.fromkeys(engine.target.resolve_name(c, present) or c for c in by))
    missing = [c for c in by if c not in present]
    if missing:
        shown = [c for c in present if c not in source.derived_names()]
        raise TilliteError(f"--by column {', '.join(missing)} not found in {label}; columns there: {', '.join(shown)}")
    return by


def _labels_table(engine: Engine, labels: str, model: Model, by: Sequence[str]) -> Source:
    """The --labels table as a Source, checked to hold a segment column, the model's and the --by columns, and
    to be labels tillite made (a table of the user's may have a segment column of its own)."""
    from .pipeline import is_owned
    from .stages import check_columns

    src = Source.of_table(labels)
    present = check_columns(engine, src, ["segment"], chosen=False)
    if not is_owned(engine.relation_comment(labels)):
        raise TilliteError(f"--labels {labels} was not made by `tillite label`, so its segment column may not be "
                           "labels of this model; give a table `tillite label --materialize` made, or leave --labels out")
    missing = [c for c in list(model.columns) + list(by) if c not in present]
    if missing:
        raise TilliteError(f"--labels {labels} lacks column {', '.join(missing)}; columns there: {', '.join(present)}")
    return src


def report_of_store(engine: Engine, store: str, by: Sequence[str] = (), progress: Any = None) -> dict[str, Any]:
    """The report of a summary store's current model: the map from its kept cells (no scan), plus its history."""
    from . import store as S
    from . import store_history
    from .stages import check_columns, model_source

    info = S.load(engine, store)
    source = model_source(engine, info.source, info.model)  # categorical columns: their indicators' means are the shares
    present = check_columns(engine, source, list(info.model.columns), chosen=False)
    by = breakdown_columns(engine, by, present, source, info.source.label)
    if info.model.within:  # one section per group, each with the map its refresh kept, as `segment --within`'s file
        content = within_report(engine, info.source, info.model, by, progress)
        content["header"]["store"] = store
        content["history"] = _history_series(store_history.history(engine, store), [])
        return content
    stats, breakdowns = report_scan(engine, source, info.model, by)
    quartiles, sampled = sample_quartiles(engine, source, info.model)
    cells_grid, keys, _ = S.store_cells(engine, info.cells_table, info.grid, info.columns, S.store_categories(info))
    _say(progress, "report", f"store {store}: statistics, {cells_grid.m:,} kept cells, {len(breakdowns)} breakdown(s)")
    return assemble(info.model, with_quartiles(stats, quartiles), cells_grid, breakdowns,
                    store_history.history(engine, store), store, keys, sampled=sampled)


# --------------------------------------------------------------------------- reports of --within models


def within_report(engine: Engine, source: Source, model: Model, by: Sequence[str] = (), progress: Any = None) -> dict[str, Any]:
    """The report of a `segment --within` model: every group's report (sizes, profile, spread, its map kept in the
    model file, breakdowns) from the same two statements a single model's report makes, one scan and one sample,
    each row's segment keyed by (group, segment) through the per-group join of the label view."""
    import time

    from .model import group_models
    from .within import model_assignment
    from .within_sql import report_rows_select

    groups = group_models(model)
    stride = max(g["k"] for g, _ in groups) + 1
    t0 = time.perf_counter()
    rows = report_rows_select(source, model.columns, by, model_assignment(model), engine.target, stride)
    got = engine.query(sqlgen.report_scan_statement(rows, model.columns, by, *_scan_units(model)))
    codes = _masked_ints(got["s"])
    sets = _grouping_sets(got, len(by), [i for i, s in enumerate(codes) if s is not None])
    _say(progress, "report", f"per-segment statistics of {len(groups):,} group(s){' and breakdowns by ' + ', '.join(by) if by else ''}, "
                             f"one scan, {time.perf_counter() - t0:.2f} s")
    t1 = time.perf_counter()
    sample = engine.query(sqlgen.quartile_statement(sqlgen.sampled_rows(rows, quartile_sample_percent(model), engine.target),
                                                    model.columns, engine.target))
    quartiles, sampled = quartiles_of(sample, model.columns)
    _say(progress, "report", f"quartiles from a sample of {sampled:,} rows, {time.perf_counter() - t1:.2f} s")
    segs = [None if s is None else s % stride for s in codes]  # each result row's segment within its group
    rows_of: dict[int, list[int]] = {}  # each group position's result rows, in one pass over them
    for i, s in enumerate(codes):
        if s is not None:
            rows_of.setdefault(s // stride, []).append(i)
    reports = []
    for position, (entry, one) in enumerate(groups):
        mine = rows_of.get(position, [])
        stats = _pooled_statistics(got, model, [i for i in mine if sets[i] == 0], segs)
        breakdowns = [_ranked_breakdown(got, one, column, f"c{b}", [i for i in mine if sets[i] == b], segs, TOP_CATEGORIES)
                      for b, column in enumerate(by)]
        own = {s % stride: q for s, q in quartiles.items() if s // stride == position}
        content = assemble(one, with_quartiles(stats, own), _no_cells(one), breakdowns, [], None, None,
                           figure=entry.get("report_map") or None, sampled=sum(q["n"] for q in own.values()))
        content["header"].update(source=model.source, units=f"in the group's own {one.units(short=True).removeprefix('in ')}")
        reports.append({"group": entry["name"], "value": entry["value"], "notes": entry.get("notes", []), "report": content})
    return {
        "format": REPORT_FORMAT, "version": REPORT_VERSION,
        "header": {"source": model.source, "within": model.within["column"], "rows": model.rows, "skipped": model.skipped,
                   "columns": list(model.columns), "method": model.method, "groups": len(groups),
                   "segments": sum(g["k"] for g, _ in groups), "built": model.created, "sse": model.sse,
                   "sse_basis": model.sse_basis(), "quartile_sample": sampled, "quartile_sample_percent": quartile_sample_percent(model), "caution": CAUTION},
        "groups": reports,
    }
