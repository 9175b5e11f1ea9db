"""Summary stores of `store build --within COL`: summaries per (partition, group, cell), a model per group.

The cells table keeps each cell's group (its key, ``within_sql.GROUP_KEY``) beside the partition, so the
summaries stay additive per (partition, group, cell).  The store's model is a `segment --within` model
(``Model.within``), made by the same stages: one grouped profile sample for the frozen grid, each group's
second phase on its merged cells (``within.group_runs``), refine passes for all groups in one statement each
(``within.refine_groups``).  Unlike `segment --within`, a group that fills few cells of the frozen grid keeps
them (no grid of its own: a refresh would have to rescan that group in every partition); it is warned about.

A refresh re-segments only the groups whose cells in a new, changed or vanished partition differ
(``changed_groups``); the other groups' entries are copied as they were, bit for bit.  Segment ids stay stable
per group: a re-segmented group's segments are matched to its old ones (``store.match_segments``), and
each group keeps its own next unused id (``next_id`` in its entry).  store.py calls the functions here
where a --within store differs; the rest of building and refreshing is the store's own.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from . import sqlgen, within_sql
from .engines import Engine
from .features import CF
from .model import Model, group_models
from .settings import Settings
from .sqlgen import Grid, Partitioning, Source
from .stages import ProgressFn, cells_from_result
from .within import (
    MAX_GROUPS, check_within, group_entry, group_name, group_runs, group_value_of_key, grouped_grid, needs_own_grid,
    overall_standardisation, refine_groups, run_grouped_profile, split_cells, too_many_groups, within_model,
)

__all__ = ["GROUP_KEY", "CELLS_COUNTED", "cell_pairs", "merged_groups", "pairs_of", "GroupsOutcome", "check", "frozen_grid", "cells_columns", "cells_statement", "GroupCells", "group_cells", "changed_groups",
           "segment_groups", "status_fields", "report_lines"]

GROUP_KEY = within_sql.GROUP_KEY

Part = tuple[str | None, CF, np.ndarray, int]  # (group value, cells on grid units, keys, skipped rows)


def check(engine: Engine, source: Source, columns: Sequence[str], settings: Settings) -> str:
    """The group column's type, after refusing what --within cannot do (``within.check_within``: also
    --within with --categorical, which a store does not keep together)."""
    return check_within(engine, source, columns, settings.within, settings)


def frozen_grid(engine: Engine, source: Source, columns: Sequence[str], settings: Settings, weights: np.ndarray,
                progress: ProgressFn) -> tuple[Grid, str]:
    """The store's frozen grid as `segment --within` makes it (one sample with each row's group; the width
    chosen so the (group, cell) pairs fit the cell budget), and whether its sample repeats."""
    t0 = time.perf_counter()
    gp = run_grouped_profile(engine, source, columns, settings.within, settings)
    grid = grouped_grid(gp, settings, weights)
    progress("profile", f"{gp.profile.rows:,} rows in {len(gp.values):,} group(s), frozen grid width {grid.width:.3g} "
                        f"on {grid.dims} axes, {time.perf_counter() - t0:.2f} s")
    return grid, gp.profile.repeats


def cells_columns(plain: Sequence[tuple[str, str]]) -> list[tuple[str, str]]:
    """The cells table's columns: the plain store's (part, k0.., n, ls.., ss..) with the group's key after part."""
    return [plain[0], (GROUP_KEY, "VARCHAR"), *plain[1:]]


def cells_statement(scan: Source, columns: Sequence[str], grid: Grid, target: Any, partitioning: Partitioning, within: str,
                    where: Any = None):
    """The cell pass keyed by (partition, group, cell), in the cells table's column order."""
    return within_sql.store_cells_statement(scan, columns, grid, target, partitioning, within, where=where)


