"""`segment --within COL`: segments computed separately per group, every group from the same scans.

profile (one sample, with each row's group) -> one grid for all groups ->
cell pass keyed by (group, cell) in ONE statement -> per group: exact
standardisation, second phase (k per group; ``--k auto`` per group) -> refine
passes, all groups in one statement per pass (each row's centroid set chosen
by its group) -> one model file holding every group's model (``Model.within``).
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from typing import Any, Callable, Sequence

import numpy as np

from . import features as F
from . import sqlgen, within_sql
from .engines import Engine, SourceError
from .errors import InputError, ParameterError
from .features import CF
from .model import Model, k_list_text
from .segmenters import KMeansResult, choose_k, pick_k, ranked_candidates
from .stages import (
    CellBoxes, Profile, ProgressFn, SegmentStats, Standardisation, canonical_sample, center_and_scale,
    check_columns, check_k_limit, columns_there, choose_width, count_rows, grid_for_profile, moved_to_means, null_mask, quiet_progress, run_second_phase, sample_promise,
    seeded_sample, size_order, standardise_cells,
)
from .settings import Settings
from .sqlgen import Grid, Partitioning, Source
from .within_sql import GroupAssignment

__all__ = ["segment_within", "MAX_GROUPS", "group_assignment", "NULL_GROUP_NAME", "label_within_select"]

#: Most groups `--within` takes; more are refused (each group is a model of its own: a column with
#: 100,000 values is an identifier, not a grouping, and its cells would swamp the second phase).
MAX_GROUPS = 1_000

#: How the NULL group is named in output.
NULL_GROUP_NAME = "NULL"


def group_name(value: str | None) -> str:
    """The NULL group is NULL; a text value 'NULL', an empty value and one with blanks at either end are shown
    quoted (``''``, ``' '``), so they read apart from NULL and are seen at all."""
    if value is None:
        return NULL_GROUP_NAME
    return f"'{value}'" if value == NULL_GROUP_NAME or value != value.strip() or not value else value


def group_value_of_key(key: str) -> str | None:
    """The group's text from a partition key (``Partitioning.key``: ``~`` for NULL, else ``len:text``)."""
    if key == "~":
        return None
    return key.split(":", 1)[1]


def check_within(engine: Engine, source: Source, columns: Sequence[str], within: str, settings: Settings) -> str:
    """The group column's type, after refusing what --within cannot do (one line each)."""
    if not isinstance(within, str) or not within:
        raise ParameterError("{within} must name a column", "within")
    if within in columns:
        raise ParameterError(f"{{within}} {within} is also a segmenting column; group by a column not in --columns", "within")
    if settings.method == "density":
        raise ParameterError("{within} works with {method} kmeans or ward, not density", "within", "method")
    if within in (getattr(settings, "categorical", ()) or ()):
        raise ParameterError(f"{{within}} {within} is also a {{categorical}} column; group by a column not segmented on",
                             "within", "categorical")
    described = engine.describe(source)
    types = dict(described)
    if within not in types:
        raise SourceError(f"--within column {within} not found in {source.label}; columns there: {columns_there(described, source)}")
    return types[within]


def too_many_groups(count: int, within: str, where: str) -> ParameterError:
    return ParameterError(
        f"{{within}} {within} has {count:,}{'+' if where == 'sample' else ''} groups (seen in the {where}); "
        f"at most {MAX_GROUPS:,} are segmented separately: choose a coarser column", "within",
    )


# ----------------------------------------------------------------------------- profile


@dataclass
class GroupedProfile:
    profile: Profile
    groups: np.ndarray  # group code of each sample row (position in ``values``)
    values: list[str | None]


def run_grouped_profile(engine: Engine, source: Source, columns: Sequence[str], within: str, settings: Settings) -> GroupedProfile:
    """``pipeline.run_profile`` with each sampled row's group: one sample for the grid of every group."""
    t0 = time.perf_counter()
    rows = count_rows(engine, source)
    d, target = len(columns), settings.sample_rows

    def fetch(limit: int | None = None, **kw: Any) -> dict[str, Any]:  # no LIMIT: every sampled row keeps its group
        return engine.query(within_sql.grouped_sample_statement(source, columns, within, engine.target, **kw))

    got = seeded_sample(engine, rows, settings, fetch, lambda g: len(g[within_sql.GROUP_TEXT]))
    codes, values = sampled_groups(got, within)
    x = np.column_stack([np.asarray(got[sqlgen.internal(f"x{j}")], dtype=np.float64) for j in range(d)]) if len(codes) else np.zeros((0, d))
    both = canonical_sample(np.column_stack([codes, x]), target, settings.seed) if len(x) else np.zeros((0, d + 1))
    sample, groups = both[:, 1:], both[:, 0].astype(np.int64)
    center, scale = center_and_scale(sample, settings.scaling, columns)
    repeats = sample_promise(engine, rows, settings)
    prof = Profile(rows=rows, sample=sample, center=center, scale=scale, seconds=time.perf_counter() - t0, repeats=repeats)
    return GroupedProfile(prof, groups, values)


