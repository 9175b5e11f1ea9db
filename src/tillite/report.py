"""Reports over labelled data, computed in SQL (only aggregates come back): the demo's
kind x segment table, and the segment report (`tillite report`) as plain data that
report_render.py draws as HTML with inline SVG, or writes as Markdown."""

from __future__ import annotations

import json
import math
import os
import tempfile
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from sqlglot import exp

from . import features as F
from . import sqlgen
from .engines import Engine, TilliteError
from .features import CF
from .model import Model
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

CAUTION = (
    "A segment is a statistical grouping of rows that look alike on the chosen columns, not a diagnosis. "
    "A segment named, say, 'probable leak' lists meters for the utility's usual inspection procedure to confirm; "
    "it does not show that any one of them leaks."
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


def segment_statistics(engine: Engine, source: Source, model: Model) -> dict[int, dict[str, Any]]:
    """Per segment id: n and per column (mean, sd, min, q25, q50, q75, max), from ONE GROUP BY over the labels."""
    labels = sqlgen.report_labels_select(
        source, model.columns, [], model.assignment(), engine.dialect, cell_map=model.cell_map_spec()
    )
    got = engine.query(sqlgen.segment_stats_statement(labels, model.columns, engine.dialect))
    out: dict[int, dict[str, Any]] = {}
    skipped = np.ma.getmaskarray(got["s"]) if np.ma.isMaskedArray(got["s"]) else np.zeros(len(got["s"]), bool)
    for i in range(len(got["s"])):
        if skipped[i] or got["s"][i] is None:  # the rows skipped for NULL/NaN/Inf
            continue
        sid = int(np.ma.getdata(got["s"])[i])
        per = {}
        for j, name in enumerate(model.columns):
            per[name] = {key: _float(got[f"{key}{j}"][i]) for key in ("mean", "sd", "min", "max")}
            if f"q_{j}" in got:  # one list of the three quartiles (DuckDB)
                listed = got[f"q_{j}"][i]
                values = [None] * 3 if np.ma.is_masked(listed) or listed is None else list(listed)
            else:
                values = [got[f"q{int(round(q * 100))}_{j}"][i] for q in sqlgen.QUARTILES]
            per[name].update({f"q{int(round(q * 100))}": _float(v) for q, v in zip(sqlgen.QUARTILES, values)})
        out[sid] = {"n": int(np.ma.getdata(got["n"])[i]), "columns": per}
    return out


def breakdown(engine: Engine, source: Source, model: Model, column: str, top: int = TOP_CATEGORIES) -> dict[str, Any]:
    """Rows per (segment, category) of ``column``: the ``top`` categories by rows, the rest as "other"."""
    labels = sqlgen.report_labels_select(
        source, model.columns, [column], model.assignment(), engine.dialect, cell_map=model.cell_map_spec()
    )
    got = engine.query(sqlgen.breakdown_statement(labels, column, top, engine.dialect))
    segs = _masked_texts(got["s"])
    keep = [i for i, s in enumerate(segs) if s is not None]  # groups with a NULL segment hold the skipped rows
    all_cats = _masked_texts(got["c"])
    ranks = [int(np.ma.getdata(got["b"])[i]) for i in keep]
    names: dict[int, str] = {}
    for i, b in zip(keep, ranks):
        names[b] = "other" if b > top else ("(missing)" if all_cats[i] is None else all_cats[i])
    order = sorted(names)
    ids = model.segment_ids()
    counts = {sid: [0] * len(order) for sid in ids}
    for i, b in zip(keep, ranks):
        s, n = int(np.ma.getdata(got["s"])[i]), int(np.ma.getdata(got["n"])[i])
        counts.setdefault(s, [0] * len(order))[order.index(b)] += n
    return {"column": column, "categories": [names[b] for b in order], "counts": {str(k): v for k, v in counts.items()}}


def map_cells(engine: Engine, source: Source, model: Model) -> tuple[CF, np.ndarray]:
    """The grid cells' CFs (in the grid's units) and keys: one cell pass with the model's grid."""
    from .pipeline import run_cell_pass

    cp = run_cell_pass(engine, source, model.columns, Grid.from_dict(model.grid))
    return cp.cells, cp.keys


# --------------------------------------------------------------------------- figures from summaries


def overall_from_segments(stats: dict[int, dict[str, Any]], columns: Sequence[str]) -> tuple[np.ndarray, np.ndarray, int]:
    """Exact overall mean and population sd per column, pooled from the segments' (n, mean, sd)."""
    n = np.array([s["n"] for s in stats.values()], dtype=np.float64)
    mean = np.array([[s["columns"][c]["mean"] for c in columns] for s in stats.values()], dtype=np.float64)
    sd = np.array([[s["columns"][c]["sd"] for c in columns] for s in stats.values()], dtype=np.float64)
    total = n.sum()
    mu = (n[:, None] * mean).sum(axis=0) / total
    var = (n[:, None] * (sd**2 + (mean - mu[None, :]) ** 2)).sum(axis=0) / total
    return mu, np.sqrt(np.maximum(var, 0.0)), int(total)


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


def map_figure(cells_grid: CF, model: Model, keys: np.ndarray | None = None, bins: int = 120) -> dict[str, Any]:
    """The cells on the first two principal axes; cells on the same spot of a bins x bins raster are summed."""
    cells = cells_in_model_space(cells_grid, model)
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

    ``cells``: the cells' CFs in the grid's units and their keys (a store's kept
    cells); without them one cell pass with the model's grid draws the map.
    """
    stats = segment_statistics(engine, source, model)
    cells_grid, keys = cells if cells is not None else map_cells(engine, source, model)
    breakdowns = [breakdown(engine, source, model, c) for c in by]
    return assemble(model, stats, cells_grid, breakdowns, history or [], store, keys)


def assemble(
    model: Model,
    stats: dict[int, dict[str, Any]],
    cells_grid: CF,
    breakdowns: list[dict[str, Any]],
    history: list[dict[str, Any]],
    store: str | None = None,
    keys: np.ndarray | None = None,
) -> dict[str, Any]:
    """The report's content from the engine's aggregates (no engine needed: testable on its own)."""
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
            "calinski_harabasz": calinski_harabasz_of(present, model),
            "caution": CAUTION,
        },
        "overall": {"mean": mu.tolist(), "sd": sd.tolist()},
        "segments": segments,
        "profile": profile,
        "spread": spread,
        "map": map_figure(cells_grid, model, keys) if cells_grid.m else None,
        "breakdowns": breakdowns,
        "history": _history_series(history, ids),
    }


def _history_series(history: list[dict[str, Any]], ids: Sequence[int]) -> list[dict[str, Any]]:
    return [
        {"at": h["at"], "event": h["event"], "new": h["new"], "changed": h["changed"], "vanished": h["vanished"],
         "rows": h["rows"], "sizes": {str(k): v for k, v in h["sizes"].items()},
         "largest_shift": max(h["shifts"].values(), default=None), "shifts": {str(k): v for k, v in h["shifts"].items()}}
        for h in history
    ]


def _float(v: Any) -> float | None:
    if np.ma.is_masked(v) or v is None:
        return None
    f = float(v)
    return f if math.isfinite(f) else None


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
    return _atomic_write(Path(path), text)


def _atomic_write(path: Path, text: str) -> Path:
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise TilliteError(f"folder {folder} for --out {path} does not exist")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, path)
    except BaseException as err:
        if os.path.exists(tmp):
            os.unlink(tmp)
        if isinstance(err, OSError):
            raise TilliteError(f"cannot write report {path}: {err.strerror}") from None
        raise
    return path


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


# --------------------------------------------------------------------------- entry points


def _say(progress: Any, stage: str, message: str) -> None:
    if progress is not None:
        progress(stage, message)


def report_of_model(engine: Engine, source: Source, model: Model, by: Sequence[str] = (), progress: Any = None) -> dict[str, Any]:
    """The report of a model over its source: statistics, map (one cell pass), breakdowns."""
    import time

    from .pipeline import check_columns

    present = check_columns(engine, source, list(model.columns))
    missing = [c for c in by if c not in present]
    if missing:
        raise TilliteError(f"--by column {', '.join(missing)} not found in {source.label}; columns there: {', '.join(present)}")
    t0 = time.perf_counter()
    stats = segment_statistics(engine, source, model)
    _say(progress, "report", f"per-segment statistics, {time.perf_counter() - t0:.2f} s")
    t1 = time.perf_counter()
    cells_grid, keys = map_cells(engine, source, model) if model.grid else (CF(np.zeros(0), np.zeros((0, len(model.columns))), np.zeros((0, len(model.columns)))), None)
    _say(progress, "report", f"cells for the map, {time.perf_counter() - t1:.2f} s")
    t2 = time.perf_counter()
    breakdowns = [breakdown(engine, source, model, c) for c in by]
    if by:
        _say(progress, "report", f"breakdowns by {', '.join(by)}, {time.perf_counter() - t2:.2f} s")
    return assemble(model, stats, cells_grid, breakdowns, [], None, keys)


def report_of_store(engine: Engine, store: str, by: Sequence[str] = (), progress: Any = None) -> dict[str, Any]:
    """The report of a summary store's current model: the map from its kept cells (no scan), plus its history."""
    from . import store as S
    from . import store_history
    from .pipeline import check_columns

    info = S.load(engine, store)
    present = check_columns(engine, info.source, list(info.model.columns))
    missing = [c for c in by if c not in present]
    if missing:
        raise TilliteError(f"--by column {', '.join(missing)} not found in {info.source.label}; columns there: {', '.join(present)}")
    stats = segment_statistics(engine, info.source, info.model)
    cells_grid, keys, _ = S.merged_cells(engine, info.cells_table, info.grid, len(info.columns))
    breakdowns = [breakdown(engine, info.source, info.model, c) for c in by]
    _say(progress, "report", f"store {store}: statistics, {cells_grid.m:,} kept cells, {len(breakdowns)} breakdown(s)")
    return assemble(info.model, stats, cells_grid, breakdowns, store_history.history(engine, store), store, keys)