def merged_groups(engine: Engine, cells_table: str, grid: Grid, d: int, within: str) -> list[Part]:
    """Every partition's cells summed per (group, cell), split per group (text order, NULL last)."""
    got = engine.query(sqlgen.merged_cells_statement(cells_table, [GROUP_KEY, *grid.key_names()], d))
    got = {("part" if name == GROUP_KEY else name): values for name, values in got.items()}
    parts = split_cells(got, grid, lambda rows, g: cells_from_result(rows, g, d))
    if len(parts) > MAX_GROUPS:
        raise too_many_groups(len(parts), within, "table")
    return parts


def pairs_of(parts: Sequence[Part]) -> int:
    """The (group, cell) pairs holding rows: the cells the groups are segmented on, summed over the groups (a
    cell two groups share counts twice; the skipped rows' cell not at all)."""
    return sum(int((cells.n > 0).sum()) for _, cells, _, _ in parts)


def cell_pairs(engine: Engine, cells_table: str, grid: Grid, d: int, within: str) -> int:
    """``pairs_of`` the store's merged cells (one read of the cells table)."""
    return pairs_of(merged_groups(engine, cells_table, grid, d, within))


CELLS_COUNTED = "(group, cell) pairs"


@dataclass
class GroupCells:
    """One group's stored cells in some partitions, in a fixed order: partition and keys of each, n, ls, ss."""

    parts: np.ndarray  # (cells,) partition keys
    keys: np.ndarray  # (cells, axes), NaN for the skipped rows' cell
    n: np.ndarray
    ls: np.ndarray
    ss: np.ndarray

    def same_as(self, other: "GroupCells", rtol: float = 1e-12) -> bool:
        """The same cells with the same counts, and sums equal but for the last digits of a compensated sum
        (``rtol`` of the sums' own size: sqrt(n ss) bounds the sum of |v| that ls adds up)."""
        if (self.parts.tolist() != other.parts.tolist() or not np.array_equal(self.keys, other.keys, equal_nan=True)
                or not np.array_equal(self.n, other.n)):
            return False
        bound = rtol * np.maximum(np.sqrt(self.n[:, None] * np.abs(self.ss)), np.abs(self.ls)) + 1e-300
        return bool((np.abs(self.ls - other.ls) <= bound).all() and
                    (np.abs(self.ss - other.ss) <= rtol * np.abs(self.ss) + 1e-300).all())


def group_cells(engine: Engine, cells_table: str, parts: Sequence[str], d: int) -> dict[str | None, GroupCells]:
    """The stored cells of these partitions, per group value."""
    if not parts:
        return {}
    got = engine.query(sqlgen.select_where(cells_table, sqlgen.in_list("part", list(parts))))

    def floats(name: str) -> np.ndarray:
        return np.asarray(np.ma.filled(np.ma.asarray(got[name], dtype=np.float64), np.nan), dtype=np.float64)

    key_names = sorted((name for name in got if name.startswith("k") and name[1:].isdigit()), key=lambda k: int(k[1:]))
    part = np.asarray(got["part"], dtype=object).astype(str)
    keys = np.column_stack([floats(k) for k in key_names]) if key_names else np.zeros((len(part), 0))
    n = floats("n")
    ls = np.nan_to_num(np.column_stack([floats(f"ls{j}") for j in range(d)]))  # the skipped rows' sums are meaningless
    ss = np.nan_to_num(np.column_stack([floats(f"ss{j}") for j in range(d)]))
    order = np.lexsort([*(np.nan_to_num(keys[:, a], nan=np.inf) for a in reversed(range(keys.shape[1]))), part])
    members: dict[str | None, list[int]] = {}
    for i in order.tolist():
        members.setdefault(group_value_of_key(str(got[GROUP_KEY][i])), []).append(i)
    return {g: GroupCells(part[rows], keys[rows], n[rows], ls[rows], ss[rows]) for g, rows in members.items()}