def sampled_groups(got: dict[str, Any], within: str) -> tuple[np.ndarray, list[str | None]]:
    """Each sampled row's group code (its position in the values: text order, NULL last), and the values;
    more than MAX_GROUPS values are refused."""
    texts = [None if t is None or (isinstance(t, float) and math.isnan(t)) else str(t)
             for t in np.ma.filled(np.asarray(got[within_sql.GROUP_TEXT], dtype=object), None)]
    values = sorted(set(texts), key=lambda t: (t is None, t or ""))
    if len(values) > MAX_GROUPS:
        raise too_many_groups(len(values), within, "sample")
    code = {v: i for i, v in enumerate(values)}
    return np.array([code[t] for t in texts], dtype=np.float64), values


def pair_budget(cell_budget: int, groups: int) -> int:
    """The (group, cell) pairs the shared grid aims at: the cell budget times the square root of the groups.

    With the budget alone, 50 groups got about 200 cells each (k = 4): cell-level
    centroids that far from the rows' made the first refine pass gain 0.15-0.2%
    in every group, so every group took a second pass (a whole scan).  At
    budget x sqrt(groups) each group gets about 5 times the cells, the first pass
    gains below the 1e-4 tolerance and one pass suffices; the cell pass's GROUP BY
    and the per-group k-means grow far less than a pass costs
    (``benchmarks/bench_within.py``).
    """
    return int(cell_budget * math.sqrt(max(groups, 1)))


def grouped_grid(gp: GroupedProfile, settings: Settings, weights: np.ndarray) -> Grid:
    """One grid for every group, its width chosen so the (group, cell) pairs fit ``pair_budget``.

    Each group's sampled coordinates are moved by a distinct offset far beyond
    the data's span, so ``choose_width`` counts (group, cell) pairs.
    """
    grid = grid_for_profile(gp.profile, replace(settings, width=settings.width or 1.0), weights)
    if settings.width or len(gp.profile.sample) == 0:
        return grid
    u = (gp.profile.sample - gp.profile.center[None, :]) / gp.profile.scale[None, :]
    axes = np.asarray(grid.axes) if grid.axes else np.eye(u.shape[1])
    coords = u @ axes
    span = float(np.ptp(coords[:, 0])) + 200.0  # > the data's span plus the widest width searched (50)
    coords[:, 0] += gp.groups * span
    width = choose_width(coords, gp.profile.rows, pair_budget(settings.cell_budget, len(gp.values)))
    return replace(grid, width=float(width))


# ----------------------------------------------------------------------------- per group


#: A group's cells are too coarse for its k when it fills fewer than this many cells per segment (and has more
#: rows than cells): it gets a cell pass of its own on a grid from its own sampled rows ...
COARSE_CELLS_PER_SEGMENT = 5
#: ... aiming at its share of the cell budget, and at least this many cells per segment.
OWN_GRID_CELLS_PER_SEGMENT = 20


def needs_own_grid(cells: CF, k: int) -> bool:
    filled = int((cells.n > 0).sum())
    return filled < COARSE_CELLS_PER_SEGMENT * k and cells.n.sum() > filled