def changed_groups(before: dict[str | None, GroupCells], after: dict[str | None, GroupCells]) -> set[str | None]:
    """The groups whose cells in the rescanned or dropped partitions differ (``group_cells`` before the
    refresh replaced them, and after): a group with rows in a changed partition whose own rows did not
    change keeps its model.  Counts and cell keys must be equal; the sums may differ in their last digits,
    since DuckDB's compensated ``fsum`` is not exactly rounded and a rewritten partition is read in
    another order (a row whose value moved by less than that is not a change worth a new model)."""
    return {g for g in set(before) | set(after) if g not in before or g not in after or not before[g].same_as(after[g])}


@dataclass
class GroupsOutcome:
    """A --within store's new model and what changed per group (for the refresh report)."""

    model: Model
    groups: dict[str, Any]  # names of the groups re-segmented, new and vanished, and the count kept as they were
    drift: list[dict[str, Any]] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


def _stable_ids(before: dict[str, Any] | None, entry: dict[str, Any], shift: float) -> tuple[list[int], int]:
    """A re-segmented group's ids matched to its old segments (``store.match_segments``, distances in the
    group's sd), and its next unused id; a group new to the store numbers its segments 0..k-1."""
    if before is None:
        return list(entry["ids"]), int(entry["k"])
    from .store import match_segments

    sd = np.asarray(entry["sd"], dtype=np.float64)
    old_ids = before.get("ids") or list(range(before["k"]))
    return match_segments(np.asarray(before["centroids"], dtype=np.float64).reshape(before["k"], -1), old_ids,
                          np.asarray(entry["centroids"], dtype=np.float64), int(before.get("next_id", max(old_ids, default=-1) + 1)),
                          np.where(sd > 0, sd, 1.0), shift)


def _coarse_warnings(runs: Sequence[Any], settings: Settings) -> list[str]:
    """Groups that fill too few cells of the frozen grid for their segments (`segment --within` would give
    them a grid of their own).  Not said of a group with nothing to segment on: its one warning (from
    ``within.standardise_group``) says so, and no refine pass would split it."""
    k_most = max(settings.k_candidates or (settings.k,))
    return [
        f"group {r.name} fills only {int((r.cells.n > 0).sum()):,} cell(s) of the store's frozen grid for "
        f"k={k_most}: its segments come from coarse cells (its spread is far below the table's); refine passes "
        "(--refine-passes) assign its rows exactly"
        for r in runs if r.cells.m and r.std.weights.sum() > 0 and needs_own_grid(r.cells, k_most)
    ]


def segment_groups(
    engine: Engine, source: Source, columns: Sequence[str], cells_table: str, grid: Grid, settings: Settings,
    group_type: str, where: str, progress: ProgressFn, old: Model | None = None, touched: set[str | None] | None = None,
    new_segment_shift: float = 3.0, drift_threshold: float = 0.5, repeats: str | None = None,
    parts: Sequence[Part] | None = None,
) -> GroupsOutcome:
    """The store's --within model from its merged cells (``parts``, when the caller has read them already).

    ``touched``: the groups to re-segment (None: every group); the others keep
    ``old``'s entries unchanged.  With ``old``, each re-segmented group's ids are
    matched to its old segments and its drift is reported.
    """
    t0 = time.perf_counter()
    d, within = len(columns), str(settings.within)
    parts = parts if parts is not None else merged_groups(engine, cells_table, grid, d, within)
    old_entries = {g["value"]: g for g in old.within.get("groups", [])} if old is not None and old.within else {}
    redo = [p for p in parts if touched is None or p[0] in touched or p[0] not in old_entries]
    weights = settings.column_weights(columns)
    runs = group_runs(redo, grid, columns, settings, weights, where, progress)
    coarse = _coarse_warnings(runs, settings)
    t_second = time.perf_counter() - t0
    progress("second phase", f"{len(runs):,} group(s) segmented on their merged cells, {t_second:.2f} s")
    passes, refine_times = refine_groups(engine, source, columns, within, group_type, runs, grid, settings, progress) if runs else ([], {})
    fresh = {}
    for r in runs:
        entry = group_entry(r, columns)
        entry["ids"], entry["next_id"] = _stable_ids(old_entries.get(r.value), entry, new_segment_shift)
        if (old_entries.get(r.value) or {}).get("names"):  # names follow the ids, as a plain store's do
            entry["names"] = dict(old_entries[r.value]["names"])
        fresh[r.value] = entry
    entries = [fresh.get(v, old_entries.get(v)) for v, cells, _, _ in parts if cells.m and (v in fresh or v in old_entries)]
    usable = sum(int(round(c.n.sum())) for _, c, _, _ in parts)
    skipped = sum(s for *_, s in parts)
    overall, pairs = overall_standardisation([c for _, c, _, _ in parts], grid, columns, settings, weights)
    repeats = repeats if repeats is not None else (old.params.get("sample_repeats", "yes") if old is not None else "yes")
    model = within_model(columns, overall, grid, entries, settings, source, within, group_type, usable + skipped, skipped,
                         pairs, repeats)
    model.passes = passes
    from .report import attach_group_maps

    attach_group_maps(model, {r.value: r.cells for r in runs})  # kept groups keep their maps
    model.timings = {"second_phase": t_second, **refine_times}
    present = {g["value"] for g in entries}
    out = GroupsOutcome(model, {
        "resegmented": [group_name(v) for v in fresh],
        "new": [group_name(v) for v in fresh if v not in old_entries] if old is not None else [],
        "vanished": [group_name(v) for v in old_entries if v not in present],
        "kept": len(entries) - len(fresh),
    }, warnings=coarse)
    if old is not None:
        _group_drift(out, old, {r.value: r for r in runs}, drift_threshold)
    progress("groups", f"{len(fresh):,} group(s) re-segmented, {out.groups['kept']:,} kept as they were, "
                       f"{time.perf_counter() - t0:.2f} s")
    return out


def _group_drift(out: GroupsOutcome, old: Model, runs: dict, threshold: float) -> None:
    """Per re-segmented group that existed before: ``store.segment_drift`` of its segments, rows and warnings
    naming the group."""
    from .store import segment_drift

    before = {g["value"]: m for g, m in group_models(old)}
    for g, now in group_models(out.model):
        if g["value"] not in runs or g["value"] not in before:
            continue
        sd = np.asarray(g["sd"], dtype=np.float64)
        rows, warns = segment_drift(before[g["value"]], now, runs[g["value"]].cells, np.where(sd > 0, sd, 1.0), threshold)
        out.drift += [{"group": g["name"], **row} for row in rows]
        out.warnings += [f"group {g['name']}: {w}" for w in warns]


def status_fields(model: Model) -> dict[str, Any]:
    """`store status` of a --within store: the group column and each group's segments."""
    if not model.within:
        return {}
    return {"within": model.within["column"],
            "groups": [{"group": g["name"], "rows": g["rows"], "k": g["k"], "segment_ids": g.get("ids") or list(range(g["k"]))}
                       for g in model.within["groups"]]}


def report_lines(groups: dict[str, Any], drift: Sequence[dict[str, Any]]) -> list[str]:
    """The refresh report's lines for a --within store: which groups were re-segmented, then their drift."""
    redone = groups.get("resegmented") or []
    lines = [f"groups re-segmented: {', '.join(redone) if redone else 'none'}; {groups.get('kept', 0)} kept as they were"]
    if groups.get("new"):
        lines.append(f"new group(s): {', '.join(groups['new'])}")
    if groups.get("vanished"):
        lines.append(f"vanished group(s): {', '.join(groups['vanished'])}")
    if drift:
        from .store import DRIFT_HEAD, drift_line

        width = max([len(str(d["group"])) for d in drift] + [5])
        lines += ["", f"{'group'.ljust(width)}  {DRIFT_HEAD}"] + [f"{str(d['group']).ljust(width)}  {drift_line(d)}" for d in drift]
    return lines