def own_grid_cells(engine: Engine, inputs: "WithinInputs", within: str, group_type: str, value: str | None,
                   gp: GroupedProfile, rows: int, settings: Settings, groups: int
                   ) -> tuple[Grid, CF, np.ndarray, int] | None:
    """A group that a shared grid bins too coarsely (its spread far below the table's): one more cell pass, over
    that group's rows only, on a grid from its own sampled rows (as a run on the group alone would make), aiming
    at its share of the cell budget and at least OWN_GRID_CELLS_PER_SEGMENT cells per segment.  None when the
    sample holds too few of its rows to set a grid."""
    code = gp.values.index(value) if value in gp.values else -1
    sample = gp.profile.sample[gp.groups == code]
    if len(sample) < 2:
        return None
    k = max(settings.k_candidates or (settings.k,))
    budget = max(settings.cell_budget // max(groups, 1), OWN_GRID_CELLS_PER_SEGMENT * k)
    grid = inputs.sample_grid(sample, rows, replace(settings, cell_budget=budget))
    where = within_sql.group_predicate(within, value, group_type, engine.target)
    got = engine.query(inputs.cells_statement(grid, engine.target, where=where))
    cells, keys, skipped = inputs.cells_of(got, grid)
    return grid, cells, keys, skipped


@dataclass
class GroupRun:
    value: str | None
    cells: CF  # in the group's exact standardisation
    keys: np.ndarray
    skipped: int
    std: Standardisation
    k: int
    centroids: np.ndarray
    cell_labels: np.ndarray
    stats: SegmentStats
    sse_cells: float
    params: dict[str, Any]
    notes: list[str]
    done: bool = False
    passes: list[dict] | None = None
    grid: Grid | None = None  # the grid its cells are on (the shared one, or its own)

    @property
    def name(self) -> str:
        return group_name(self.value)


def split_cells(got: dict[str, np.ndarray], grid: Grid,
                cells_of: Callable[[dict[str, np.ndarray], Grid], tuple[CF, np.ndarray, int]]) -> list[tuple[str | None, CF, np.ndarray, int]]:
    """The cell pass's rows split per group: (value, cells, keys, skipped), groups in text order, NULL last;
    ``cells_of`` reads one group's rows (``WithinInputs.cells_of``)."""
    parts = np.asarray(got["part"], dtype=object)
    rows_of: dict[str, list[int]] = {}
    for i, key in enumerate(parts.tolist()):  # one pass over the rows, not one comparison of them all per group
        rows_of.setdefault(key, []).append(i)
    out = []
    for key in sorted(rows_of, key=lambda t: (t == "~", group_value_of_key(t) or "")):
        rows = np.asarray(rows_of[key], dtype=np.int64)
        sub = {name: values[rows] for name, values in got.items()}
        cells, keys, skipped = cells_of(sub, grid)
        out.append((group_value_of_key(key), cells, keys, skipped))
    return out


@dataclass
class WithinInputs:
    """What a --within run segments on, and how its profile, grids and cell passes read it: the numeric columns
    here; ``within_categorical.CategoricalInputs`` adds categorical columns' indicators."""

    source: Source
    columns: list[str]
    weights: np.ndarray

    @property
    def indicator_groups(self) -> list[np.ndarray]:
        """Positions of each categorical column's indicators among ``columns`` (none here)."""
        return []

    def model_categorical(self) -> list[dict[str, Any]]:
        return []

    def profile_and_grid(self, engine: Engine, within: str, settings: Settings) -> tuple[GroupedProfile, Grid]:
        gp = run_grouped_profile(engine, self.source, self.columns, within, settings)
        return gp, grouped_grid(gp, settings, self.weights)

    def sample_grid(self, sample: np.ndarray, rows: int, settings: Settings) -> Grid:
        """The grid a run on these sampled rows alone would make (one group's own grid)."""
        center, scale = center_and_scale(sample, settings.scaling)
        prof = Profile(rows=rows, sample=sample, center=center, scale=scale, seconds=0.0)
        return grid_for_profile(prof, settings, self.weights)

    def cells_statement(self, grid: Grid, target: Any, partition: Partitioning | None = None, where: Any = None) -> Any:
        return sqlgen.cells_statement(self.source, self.columns, grid, target, partition=partition, where=where)

    def cells_of(self, got: dict[str, np.ndarray], grid: Grid) -> tuple[CF, np.ndarray, int]:
        """(cells, keys, skipped) of a cell statement's rows (one group's)."""
        from .stages import cells_from_result

        return cells_from_result(got, grid, len(self.columns))


def _warn_for_group(name: str, caught: list[warnings.WarningMessage], notes: list[str]) -> None:
    for w in caught:
        text = f"group {name}: {w.message}"
        notes.append(str(w.message))
        warnings.warn(text, UserWarning, stacklevel=4)


def standardise_group(cells_grid: CF, grid: Grid, columns: Sequence[str], settings: Settings, weights: np.ndarray,
                      name: str, notes: list[str], indicator_groups: Sequence[np.ndarray] = ()) -> tuple[CF, Standardisation, bool]:
    """``standardise_cells`` for one group; a group with nothing to segment on (every column constant there)
    gets one segment with a warning instead of an error.  Returns (cells, std, degenerate)."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            cells, std = standardise_cells(cells_grid, grid, columns, settings, weights, indicator_groups)
            degenerate = False
        except InputError as err:
            d = len(columns)
            total = F.total(cells_grid)
            grid_scale = 1.0 / np.asarray(grid.inv_scale)
            center = np.asarray(grid.center) + total.ls[0] / total.n[0] * grid_scale
            scale = np.ones(d)
            cells = F.affine(cells_grid, grid_scale, np.asarray(grid.center) - center)
            std = Standardisation(center=center, sd=np.zeros(d), scale=scale, weights=np.zeros(d), constant=np.ones(d, bool))
            warnings.warn(f"{err}: one segment", UserWarning)
            degenerate = True
    _warn_for_group(name, caught, notes)
    return cells, std, degenerate


def group_settings(settings: Settings, filled: int, name: str, notes: list[str]) -> tuple[Settings, int]:
    """The settings of one group's second phase: k (or the k candidates) cut to what its cells allow."""
    base = replace(settings, tree_budget=0, keep_outliers=True, within=None)  # no outlier group: every row is labelled by its centroid
    if settings.k_candidates:
        usable = tuple(c for c in settings.k_candidates if c < filled or c == 1)
        return replace(base, k_candidates=usable), max(usable)
    k = min(settings.k, max(filled, 1))
    if k < settings.k:
        note = f"{filled:,} distinct grid cell(s), fewer than k={settings.k}: {k} segment(s)"
        notes.append(note)
        warnings.warn(f"group {name}: {note}", UserWarning, stacklevel=3)
    return replace(base, k=k), k


def run_group(value: str | None, cells_grid: CF, keys: np.ndarray, skipped: int, grid: Grid, columns: Sequence[str],
              settings: Settings, weights: np.ndarray, where: str, progress: ProgressFn,
              indicator_groups: Sequence[np.ndarray] = ()) -> GroupRun:
    """Exact standardisation and the second phase of one group."""
    name, notes = group_name(value), []
    cells, std, degenerate = standardise_group(cells_grid, grid, columns, settings, weights, name, notes, indicator_groups)
    filled = int((cells.n > 0).sum())
    # a group with nothing to segment on was warned about once, by standardise_group
    local, k = (settings, 1) if degenerate else group_settings(settings, filled, name, notes)
    choice: dict[str, Any] = {}
    if local.k_candidates and not degenerate:
        local, choice, done = choose_group_k(cells, local, std.weights, f"{where} group {name}", name, progress)
        k = local.k
        if done is not None and local.method == "kmeans" and k > 1:  # the chosen k's full run: not run again
            stats = SegmentStats.of_cfs(F.group_sum(cells, done.labels, k), std.weights)
            return GroupRun(value, cells, keys, skipped, std, k, done.centroids, done.labels, stats, done.sse,
                            {"k_choice": choice}, notes)
    if degenerate or (k == 1 and not local.k_candidates):
        labels = np.zeros(cells.m, dtype=np.int64)
        cf = F.group_sum(cells, labels, 1)
        stats = SegmentStats.of_cfs(cf, std.weights)
        return GroupRun(value, cells, keys, skipped, std, 1, stats.centroids, labels, stats, float(stats.sse.sum()),
                        {"k_choice": choice} if choice else {}, notes)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        phase = run_second_phase(cells, keys, local, std.weights, f"{where} group {name}",
                                 lambda stage, message: progress(stage, f"group {name}: {message}"))
    _warn_for_group(name, caught, notes)
    stats = SegmentStats.of_cfs(F.group_sum(cells, phase.cell_labels, phase.k), std.weights)
    params = {**phase.params, "k_choice": choice} if choice else phase.params
    return GroupRun(value, cells, keys, skipped, std, phase.k, phase.centroids, phase.cell_labels, stats, phase.sse,
                    params, notes)


#: When ``--k auto``/a range chooses k per group, candidates up to this k get the full ``--restarts`` (their runs
#: are cheap: a restart costs about k times the cells; and a k = 2 run on a skewed group found a poor split
#: with 3 restarts in 2 of the demo's 50 routes) ...
FULL_RESTARTS_UP_TO = 4
#: ... larger candidates this many restarts ...
CANDIDATE_RESTARTS = 3
#: ... and the FINALISTS best-scored of those are run again with every restart before the choice is made.
FINALISTS = 2


def choose_group_k(cells: CF, local: Settings, weights: np.ndarray, where: str, name: str, progress: ProgressFn
                   ) -> tuple[Settings, dict[str, Any], KMeansResult | None]:
    """One group's k among ``local.k_candidates`` by ``--k-rule`` at a fraction of the k-means runs of comparing
    every candidate with every restart (FULL_RESTARTS_UP_TO, CANDIDATE_RESTARTS, FINALISTS), said in one progress
    line.  Returns the group's settings with that k and no candidates, the model's ``k_choice``, and the chosen k's
    k-means run with every restart when one was made here (what the second phase would compute again), else None."""
    check_k_limit(cells, local.k_candidates, where)
    restarts = min(local.n_init, CANDIDATE_RESTARTS)
    small = [k for k in local.k_candidates if k <= FULL_RESTARTS_UP_TO]
    large = [k for k in local.k_candidates if k > FULL_RESTARTS_UP_TO]

    full_runs: dict[int, KMeansResult] = {}

    def table_of(ks: Sequence[int], n_init: int) -> list[dict[str, Any]]:
        if not ks:
            return []
        got = choose_k(cells, ks, weights, n_init=n_init, seed=local.seed, rule=local.k_rule)
        if n_init == local.n_init:
            full_runs[got.k] = got.result
        return got.table

    table = table_of(small, local.n_init) + table_of(large, restarts)
    if large and restarts < local.n_init:
        again = {row["k"]: row for row in table_of([k for k in finalists(table, local.k_rule) if k in large], local.n_init)}
        table = [again.get(row["k"], row) for row in table]
    best, reason = pick_k(table, local.k_rule)
    ks = [row["k"] for row in table]
    progress("choose k", f"group {name}: k={best['k']} of {k_list_text(ks)} ({reason})")
    params = {"rule": local.k_rule, "table": table, "k": best["k"], "reason": reason,
              "restarts": {"up_to_k": FULL_RESTARTS_UP_TO, "larger_k": restarts, "finalists": FINALISTS}}
    return replace(local, k=best["k"], k_candidates=()), params, full_runs.get(best["k"])


def finalists(table: Sequence[dict[str, Any]], rule: str) -> list[int]:
    """The FINALISTS best candidates by the rule's score (Calinski-Harabasz: largest; BIC: lowest)."""
    return sorted(row["k"] for row in ranked_candidates(table, rule)[:FINALISTS])


# ----------------------------------------------------------------------------- refine


def group_assignment(within: str, group_type: str, runs: Sequence[GroupRun], centroids: Sequence[np.ndarray]) -> GroupAssignment:
    return GroupAssignment(
        column=within, group_type=group_type, values=tuple(r.value for r in runs),
        center=np.array([r.std.center for r in runs]), inv_scale=np.array([1.0 / r.std.scale for r in runs]),
        weights=np.array([r.std.weights for r in runs]), centroids=tuple(np.asarray(c, dtype=np.float64) for c in centroids),
    )


def run_refine_pass(engine: Engine, source: Source, columns: Sequence[str], assign: GroupAssignment
                    ) -> tuple[list[tuple[SegmentStats, SegmentStats]], float]:
    """One statement for every group: per group (rows at the centroids used, the same rows at their new means)."""
    t0 = time.perf_counter()
    got = engine.query(within_sql.refine_statement(source, columns, assign, engine.target))
    d = len(columns)
    keep = ~(null_mask(got["segment"]) | null_mask(got["gid"]))
    gid = np.asarray(np.ma.getdata(got["gid"]), dtype=np.float64)[keep].astype(np.int64)
    seg = np.asarray(np.ma.getdata(got["segment"]), dtype=np.float64)[keep].astype(np.int64)
    n_all = np.asarray(got["n"], dtype=np.float64)[keep]
    ls_all = np.column_stack([np.asarray(np.ma.getdata(got[f"ls{j}"]), dtype=np.float64)[keep] for j in range(d)])
    dist_all = np.asarray(np.ma.getdata(got["dist"]), dtype=np.float64)[keep]
    out = []
    for g, old in enumerate(assign.centroids):
        k = len(old)
        mine = gid == g
        s = seg[mine]
        n = np.bincount(s, weights=n_all[mine], minlength=k)[:k]
        ls_u = np.column_stack([np.bincount(s, weights=ls_all[mine, j], minlength=k)[:k] for j in range(d)])  # scaled in SQL
        dist = np.bincount(s, weights=dist_all[mine], minlength=k)[:k]
        out.append(moved_to_means(n, ls_u, dist, old, assign.weights[g]))
    return out, time.perf_counter() - t0


def refine_groups(engine: Engine, source: Source, columns: Sequence[str], within: str, group_type: str,
                  runs: list[GroupRun], grid: Grid, settings: Settings, progress: ProgressFn) -> tuple[list[dict], dict[str, float]]:
    """Row-level passes, one statement per pass for all groups, each group stopping as a run on it alone would.

    A group is done when its cells settle it (``CellBoxes``, no pass needed), when
    a pass gains less than the tolerance, or after the last pass; done groups keep
    their centroids, so their rows are assigned as before and their figures stand.
    """
    passes: list[dict] = []
    timings: dict[str, float] = {}
    centroids = [r.centroids for r in runs]
    for r in runs:
        r.passes = []
        if settings.refine_passes == 0:
            r.done = True
        elif r.k == 1 and r.std.weights.sum() == 0:
            r.done = True
        elif (r.stats.n > 0).all():
            boxes = CellBoxes.of_grid(r.grid or grid, r.keys, r.std, r.cell_labels)
            r.done = boxes is not None and boxes.all_settled(r.stats.centroids, r.std.weights)
    if settings.refine_passes == 0:  # nothing checked: a cell's rows all take its segment, a row's label may not
        progress("refine", "no pass run (refine passes 0): each group's sizes and SSE are its cells' estimates; labels "
                           "assign each row to its nearest centroid, so their counts may differ")
    elif all(r.done for r in runs):
        progress("refine", "no pass needed: every group's cells lie wholly nearest their own segments' centroids")
    for p in range(1, settings.refine_passes + 1):
        if all(r.done for r in runs):
            break
        moving = [g for g, r in enumerate(runs) if not r.done]  # the statement reads only their rows
        assign = group_assignment(within, group_type, [runs[g] for g in moving], [centroids[g] for g in moving])
        results, seconds = run_refine_pass(engine, source, columns, assign)
        timings[f"refine_{p}"] = seconds
        before_all = after_all = 0.0
        for g, (assigned, updated) in zip(moving, results):
            r = runs[g]
            before, after = float(assigned.sse.sum()), float(updated.sse.sum())
            before_all, after_all = before_all + before, after_all + after
            gain = (before - after) / before if before > 0 else 0.0
            r.passes.append({"pass": p, "sse_assigned": before, "sse": after, "gain": gain})
            empty = updated.n == 0
            if empty.any():
                warnings.warn(f"group {r.name}: refine pass {p}: segment(s) {np.flatnonzero(empty).tolist()} got no rows",
                              UserWarning, stacklevel=3)
            if gain < settings.tolerance or p == settings.refine_passes:
                r.stats, r.done = assigned, True
            else:
                r.stats, centroids[g] = updated, updated.centroids
        passes.append({"pass": p, "sse_assigned": before_all, "sse": after_all, "groups": len(moving)})
        progress("refine", f"pass {p}: {len(moving):,} group(s) still moving, their SSE {before_all:.6g} -> {after_all:.6g}, "
                           f"{seconds:.2f} s")
    return passes, timings


# ----------------------------------------------------------------------------- segment


def within_inputs(engine: Engine, source: Source, columns: Sequence[str], within: str, settings: Settings) -> WithinInputs:
    """The columns a run segments on: the numeric ones checked, or with ``settings.categorical`` their
    indicators too (``within_categorical``)."""
    if settings.categorical:
        from .within_categorical import categorical_inputs

        return categorical_inputs(engine, source, columns, within, settings)
    check_columns(engine, source, columns)
    return WithinInputs(source, list(columns), settings.column_weights(columns))


def segment_within(engine: Engine, source: Source, columns: Sequence[str], settings: Settings,
                   progress: ProgressFn = quiet_progress) -> Model:
    """Segment each group of ``settings.within`` separately, every group from one cell pass and one statement per
    refine pass."""
    columns, within = list(columns), settings.within
    settings.check(columns)
    t_start = time.perf_counter()
    group_type = check_within(engine, source, columns, within, settings)
    inputs = within_inputs(engine, source, columns, within, settings)
    source, columns, weights, indicators = inputs.source, inputs.columns, inputs.weights, inputs.indicator_groups

    t0 = time.perf_counter()
    gp, grid = inputs.profile_and_grid(engine, within, settings)
    t_profile = time.perf_counter() - t0
    progress("profile", f"{gp.profile.rows:,} rows, sample of {len(gp.profile.sample):,} in {len(gp.values):,} group(s), "
                        f"grid width {grid.width:.3g} on {grid.dims} axes, {t_profile:.2f} s")

    t0 = time.perf_counter()
    got = engine.query(inputs.cells_statement(grid, engine.target, partition=Partitioning.of_columns([within])))
    parts = split_cells(got, grid, inputs.cells_of)
    t_cells = time.perf_counter() - t0
    if len(parts) > MAX_GROUPS:
        raise too_many_groups(len(parts), within, "table")
    usable = sum(int(round(c.n.sum())) for _, c, _, _ in parts)
    skipped = sum(s for *_, s in parts)
    if usable == 0:
        raise InputError(f"no usable rows in {source.label}: all {skipped:,} rows have a NULL, NaN or infinite value in {', '.join(columns)}")
    progress("cells", f"{usable + skipped:,} rows ({skipped:,} skipped) -> {sum(c.m for _, c, _, _ in parts):,} (group, cell) pairs "
                      f"in {len(parts):,} group(s), one statement, {t_cells:.2f} s")

    t0 = time.perf_counter()

    def own_grid(value: str | None, cells: CF, group_skipped: int) -> tuple[Grid, CF, np.ndarray, int] | None:
        return own_grid_cells(engine, inputs, within, group_type, value, gp, int(round(cells.n.sum())) + group_skipped,
                              settings, len(parts))

    runs = group_runs(parts, grid, columns, settings, weights, source.label, progress, own_grid, indicators)
    t_second = time.perf_counter() - t0
    progress("second phase", f"{len(runs):,} group(s), {sum(r.k for r in runs):,} segments in all, {t_second:.2f} s")

    passes, refine_times = refine_groups(engine, source, columns, within, group_type, runs, grid, settings, progress)
    overall, pairs = overall_standardisation([c for _, c, _, _ in parts], grid, columns, settings, weights, indicators)
    model = within_model(columns, overall, grid, [group_entry(r, columns) for r in runs], settings, source, within, group_type,
                         usable + skipped, skipped, pairs, gp.profile.repeats)
    model.passes = passes
    model.categorical = inputs.model_categorical()
    from .report import attach_group_maps

    attach_group_maps(model, {r.value: r.cells for r in runs})  # each group's report map, as a single model keeps its own
    model.timings = {"profile": t_profile, "cells": t_cells, "second_phase": t_second, **refine_times,
                     "total": time.perf_counter() - t_start}
    return model


def group_runs(parts: Sequence[tuple[str | None, CF, np.ndarray, int]], grid: Grid, columns: Sequence[str], settings: Settings,
               weights: np.ndarray, where: str, progress: ProgressFn,
               own_grid: Callable[[str | None, CF, int], tuple[Grid, CF, np.ndarray, int] | None] | None = None,
               indicators: Sequence[np.ndarray] = ()) -> list[GroupRun]:
    """The second phase of each group (``split_cells``'s parts); a group whose rows were all skipped gets none.

    ``own_grid(value, cells, skipped)``: the cells of a group too coarse on the shared grid on a grid of its
    own (``own_grid_cells``), or None; without it (a summary store) every group stays on the shared grid.
    """
    runs = []
    k_most = max(settings.k_candidates or (settings.k,))
    for value, cells, keys, group_skipped in parts:
        if cells.m == 0:  # every row of the group skipped: no model for it, its rows get NULL
            warnings.warn(f"group {group_name(value)}: all {group_skipped:,} rows have a NULL, NaN or infinite value; "
                          "no segments (labelled NULL)", UserWarning, stacklevel=3)
            continue
        own = own_grid(value, cells, group_skipped) if own_grid is not None and needs_own_grid(cells, k_most) else None
        if own is not None:
            progress("cells", f"group {group_name(value)}: {int((cells.n > 0).sum()):,} cells on the shared grid; "
                              f"{int((own[1].n > 0).sum()):,} on a grid of its own (one more statement, its rows only)")
        group_grid, cells, keys = (own[0], own[1], own[2]) if own is not None else (grid, cells, keys)
        run = run_group(value, cells, keys, group_skipped, group_grid, columns, settings, weights, where, progress,
                        indicators)
        run.grid = group_grid
        runs.append(run)
    return runs


def overall_standardisation(cells: Sequence[CF], grid: Grid, columns: Sequence[str], settings: Settings,
                            weights: np.ndarray, indicators: Sequence[np.ndarray] = ()) -> tuple[Standardisation, int]:
    """The whole table's standardisation (the model's top-level centre and scale) from every group's cells, and
    the count of filled (group, cell) pairs."""
    all_cells = F.concat(*[c for c in cells if c.m])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # constant columns are said per group
        try:
            _, overall = standardise_cells(all_cells, grid, columns, settings, weights, indicators)
        except InputError:
            _, overall, _ = standardise_group(all_cells, grid, columns, settings, weights, "(all)", [], indicators)
    return overall, int((all_cells.n > 0).sum())


def group_entry(r: GroupRun, columns: Sequence[str]) -> dict[str, Any]:
    """One group's model in the model file (segment ids 0..k-1 within the group, largest first)."""
    order = size_order(r.stats)
    stats = r.stats.take(order)
    original = stats.centroids * r.std.scale[None, :] + r.std.center[None, :]
    entry = {
        "value": r.value,
        "name": r.name,
        "rows": int(round(stats.n.sum())) + r.skipped,
        "skipped": r.skipped,
        "k": len(stats.n),
        "ids": list(range(len(stats.n))),
        "sizes": [int(round(v)) for v in stats.n],
        "centroids": original.tolist(),
        "centroids_scaled": stats.centroids.tolist(),
        "center": r.std.center.tolist(),
        "scale": r.std.scale.tolist(),
        "sd": r.std.sd.tolist(),
        "weights": r.std.weights.tolist(),
        "sse": float(stats.sse.sum()),
        "segment_sse": stats.sse.tolist(),
        "radius": np.sqrt(stats.sse / np.where(stats.n > 0, stats.n, 1.0)).tolist(),
        "constant_columns": [c for c, flag in zip(columns, r.std.constant) if flag],
        "cells": int((r.cells.n > 0).sum()),
        "cell_sse": r.sse_cells,
        "passes": r.passes or [],
        "notes": r.notes,
    }
    if "k_choice" in r.params:
        entry["k_choice"] = r.params["k_choice"]
    return entry


def within_model(columns: Sequence[str], overall: Standardisation, grid: Grid, groups: Sequence[dict[str, Any]], settings: Settings,
                 source: Source, within: str, group_type: str, rows: int, skipped: int, cells: int, repeats: str) -> Model:
    """The model file of a --within run: the shared grid and overall figures at the top, one entry per group
    (``group_entry``)."""
    groups = list(groups)
    return Model(
        columns=list(columns), center=overall.center.tolist(), scale=overall.scale.tolist(), weights=overall.weights.tolist(),
        scaling=settings.scaling, centroids=[], centroids_scaled=[], sizes=[], sse=float(sum(g["sse"] for g in groups)),
        segment_sse=[], radius=[], rows=rows, skipped=skipped, source=source.label, k=0, method=settings.method,
        constant_columns=[c for c, flag in zip(columns, overall.constant) if flag],
        grid={**grid.to_dict(), "cells": cells, "sd": overall.sd.tolist()},
        params={"cell_budget": settings.cell_budget, "refine_passes": settings.refine_passes, "tolerance": settings.tolerance,
                "restarts": settings.n_init, "seed": settings.seed, "sample_rows": settings.sample_rows,
                "k": settings.k if not settings.k_candidates else f"{settings.k_candidates[0]}..{settings.k_candidates[-1]}",
                "sample_repeats": repeats},
        created=datetime.now(timezone.utc).isoformat(timespec="seconds"),
        within={"column": within, "type": group_type, "groups": groups},
    )


# ----------------------------------------------------------------------------- label


def model_assignment(model: Model) -> GroupAssignment:
    """What the label SQL needs from a --within model."""
    groups = model.within["groups"]
    return GroupAssignment(
        column=model.within["column"], group_type=model.within["type"], values=tuple(g["value"] for g in groups),
        center=np.array([g["center"] for g in groups], dtype=np.float64),
        inv_scale=1.0 / np.array([g["scale"] for g in groups], dtype=np.float64),
        weights=np.array([g["weights"] for g in groups], dtype=np.float64),
        centroids=tuple(np.asarray(g["centroids_scaled"], dtype=np.float64).reshape(len(g["sizes"]), len(model.columns))
                        for g in groups),
        ids=stable_ids(groups),
    )


def stable_ids(groups: Sequence[dict[str, Any]]) -> tuple[tuple[int, ...], ...]:
    """Each group's segment ids when some group's are not its positions 0..k-1 (a store's, kept across
    refreshes); else () and the label SQL numbers segments by position, as before."""
    ids = tuple(tuple(int(i) for i in (g.get("ids") or range(len(g["sizes"])))) for g in groups)
    return ids if any(i != tuple(range(len(i))) for i in ids) else ()


def label_within_select(engine: Engine, source: Source, model: Model, source_columns: Sequence[str], materialize: bool):
    """The label select of a --within model; warns with the count of rows in groups the model does not know."""
    if model.within["column"] not in source_columns:
        raise SourceError(f"--within column {model.within['column']} of the model not found in {source.label}")
    assign = model_assignment(model)
    unknown = int(engine.query(within_sql.unknown_groups_statement(source, assign, engine.target, model.columns))["n"][0])
    if unknown:
        warnings.warn(f"{unknown:,} row(s) of {source.label} are in {model.within['column']} groups the model does not know "
                      "(values that appeared after it was built): labelled NULL", UserWarning, stacklevel=3)
    return within_sql.label_select(source, model.columns, source_columns, assign, engine.target, materialize=materialize)
