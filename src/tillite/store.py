"""The summary store: per-partition cell CFs kept in the database, and refresh.

A store freezes the grid at build time, so every partition's cells share the
same keys and add up.  Tables of our own naming, in the source's database:

- ``tillite_stores``: one row per store (source, columns, partitioning, frozen
  grid, the current model as JSON, the next unused segment id, a version);
- ``tillite_store_parts``: one row per partition (rows, skipped, fingerprint,
  file size and modification time for file partitions, when summarised);
- ``tillite_store_labels``: label views/tables to re-create after a refresh;
- ``tillite_cells_<store>``: the cells, keyed by (part, k0..), with n, ls*, ss*
  on the centred values v = x - grid.center (times grid.inv_scale for grids with sums_scaled).
  The name is unique among the
  stores and tables of the database (``choose_cells_table``); ``part`` is the
  partition's key, one-to-one with its typed values (``Partitioning.key``).
  A ``--within`` store also keys them by the group (``grp``) and keeps a model
  per group; store_groups.py holds what differs for it.

A refresh fingerprints every partition (or only named ones) in one aggregate
pass, recomputes cells only for new and changed partitions (one statement
restricted to them), drops vanished ones, re-segments from the merged cells
(warm-started from the last model and freshly seeded, keeping the better), and
does all of it in one transaction reading one snapshot: if anything fails, the
store is exactly as it was, and the stored fingerprints always vouch for the
cells stored with them.
"""

from __future__ import annotations

import functools
import json
import os
import re
import time
import warnings
from dataclasses import dataclass, field, replace as with_fields
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from . import categorical as cat
from . import features as F
from . import sqlgen, store_history, store_named
from .lazy import lazy_module
from .engines import Engine, result_rows
from .errors import (  # noqa: F401  (StoreError, StoreBusy, StoreExists are re-exported here)
    EngineError, InputError, ParameterError, SourceError, StoreBusy, StoreError, StoreExists, TilliteError,
    TransactionConflict,
)
from .features import CF
from .model import Model
from .pipeline import Settings, check_refresh_options, into_name, label as label_relation, owner_comment, store_of_comment, store_owns_label
from .stages import (
    ProgressFn,
    SegmentStats,
    Standardisation,
    cells_from_result,
    check_columns,
    grid_for_profile,
    resolve_columns,
    resolve_names,
    make_model,
    order_by_size,
    attach_phase,
    categorical_source,
    indicator_weights,
    cells_statement_with_codes,
    cells_with_codes,
    numeric_grid,
    grid_with_category_codes,
    numeric_positions,
    quiet_progress,
    refine_passes,
    refine_phase,
    run_profile,
    run_second_phase,
    second_phase,
    standardise_cells,
)
from .segmenters import nearest
from .stages import axes_text
from .sqlgen import Grid, Source

#: what differs for a --within store, imported only by such a store's build and refresh
store_groups = lazy_module("tillite.store_groups")

__all__ = [
    "StoreError",
    "StoreBusy",
    "PartitionSpec",
    "StoreInfo",
    "RefreshReport",
    "build",
    "refresh",
    "status",
    "load",
    "label",
    "subtract_rows",
    "resegment",
    "regrid",
    "match_segments",
    "require_transactions",
    "drop",
    "store_tables",
    "part_label",
    "PARTITIONS_WARN",
    "PARTITIONS_LIMIT",
]

STORES = "tillite_stores"
PARTS = "tillite_store_parts"
LABELS = "tillite_store_labels"
#: Every cells table starts with this; the rest is the store's key, unique among the stores of a database.
CELLS_PREFIX = "tillite_cells_"

#: Partition counts: a build warns above PARTITIONS_WARN and refuses above PARTITIONS_LIMIT
#: (unless asked), since each partition costs a row of bookkeeping and a group in every pass.
PARTITIONS_WARN = 10_000
PARTITIONS_LIMIT = 100_000

STORES_COLUMNS = [
    ("store", "VARCHAR"), ("source", "VARCHAR"), ("columns", "VARCHAR"), ("partition_by", "VARCHAR"),
    ("cells_table", "VARCHAR"), ("grid", "VARCHAR"), ("key_range", "VARCHAR"), ("model", "VARCHAR"),
    ("settings", "VARCHAR"), ("next_id", "BIGINT"), ("version", "BIGINT"), ("built_at", "VARCHAR"),
    ("refreshed_at", "VARCHAR"),
]
PARTS_COLUMNS = [
    ("store", "VARCHAR"), ("part", "VARCHAR"), ("rows", "BIGINT"), ("fingerprint", "VARCHAR"),
    ("file_size", "BIGINT"), ("file_mtime", "DOUBLE"), ("summarised_at", "VARCHAR"), ("part_values", "VARCHAR"),
]
LABELS_COLUMNS = [("store", "VARCHAR"), ("name", "VARCHAR"), ("materialized", "BOOLEAN")]


@dataclass(frozen=True)
class PartitionSpec:
    """How a source splits into partitions: columns of a table, or one partition per file."""

    columns: tuple[str, ...] = ()
    files: bool = False

    def to_dict(self) -> dict:
        return {"columns": list(self.columns), "files": self.files}

    @staticmethod
    def from_dict(data: dict) -> "PartitionSpec":
        return PartitionSpec(tuple(data.get("columns", ())), bool(data.get("files", False)))


@dataclass
class StoreInfo:
    name: str
    source: Source
    columns: list[str]
    partition: PartitionSpec
    cells_table: str
    grid: Grid
    key_range: np.ndarray  # (2, p): per-axis key min and max at build
    model: Model
    settings: dict[str, Any]
    next_id: int
    version: int
    built_at: str
    refreshed_at: str
    warnings: list[str] = field(default_factory=list)  # from the build that returned this


@dataclass
class RefreshReport:
    store: str
    new: list[str] = field(default_factory=list)
    changed: list[str] = field(default_factory=list)
    vanished: list[str] = field(default_factory=list)
    unchanged: int = 0
    drift: list[dict[str, Any]] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    seconds: dict[str, float] = field(default_factory=dict)
    model: Model | None = None
    checked: str = "every partition"  # or "named partitions" (refresh --partitions/--where)
    seeding: dict[str, Any] = field(default_factory=dict)  # warm-start and fresh-seeding SSE, and which was kept
    groups: dict[str, Any] = field(default_factory=dict)  # a --within store: groups re-segmented, new, vanished, kept
    #: per categorical column: rows of the partitions summarised now whose value is none of the categories
    #: listed at build (values first seen since among them), counted as "(other)"
    other_rows: dict[str, dict[str, Any]] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {
            "store": self.store,
            "checked": self.checked,
            "partitions": {"new": self.new, "changed": self.changed, "vanished": self.vanished, "unchanged": self.unchanged},
            "seeding": self.seeding,
            **({"groups": self.groups} if self.groups else {}),
            **({"other_rows": self.other_rows} if self.other_rows else {}),
            "drift": self.drift,
            "warnings": self.warnings,
            "seconds": self.seconds,
        }

    def describe(self, with_warnings: bool = True) -> str:
        """The report as text; ``with_warnings=False`` leaves the warnings to the caller (the CLI prints them on stderr)."""
        lines = [
            f"store {self.store}: {len(self.new)} new, {len(self.changed)} changed, {len(self.vanished)} vanished, "
            f"{self.unchanged} unchanged partition(s)" + (" (named partitions only)" if self.checked != "every partition" else "")
        ]
        if self.seeding.get("kept") == "fresh":
            lines.append(
                f"re-segmented from a fresh k-means++ seeding (SSE {self.seeding['fresh_sse']:.6g}; "
                f"warm start from the last model: {self.seeding['warm_sse']:.6g})"
            )
        lines += other_rows_lines(self.other_rows)
        if self.groups:
            lines += store_groups.report_lines(self.groups, self.drift)
        elif self.drift:
            lines += ["", DRIFT_HEAD] + [drift_line(d) for d in self.drift]
        if with_warnings:
            lines += [f"warning: {w}" for w in self.warnings]
        return "\n".join(lines)


DRIFT_HEAD = f"{'segment':>7}  {'size before':>11}  {'size after':>10}  {'shift (sd)':>10}  {'cells moved':>11}"


def drift_line(d: dict[str, Any]) -> str:
    """One segment's row of the drift table (under DRIFT_HEAD)."""
    before = "-" if d["size_before"] is None else f"{d['size_before']:,}"
    after = "-" if d["size_after"] is None else f"{d['size_after']:,}"
    shift = "-" if d["shift_sd"] is None else f"{d['shift_sd']:.3f}"
    moved = "-" if d["cells_moved"] is None else f"{100 * d['cells_moved']:.1f}%"
    return f"{d['segment']:>7}  {before:>11}  {after:>10}  {shift:>10}  {moved:>11}"


# ----------------------------------------------------------------------------- tables


def cells_table_name(store: str) -> str:
    """The readable stem of a store's cells table: tillite_cells_<store, folded to [a-z0-9_]>.

    Folding is not one-to-one (``sales-eu`` and ``sales_eu`` fold alike), so a new
    store's table is picked by ``choose_cells_table``, which makes it unique.
    """
    folded = re.sub(r"[^a-z0-9_]+", "_", store.lower()).strip("_") or "store"
    return f"{CELLS_PREFIX}{folded}"


def choose_cells_table(engine: Engine, store: str) -> str:
    """A cells table name no other store of this database uses and no table here has.

    A store being rebuilt keeps its own table.  Otherwise the folded name, or
    the folded name with the first free suffix _2, _3, ... when another store
    (or any table, ours or the user's) already has it.
    """
    registry = {r["store"]: r["cells_table"] for r in engine.query_rows(sqlgen.select_where(STORES, None, ["store", "cells_table"]))}
    if store in registry:
        return registry[store]
    taken = {t.lower() for t in registry.values()} | {t.split(".")[-1].lower() for t in engine.tables()}
    stem = cells_table_name(store)
    name, i = stem, 1
    while name.lower() in taken:
        i += 1
        name = f"{stem}_{i}"
    return name


def store_tables(engine: Engine, store: str | None = None) -> list[str]:
    """The tillite_* tables a store keeps in its database: the registry tables and its cells table
    (every store's, when ``store`` is None)."""
    known = {t.split(".")[-1].lower() for t in engine.tables()}
    if STORES not in known:
        return []
    where = sqlgen.equals_all({"store": store}) if store is not None else None
    cells = [r["cells_table"] for r in engine.query_rows(sqlgen.select_where(STORES, where, ["cells_table"]))]
    registry = [STORES, PARTS, LABELS, *([store_history.HISTORY] if store_history.HISTORY in known else [])]
    return [*registry, *sorted(cells)]


def default_store_name(source: Source) -> str:
    """A store's name when none is given: the table's name, or for files the folder (or file) they are in.

    ``data/days/**/*.parquet`` gives ``days``; ``data/meters.parquet`` gives ``meters``.
    """
    if source.table:
        return source.table[-1]
    parts = Path(source.files[0]).parts
    globbed = [i for i, p in enumerate(parts) if any(ch in p for ch in "*?[")]
    if not globbed:  # one file, or a folder
        path = Path(source.files[0])
        return path.name if path.is_dir() else path.stem
    before = parts[: globbed[0]]
    name = Path(*before).name if before else ""
    return name if name not in ("", "/", ".") else "files"


def ensure_tables(engine: Engine) -> None:
    for table, columns in ((STORES, STORES_COLUMNS), (PARTS, PARTS_COLUMNS), (LABELS, LABELS_COLUMNS)):
        engine.execute(sqlgen.create_table_statement(table, columns))


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _cells_columns(p: int, d: int, within: str | None = None) -> list[tuple[str, str]]:
    """part, k0.., n, ls0.., ss0..; a --within store keeps each cell's group key after part."""
    if within is not None:
        return store_groups.cells_columns(_cells_columns(p, d))
    return (
        [("part", "VARCHAR")]
        + [(f"k{a}", "DOUBLE") for a in range(p)]
        + [("n", "BIGINT")]
        + [(f"ls{j}", "DOUBLE") for j in range(d)]
        + [(f"ss{j}", "DOUBLE") for j in range(d)]
    )


def _source_to_dict(source: Source) -> dict:
    return {"table": list(source.table), "files": list(source.files), "reader": source.reader}


def _source_from_dict(data: dict) -> Source:
    if data.get("table"):
        return Source.of_table(data["table"])
    return Source.of_files(data["files"], data["reader"])




# ----------------------------------------------------------------------------- partitions


def _partitioning(spec: PartitionSpec) -> sqlgen.Partitioning:
    return sqlgen.Partitioning.of_files() if spec.files else sqlgen.Partitioning.of_columns(spec.columns)


def _scan_source(source: Source, spec: PartitionSpec, files: Sequence[str] | None = None) -> Source:
    """The source as scanned by the store: files carry their name; optionally only some files (derived
    columns, e.g. category indicators, kept)."""
    if not spec.files:
        return source
    return Source(files=tuple(files) if files is not None else source.files, reader=source.reader, filename=True,
                  derived=source.derived)


def _list_files(source: Source) -> list[str]:
    import glob

    found: set[str] = set()
    for pattern in source.files:
        found.update(glob.glob(pattern, recursive=True) or ([pattern] if os.path.exists(pattern) else []))
    return sorted(found)


@dataclass
class Fingerprint:
    rows: int
    fingerprint: str
    file_size: int | None = None
    file_mtime: float | None = None
    values: list[str | None] = field(default_factory=list)  # the partition column values, as text


_PLAIN_VALUE = re.compile(r"^[\w.:+\- ]*$")


def part_label(values: Sequence[str | None], names: Sequence[str], key: str = "") -> str:
    """A partition as people read it: ``2026-01-15``, or ``region=eu/day=2026-01-15`` for several columns.

    SQL NULL reads NULL; a value that could be mistaken for it or for the
    separators (the string 'NULL', text holding ``/`` or ``=``) is shown quoted.
    Only for display: the store keys partitions by ``sqlgen.Partitioning.key``.
    File partitions (no names) read as their path (``key``).
    """
    if not names:
        return key

    def show(v: str | None) -> str:
        if v is None:
            return "NULL"
        return v if v != "NULL" and _PLAIN_VALUE.match(v) else json.dumps(v)

    if len(names) == 1:
        return show(values[0])
    return "/".join(f"{n}={show(v)}" for n, v in zip(names, values))


def _fingerprints_of(got: dict[str, np.ndarray], width: int, files: dict[str, Fingerprint] | None = None) -> dict[str, Fingerprint]:
    out = {}
    for r in result_rows(got):
        part = str(r["part"])
        base = (files or {}).get(part)
        out[part] = Fingerprint(
            int(r["rows"]), str(r["fingerprint"]), base.file_size if base else None, base.file_mtime if base else None,
            [r[f"pv{i}"] for i in range(width)],
        )
    return out


def fingerprint_partitions(
    engine: Engine, source: Source, columns: Sequence[str], spec: PartitionSpec, stored: dict[str, Fingerprint]
) -> dict[str, Fingerprint]:
    """Current fingerprints of every partition (one aggregate pass; files only where size/mtime moved)."""
    partitioning = _partitioning(spec)
    if not spec.files:
        got = engine.query(sqlgen.fingerprint_statement(source, columns, partitioning, engine.target))
        return _fingerprints_of(got, len(spec.columns))
    out: dict[str, Fingerprint] = {}
    to_hash = []
    for path in _list_files(source):
        st = os.stat(path)
        old = stored.get(path)
        if old is not None and old.file_size == st.st_size and old.file_mtime == st.st_mtime:
            out[path] = old
        else:
            out[path] = Fingerprint(0, "", st.st_size, st.st_mtime)
            to_hash.append(path)
    if to_hash:
        scan = _scan_source(source, spec, to_hash)
        got = engine.query(sqlgen.fingerprint_statement(scan, columns, partitioning, engine.target))
        out.update(_fingerprints_of(got, 1, out))
    return out


def _stored_fingerprints(engine: Engine, store: str) -> dict[str, Fingerprint]:
    return {
        r["part"]: Fingerprint(int(r["rows"]), str(r["fingerprint"]), r["file_size"], r["file_mtime"], json.loads(r["part_values"]))
        for r in engine.query_rows(sqlgen.select_where(PARTS, sqlgen.equals_all({"store": store})))
    }


def _part_rows(store: str, fps: dict[str, Fingerprint], parts: Sequence[str]) -> list[tuple]:
    now = _now()
    return [
        (store, p, fps[p].rows, fps[p].fingerprint, fps[p].file_size, fps[p].file_mtime, now, json.dumps(fps[p].values))
        for p in parts
    ]


# ----------------------------------------------------------------------------- load / save


def load(engine: Engine, store: str) -> StoreInfo:
    """The store's metadata and current model.

    The registry is read directly; the catalog (slow to list on a cold
    connection) is consulted only when that fails, to say why.  Not for use
    inside a transaction (a failed read would end a PostgreSQL one).
    """
    try:
        got = engine.query_rows(sqlgen.select_where(STORES, sqlgen.equals_all({"store": store})))
    except Exception:
        known = {t.split(".")[-1].lower() for t in engine.tables()}
        if STORES not in known:
            raise StoreError(f"no summary store here (table {STORES} not found); build one with `tillite store build`") from None
        raise
    if not got:
        names = [r["store"] for r in engine.query_rows(sqlgen.select_where(STORES, None, ["store"]))]
        raise StoreError(f"store {store} not found; stores here: {', '.join(names) if names else '(none)'}")
    r = got[0]
    return StoreInfo(
        name=store,
        source=_source_from_dict(json.loads(r["source"])),
        columns=json.loads(r["columns"]),
        partition=PartitionSpec.from_dict(json.loads(r["partition_by"])),
        cells_table=r["cells_table"],
        grid=Grid.from_dict(json.loads(r["grid"])),
        key_range=np.asarray(json.loads(r["key_range"]), dtype=np.float64),
        model=Model.from_dict(json.loads(r["model"]), where=f"store {store}"),
        settings=json.loads(r["settings"]),
        next_id=int(r["next_id"]),
        version=int(r["version"]),
        built_at=r["built_at"],
        refreshed_at=r["refreshed_at"] or "",
    )


def _settings_of(info_settings: dict[str, Any], **override: Any) -> Settings:
    data = {**info_settings, **{k: v for k, v in override.items() if v is not None}}
    if "categorical" in data:  # a JSON list
        data["categorical"] = tuple(data["categorical"])
    return Settings(**data)


def _settings_dict(settings: Settings) -> dict[str, Any]:
    return {
        "k": settings.k, "scaling": settings.scaling, "weights": settings.weights, "cell_budget": settings.cell_budget,
        "refine_passes": settings.refine_passes, "tolerance": settings.tolerance, "n_init": settings.n_init,
        "seed": settings.seed, "sample_rows": settings.sample_rows,
        **({"method": settings.method} if settings.method != "kmeans" else {}),  # k-means stores keep their old settings
        **({"within": settings.within} if settings.within is not None else {}),
        **_categorical_settings(settings),
    }


# ----------------------------------------------------------------------------- merged cells and segmentation


def merged_cells(engine: Engine, cells_table: str, grid: Grid, d: int) -> tuple[CF, np.ndarray, int]:
    """All partitions' cells summed per grid cell: (cells on grid units, keys, skipped rows)."""
    got = engine.query(sqlgen.merged_cells_statement(cells_table, grid.key_names(), d, nan_for_null=True))
    return cells_from_result(got, grid, d)


# ----------------------------------------------------------------------------- categorical columns
#
# A store with --categorical keys its cells by (part, code q0.., grid key k0..) and keeps the numeric
# columns' sums only: every row of such a cell holds the same category, so its indicators' sums are
# exact functions of the cell's count (categorical.indicator_cells), made when the cells are read.
# The listed categories are fixed at build, like the grid; a value first seen later counts as "(other)".


def check_store_categorical(settings: Settings) -> None:
    """A store keeps categorical columns or --within groups, not both yet: one line naming both options."""
    if settings.categorical and settings.within is not None:
        raise ParameterError("a summary store does not keep {categorical} columns and {within} groups together yet; "
                             "build it with one of them", "categorical", "within")


def store_categories(info: StoreInfo) -> list[cat.CategoricalColumn]:
    """The store's categorical columns with the categories listed at build (none for a numeric store)."""
    return cat.specs_of(info.model.categorical)


def _categorical_settings(settings: Settings) -> dict[str, Any]:
    """The settings a store with categorical columns keeps (none for other stores: their settings stay as they were)."""
    if not settings.categorical:
        return {}
    return {"categorical": list(settings.categorical), "max_categories": settings.max_categories}


def _source_columns(engine: Engine, source: Source, columns: Sequence[str], settings: Settings) -> list[str]:
    """Every column of the source, after checking the numeric ones (none are needed with categorical columns)."""
    if columns or not settings.categorical:
        return check_columns(engine, source, columns)
    return [n for n, _ in engine.describe(source)]


def _numeric_columns(columns: Sequence[str], specs: Sequence[cat.CategoricalColumn]) -> list[str]:
    indicators = {n for spec in specs for n in spec.names}
    return [c for c in columns if c not in indicators]


def _categorical_build(
    engine: Engine, source: Source, columns: Sequence[str], settings: Settings, grid: Grid | None,
    categories: Sequence[cat.CategoricalColumn] | None,
) -> tuple[Source, list[str], list[cat.CategoricalColumn], Grid]:
    """A build with categorical columns: the source read with their indicators and codes, the columns
    (numeric, then indicators), the categories (the profile sample's top ones unless given) and the frozen
    grid (binning the numeric columns, as ``segment --categorical`` does)."""
    if grid is not None and categories is not None:  # both given: no profile needed
        specs = list(categories)
        return cat.with_indicators(source, specs, engine.target), [*columns, *(n for s in specs for n in s.names)], specs, grid
    source, specs, prof = categorical_source(engine, source, columns, settings, fixed=categories)
    full = [*columns, *(n for s in specs for n in s.names)]
    weights, groups = indicator_weights(settings, full, specs), cat.indicator_positions(full, specs)
    return source, full, specs, grid if grid is not None else grid_with_category_codes(prof, settings, weights, groups)


def _store_scan(
    engine: Engine, source: Source, spec: PartitionSpec, specs: Sequence[cat.CategoricalColumn], files: Sequence[str] | None = None
) -> Source:
    """The source as the store scans it (``_scan_source``), with the categorical columns' indicators and codes."""
    return cat.with_indicators(_scan_source(with_fields(source, derived=()), spec, files), specs, engine.target)


def _fingerprint_columns(columns: Sequence[str], specs: Sequence[cat.CategoricalColumn]) -> list[str]:
    """What a partition's fingerprint hashes: the numeric columns and each categorical column's code (a row
    moving between two unlisted values changes no cell, so it need not be rescanned)."""
    if not specs:
        return list(columns)
    return _numeric_columns(columns, specs) + cat.code_names(specs)


def _cells_layout(grid: Grid, columns: Sequence[str], specs: Sequence[cat.CategoricalColumn]) -> tuple[list[str], list[str], np.ndarray]:
    """The cells table's grid key columns, code columns and the positions of the summed (numeric) columns."""
    if not specs:
        return grid.key_names(), [], np.arange(len(columns))
    num_idx = numeric_positions(len(columns), cat.indicator_positions(columns, specs))
    return (grid.key_names() if len(num_idx) else []), [f"q{i}" for i in range(len(specs))], num_idx


def _store_cells_columns(grid: Grid, columns: Sequence[str], specs: Sequence[cat.CategoricalColumn],
                         within: str | None = None) -> list[tuple[str, str]]:
    """The cells table's columns, in the order the cell statement returns them (part, group or codes, keys, sums)."""
    if not specs:
        return _cells_columns(grid.dims, len(columns), within)
    keys, codes, num_idx = _cells_layout(grid, columns, specs)
    cols = _cells_columns(len(keys), len(num_idx))
    return cols[:1] + [(q, "BIGINT") for q in codes] + cols[1:]


def _cells_select(
    engine: Engine, scan: Source, columns: Sequence[str], grid: Grid, specs: Sequence[cat.CategoricalColumn],
    partitioning: sqlgen.Partitioning, where: Any = None, within: str | None = None,
) -> Any:
    """The store's cell pass (keyed by partition): with categorical columns keyed by their codes too, in a
    --within store by (partition, group, cell)."""
    if within is not None:
        return store_groups.cells_statement(scan, columns, grid, engine.target, partitioning, within, where=where)
    if not specs:
        return sqlgen.cells_statement(scan, columns, grid, engine.target, partitioning, where=where)
    groups = cat.indicator_positions(columns, specs)
    return cells_statement_with_codes(scan, columns, grid, groups, cat.code_names(specs), engine.target, partitioning, where)[0]


def store_cells(
    engine: Engine, cells_table: str, grid: Grid, columns: Sequence[str], specs: Sequence[cat.CategoricalColumn] = ()
) -> tuple[CF, np.ndarray, int]:
    """``merged_cells`` for any store: with categorical columns summed per (grid cell, codes), the
    indicators' sums made from the counts; the keys then end with the codes."""
    if not specs:
        return merged_cells(engine, cells_table, grid, len(columns))
    keys, codes, _ = _cells_layout(grid, columns, specs)
    groups = cat.indicator_positions(columns, specs)
    sub, num_idx = numeric_grid(grid, len(columns), groups)
    got = engine.query(sqlgen.merged_cells_statement(cells_table, keys + codes, len(num_idx)))
    cp = cells_with_codes(got, grid, sub, num_idx, groups, len(columns))
    return cp.cells, cp.keys, cp.skipped


def _range_keys(keys: np.ndarray, specs: Sequence[cat.CategoricalColumn]) -> np.ndarray:
    """The grid's keys of merged cells, without the category codes (the built range bounds the grid only)."""
    return keys[:, : keys.shape[1] - len(specs)]


def _other_rows(engine: Engine, cells_table: str, specs: Sequence[cat.CategoricalColumn], parts: Sequence[str]) -> dict[str, dict[str, Any]]:
    """Per categorical column, the rows of ``parts`` counted as "(other)": one aggregate over their kept cells."""
    sums = [
        sqlgen.exp.alias_(sqlgen.exp.Sum(this=sqlgen.case_when(
            sqlgen.exp.EQ(this=sqlgen.col(f"q{i}"), expression=sqlgen.num(len(spec.values) + 1)), sqlgen.col("n"))), f"o{i}", quoted=True)
        for i, spec in enumerate(specs)
    ]
    got = engine.query_rows(sqlgen.exp.select(*sums).from_(sqlgen.table_name(cells_table)).where(sqlgen.in_list("part", parts)))
    return {spec.column: {"rows": int(got[0][f"o{i}"] or 0), "listed": len(spec.values), "partitions": len(parts)}
            for i, spec in enumerate(specs)}


def other_rows_lines(other_rows: dict[str, dict[str, Any]]) -> list[str]:
    """The refresh report's lines on rows whose category is none of those listed at build."""
    return [
        f"{column}: {o['rows']:,} row(s) of the {o['partitions']} partition(s) summarised hold a value outside the "
        f"{o['listed']} categories listed at build (values first seen since among them); they count as (other)"
        for column, o in other_rows.items() if o["rows"]
    ]


def _segment_cells(
    engine: Engine,
    source: Source,
    columns: Sequence[str],
    cells_grid: CF,
    keys: np.ndarray,
    skipped: int,
    grid: Grid,
    settings: Settings,
    where: str,
    init_original: np.ndarray | None,
    progress: ProgressFn,
    seeding: dict[str, Any] | None = None,
    specs: Sequence[cat.CategoricalColumn] = (),
) -> tuple[Model, CF, Any]:
    """Second phase on merged cells (k-means warm-started from centroids in original units), optional refine.

    With ``seeding`` (a dict to fill) a warm start is also tried against fresh
    k-means++ seeding on the same cells, and the lower SSE is kept: a warm start
    cannot find a group of rows that arrived since the last model.  Ward has
    no start to warm: it runs as in ``pipeline.segment`` (``_ward_on_cells``).  ``specs``: the
    categorical columns (``source`` reads their indicators and codes), as ``pipeline.segment`` runs them.
    """
    weights, groups = indicator_weights(settings, columns, specs), cat.indicator_positions(columns, specs)
    cells, std = standardise_cells(cells_grid, grid, columns, settings, weights, groups)
    codes = (groups, cat.code_names(specs)) if specs else None
    if specs:
        settings = with_fields(settings, keep_outliers=True)  # as segment: cells are keyed by category codes too
    if settings.method == "ward":
        model = _ward_on_cells(engine, source, columns, cells, keys, std, skipped, grid, settings, where, progress, codes)
        model.categorical = [spec.to_dict() for spec in specs]
        return model, cells, std
    init = None if init_original is None else (np.asarray(init_original) - std.center[None, :]) / std.scale[None, :]
    t0 = time.perf_counter()
    result = second_phase(cells, settings, std.weights, where, init=init)
    total_sse = F.sse(F.total(cells), std.weights)
    if seeding is not None and init is not None:
        result = _better_of_warm_and_fresh(cells, settings, std.weights, where, result, seeding, total_sse)
        if seeding["kept"] == "fresh":
            init = None  # ordered by size below, like a fresh build
    unexplained = result.sse / total_sse if total_sse > 0 else 0.0
    progress("second phase", f"{'warm start' if init is not None else f'k-means++ x{result.restarts}'} on {int((cells.n > 0).sum()):,} cells, SSE {result.sse:.6g}, {time.perf_counter() - t0:.2f} s")
    stats = SegmentStats.of_cfs(F.group_sum(cells, result.labels, settings.k), std.weights)
    usable = int(round(cells.n.sum()))
    stats, passes, _ = refine_passes(engine, source, columns, std, result.centroids, stats, settings, progress, usable, codes=codes)
    if init is None:
        stats = order_by_size(stats)
    model = make_model(columns, std, grid, stats, settings, source, usable + skipped, skipped, int((cells.n > 0).sum()),
                       extra_params={"cell_sse": float(result.sse), "cell_unexplained": float(unexplained)})
    model.passes = passes
    model.categorical = [spec.to_dict() for spec in specs]
    return model, cells, std


def _ward_on_cells(
    engine: Engine, source: Source, columns: Sequence[str], cells: CF, keys: np.ndarray, std: Standardisation,
    skipped: int, grid: Grid, settings: Settings, where: str, progress: ProgressFn,
    codes: tuple[Sequence[np.ndarray], Sequence[str]] | None = None,
) -> Model:
    """Ward on the merged cells, the same stages as ``pipeline.segment --method ward``: the second phase (a CF tree
    first above the budget), refine passes (none when the cells settle it), segments numbered largest first."""
    t0 = time.perf_counter()
    phase = run_second_phase(cells, keys, settings, std.weights, where, progress)
    progress("second phase", f"{phase.summary}, {time.perf_counter() - t0:.2f} s")
    usable = int(round(cells.n.sum()))
    refined = refine_phase(engine, source, columns, cells, keys, grid, std, phase, settings, progress, usable, codes=codes)
    model = make_model(columns, std, grid, refined.stats, settings, source, usable + skipped, skipped,
                       int((cells.n > 0).sum()), extra_params={"cell_sse": phase.sse, **phase.params})
    return attach_phase(model, "ward", phase, refined, grid, keys)


def check_store_method(method: str) -> None:
    """A store segments with k-means or Ward; density is refused, naming the parameter and why."""
    if method == "density":
        raise ParameterError(
            "{method} density cannot keep a store: its segments are labelled through a map of the cells dense at "
            "build, which rows arriving in new cells at a refresh would miss; use {method} kmeans or ward",
            "method",
        )


#: A refresh seeds afresh when the warm start leaves this much more of the variance unexplained than the last model did
#: (relative: 0.01 is 1%), when at least RESEED_ROWS of the rows changed, and on every RESEED_EVERY-th store version.
RESEED_UNEXPLAINED = 0.01
RESEED_ROWS = 0.05
RESEED_EVERY = 10


def fresh_seeding_reason(warm_unexplained: float, seeding: dict[str, Any]) -> str | None:
    """Why a refresh also runs a freshly seeded k-means, or None when the warm start is kept without one.

    A warm start cannot find a group of rows that arrived since the last model,
    but such a group shows: the merged cells' share of the variance left
    unexplained (cell SSE / total scatter, in the same units) rises.  Fresh
    seeding (``n_init`` restarts, most of a small refresh's own work) therefore
    runs only when that share rose by more than RESEED_UNEXPLAINED, when the
    new, changed and vanished partitions hold at least RESEED_ROWS of the rows,
    when partitions vanished, when the last model recorded no share (stores
    built before it was kept), and on every RESEED_EVERY-th store version, so
    a slow drift spread over many small refreshes is also caught.
    ``seeding`` holds the inputs (``last_unexplained``, ``changed_share``,
    ``vanished``, ``version``), filled by ``refresh``.
    """
    last = seeding.get("last_unexplained")
    if last is None:
        return "the last model recorded no unexplained share"
    if warm_unexplained > last * (1.0 + RESEED_UNEXPLAINED) + 1e-12:
        return f"the warm start leaves {100 * warm_unexplained:.2f}% of the variance unexplained, the last model {100 * last:.2f}%"
    if seeding.get("changed_share", 1.0) >= RESEED_ROWS:
        return f"{100 * seeding.get('changed_share', 1.0):.1f}% of the rows changed"
    if seeding.get("vanished"):
        return "partitions vanished"
    if seeding.get("version", 0) % RESEED_EVERY == 0:
        return f"every {RESEED_EVERY}th store version is seeded afresh"
    return None


def _better_of_warm_and_fresh(cells: CF, settings: Settings, weights: np.ndarray, where: str, warm: Any, seeding: dict[str, Any],
                              total_sse: float) -> Any:
    """The warm-started result or a freshly seeded one, whichever has the lower SSE; fills ``seeding``.

    The fresh seeding runs only when ``fresh_seeding_reason`` gives a reason;
    otherwise the warm start is kept and ``seeding['fresh']`` says so.
    """
    reason = fresh_seeding_reason(warm.sse / total_sse if total_sse > 0 else 0.0, seeding)
    if reason is None:
        seeding.update({"warm_sse": float(warm.sse), "kept": "warm", "segments_changed": False,
                        "fresh": "skipped: the warm start explains the cells as well as the last model did"})
        return warm
    seeding["fresh"] = f"run: {reason}"
    fresh = second_phase(cells, settings, weights, where, init=None)
    kept = fresh if fresh.sse < warm.sse * (1.0 - 1e-9) else warm
    seeding.update({
        "warm_sse": float(warm.sse), "fresh_sse": float(fresh.sse), "kept": "fresh" if kept is fresh else "warm",
        "segments_changed": kept is fresh and not _same_partition(warm.labels, fresh.labels),
    })
    return kept


def _same_partition(a: np.ndarray, b: np.ndarray) -> bool:
    """Do two labellings of the same cells group them identically (up to renumbering)?"""
    pairs = {(int(x), int(y)) for x, y in zip(a, b)}
    return len(pairs) == len(set(map(int, a))) == len(set(map(int, b)))


def match_segments(
    old_centroids: np.ndarray, old_ids: Sequence[int], new_centroids: np.ndarray, next_id: int, scale: np.ndarray,
    new_segment_shift: float,
) -> tuple[list[int], int]:
    """Ids for new segments: matched to old ones by minimum total centroid distance.

    Distances are in standard deviations (``scale``).  A new segment farther than
    ``new_segment_shift`` from its match, or left unmatched, is genuinely new and
    gets a fresh id; ids of vanished segments are never reused (``next_id`` only grows).
    """
    k_new = len(new_centroids)
    ids = [-1] * k_new
    if len(old_centroids):
        gap = (np.asarray(new_centroids)[:, None, :] - np.asarray(old_centroids)[None, :, :]) / scale[None, None, :]
        dist = np.sqrt((gap**2).sum(axis=2))
        rows, cols = min_cost_assignment(dist)
        for r, c in zip(rows, cols):
            if dist[r, c] <= new_segment_shift:
                ids[r] = int(old_ids[c])
    for r in range(k_new):
        if ids[r] < 0:
            ids[r] = next_id
            next_id += 1
    return ids, next_id


def min_cost_assignment(cost: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows and columns of a minimum-cost one-to-one assignment (Hungarian method, O(n^2 m)).

    Same answer as scipy.optimize.linear_sum_assignment, for the small matrices
    of segment matching (k x k), without importing scipy.optimize, which alone
    takes longer than a refresh of one partition.  Potentials form of the
    method (Kuhn 1955; Munkres 1957), rows <= columns, transposed otherwise.
    """
    a = np.asarray(cost, dtype=np.float64)
    transposed = a.shape[0] > a.shape[1]
    if transposed:
        a = a.T
    n, m = a.shape
    u, v = np.zeros(n + 1), np.zeros(m + 1)
    owner = np.zeros(m + 1, dtype=np.int64)  # owner[j]: the row (1-based) holding column j, 0 free
    way = np.zeros(m + 1, dtype=np.int64)
    for i in range(1, n + 1):
        owner[0] = i
        j0 = 0
        slack = np.full(m + 1, np.inf)
        used = np.zeros(m + 1, dtype=bool)
        while True:
            used[j0] = True
            i0 = owner[j0]
            free = ~used[1:]
            cur = a[i0 - 1] - u[i0] - v[1:]
            better = free & (cur < slack[1:])
            slack[1:][better] = cur[better]
            way[1:][better] = j0
            masked = np.where(free, slack[1:], np.inf)
            j1 = int(np.argmin(masked)) + 1
            delta = masked[j1 - 1]
            u[owner[used]] += delta
            v[used] -= delta
            slack[~used] -= delta
            j0 = j1
            if owner[j0] == 0:
                break
        while j0:
            j1 = way[j0]
            owner[j0] = owner[j1]
            j0 = j1
    cols = np.flatnonzero(owner[1:])
    rows = owner[1:][cols] - 1
    if transposed:
        rows, cols = cols, rows
    order = np.argsort(rows)
    return rows[order], cols[order]


def segment_drift(
    old: Model, new: Model, cells: CF, scale: np.ndarray, threshold: float
) -> tuple[list[dict[str, Any]], list[str]]:
    """Per segment id: size before/after, centroid shift (sd), share of its cells now elsewhere."""
    w = np.asarray(new.weights)
    u = F.centroids(cells) * w[None, :]
    old_c = (np.asarray(old.centroids) - np.asarray(new.center)[None, :]) / np.asarray(new.scale)[None, :]
    new_c = np.asarray(new.centroids_scaled)
    old_lab = np.asarray(old.segment_ids())[nearest(u, old_c * w[None, :])[0]] if len(u) else np.zeros(0, int)
    new_lab = np.asarray(new.segment_ids())[nearest(u, new_c * w[None, :])[0]] if len(u) else np.zeros(0, int)
    rows, warns = [], []
    old_by_id = dict(zip(old.segment_ids(), range(len(old.sizes))))
    new_by_id = dict(zip(new.segment_ids(), range(len(new.sizes))))
    for sid in sorted(set(old_by_id) | set(new_by_id)):
        i, j = old_by_id.get(sid), new_by_id.get(sid)
        shift = None
        if i is not None and j is not None:
            gap = (np.asarray(new.centroids[j]) - np.asarray(old.centroids[i])) / scale
            shift = float(np.sqrt((gap**2).sum()))
        was = old_lab == sid
        moved = float((new_lab[was] != sid).mean()) if was.any() else None
        rows.append({
            "segment": sid,
            "size_before": old.sizes[i] if i is not None else None,
            "size_after": new.sizes[j] if j is not None else None,
            "shift_sd": shift,
            "cells_moved": moved,
        })
        if shift is not None and shift > threshold:
            warns.append(f"segment {sid} moved {shift:.2f} standard deviations (threshold {threshold})")
        if i is None:
            warns.append(f"segment {sid} is new")
        if j is None:
            warns.append(f"segment {sid} vanished")
    return rows, warns


# ----------------------------------------------------------------------------- build


def build(
    engine: Engine,
    source: Source,
    columns: Sequence[str],
    partition: PartitionSpec,
    settings: Settings,
    store: str | None = None,
    progress: ProgressFn = quiet_progress,
    grid: Grid | None = None,
    init_centroids: np.ndarray | None = None,
    replace: bool = False,
    previous: StoreInfo | None = None,
    new_segment_shift: float = 3.0,
    many_partitions: bool = False,
    categories: Sequence[cat.CategoricalColumn] | None = None,
) -> tuple[StoreInfo, Model]:
    """Build a store from scratch: frozen grid, per-partition cells and fingerprints, first model.

    ``grid`` and ``init_centroids`` (original units) reproduce a build with a given
    frozen grid and warm start (used to check refreshes against fresh builds).
    ``previous`` (a regrid of an existing store): segment ids are matched to its
    model, its next id carries on, and its label views are re-created, all in
    the build's transaction.  The returned StoreInfo's ``warnings`` hold the
    build's warnings (e.g. many partitions).  Above PARTITIONS_LIMIT
    partitions the build refuses unless ``many_partitions``.  ``settings.categorical``: categorical
    columns, kept as in ``pipeline.segment``; ``categories`` (with them) the listed categories to keep
    (a regrid keeps the store's), else the profile sample's top ones.
    """
    require_transactions(engine)
    source, columns, settings = resolve_names(engine, source, columns, settings)  # names as the engine resolves them
    if partition.columns:
        partition = with_fields(partition, columns=tuple(resolve_columns(engine, source, partition.columns)))
    check_store_method(settings.method)  # before the checks of k, which density does not take
    check_store_categorical(settings)
    settings.check(columns)
    group_type = store_groups.check(engine, source, columns, settings) if settings.within is not None else None
    name = store or default_store_name(source)
    if not partition.files and not partition.columns:
        raise ParameterError("give the partition column(s) ({partition}) for a table source", "partition")
    source_columns = _source_columns(engine, source, columns, settings)
    missing = [c for c in partition.columns if c not in source_columns]
    if missing:
        raise InputError(f"partition column {', '.join(missing)} not found in {source.label}; columns there: {', '.join(source_columns)}")
    if source.table and source.table[-1].lower().startswith("tillite_"):
        raise InputError(f"{source.label} is one of tillite's own tables; a store summarises the user's tables")
    ensure_tables(engine)
    exists = engine.query_rows(sqlgen.select_where(STORES, sqlgen.equals_all({"store": name}), ["store"]))
    if exists and not replace:
        raise StoreExists(f"store {name} already exists; refresh it, or rebuild with {{replace}}", "replace",
                          spelled={"replace": "replace=True"})
    warnings_ = [] if partition.files else _check_partition_count(engine, source, partition, many_partitions)
    t0 = time.perf_counter()
    weights = settings.column_weights(columns)
    repeats = None
    specs: list[cat.CategoricalColumn] = []
    if settings.categorical:
        source, columns, specs, grid = _categorical_build(engine, source, columns, settings, grid, categories)
        progress("profile", f"frozen grid width {grid.width:.3g}; categories of {', '.join(s.column for s in specs)} fixed, {time.perf_counter() - t0:.2f} s")
    elif grid is None and settings.within is not None:  # a --within store's grid is segment --within's
        grid, repeats = store_groups.frozen_grid(engine, source, columns, settings, weights, progress)
    elif grid is None:
        prof = run_profile(engine, source, columns, settings)
        grid = grid_for_profile(prof, settings, weights)
        progress("profile", f"{prof.rows:,} rows, frozen grid width {grid.width:.3g} on {axes_text(grid.dims)}, {time.perf_counter() - t0:.2f} s")
    scan = _store_scan(engine, source, partition, specs)
    fps = fingerprint_partitions(engine, scan, _fingerprint_columns(columns, specs), partition, {})
    cells_table = previous.cells_table if previous is not None else choose_cells_table(engine, name)
    with engine.transaction():
        for st in _drop_store_statements(name, cells_table):
            engine.execute(st)
        engine.execute(sqlgen.create_table_statement(cells_table, _store_cells_columns(grid, columns, specs, settings.within),
                                                     if_not_exists=False))
        t1 = time.perf_counter()
        engine.execute(sqlgen.insert_select_statement(cells_table, _cells_select(engine, scan, columns, grid, specs, _partitioning(partition),
                                                                                 within=settings.within)))
        cells_grid, keys, skipped = store_cells(engine, cells_table, grid, columns, specs)
        if cells_grid.m == 0:
            raise InputError(f"no usable rows in {source.label}")
        parts = store_groups.merged_groups(engine, cells_table, grid, len(columns), settings.within) if settings.within is not None else None
        counted = f"{store_groups.pairs_of(parts):,} {store_groups.CELLS_COUNTED}" if parts is not None else f"{cells_grid.m:,} cells"
        progress("cells", f"{len(fps):,} partitions -> {counted} ({skipped:,} rows skipped), {time.perf_counter() - t1:.2f} s")
        if parts is not None:  # a model per group; ids matched per group to the previous model's
            grouped = store_groups.segment_groups(
                engine, source, columns, cells_table, grid, settings, str(group_type), source.label, progress,
                old=previous.model if previous is not None else None, new_segment_shift=new_segment_shift, repeats=repeats,
                parts=parts,
            )
            model, warnings_ = grouped.model, warnings_ + grouped.warnings
        else:
            model, _, _ = _segment_cells(engine, source, columns, cells_grid, keys, skipped, grid, settings, source.label, init_centroids,
                                         progress, specs=specs)
        grid_keys = _range_keys(keys, specs)
        key_range = np.stack([grid_keys.min(axis=0), grid_keys.max(axis=0)])
        next_id = model.k
        if previous is not None and not model.within:
            sd = np.asarray(model.grid["sd"])
            model.ids, next_id = match_segments(
                np.asarray(previous.model.centroids), previous.model.segment_ids(), np.asarray(model.centroids),
                previous.next_id, np.where(sd > 0, sd, 1.0), new_segment_shift,
            )
            model.names = dict(previous.model.names)
        if partition.files:
            model.source = f"{source.label} (one partition per file)"
        engine.execute(sqlgen.insert_values_statement(PARTS, _part_rows(name, fps, sorted(fps))))
        engine.execute(sqlgen.insert_values_statement(STORES, [(
            name, json.dumps(_source_to_dict(source)), json.dumps(columns), json.dumps(partition.to_dict()), cells_table,
            json.dumps(grid.to_dict()), json.dumps(key_range.tolist()), model.to_json(), json.dumps(_settings_dict(settings)),
            next_id, previous.version + 1 if previous is not None else 0, _now(), None,
        )]))
        if previous is not None:
            _relabel(engine, previous, model)
        store_history.record(engine, name, "regrid" if previous is not None else "build", model)
    model.timings = {"total": time.perf_counter() - t0}
    info = load(engine, name)
    info.warnings = warnings_
    return info, model


def _check_partition_count(engine: Engine, source: Source, partition: PartitionSpec, many_partitions: bool) -> list[str]:
    """Warn above PARTITIONS_WARN partitions, refuse above PARTITIONS_LIMIT unless asked (counting stops there)."""
    limit = PARTITIONS_LIMIT
    got = engine.query(sqlgen.distinct_count_statement(source, partition.columns, limit + 1))
    count = int(got["partitions"][0])
    named = ", ".join(partition.columns)
    if count > limit and not many_partitions:
        raise InputError(
            f"--partition-by {named} gives more than {limit:,} partitions (is it a continuous column?); each partition "
            f"costs a bookkeeping row and a group in every pass: partition by a coarser column (a day, a month), "
            f"or pass --many-partitions to build anyway"
        )
    if count > PARTITIONS_WARN:
        shown = f"more than {limit:,}" if count > limit else f"{count:,}"
        return [f"--partition-by {named} gives {shown} partitions (over {PARTITIONS_WARN:,}); refreshes fingerprint each of them: a coarser partition column would be faster"]
    return []


def _names_its_source(run: Callable[..., Any]) -> Callable[..., Any]:
    """A refresh or regrid that failed on its source says so in one line naming the store, its source
    and the missing table or column, instead of the database's own error (the transaction has rolled back)."""
    @functools.wraps(run)
    def wrapped(engine: Engine, store: str, *args: Any, **kw: Any) -> Any:
        try:
            return run(engine, store, *args, **kw)
        except (TransactionConflict, StoreError, ParameterError):
            raise
        except (EngineError, SourceError, InputError):  # the database's error, or a check that met the changed source
            problem = _source_problem(engine, store)
            if problem is None:
                raise
            raise problem from None
    return wrapped


def _source_problem(engine: Engine, store: str) -> StoreError | None:
    """Why the store's source cannot be read as at build (table gone or renamed, a column gone), or None."""
    try:
        info = load(engine, store)
    except TilliteError:
        return None
    label = f"{'files' if info.source.files else 'table'} {info.source.label}"
    try:
        described = engine.describe(info.source)
    except SourceError as err:
        return StoreError(f"store {store}: its source {label} cannot be read (renamed or dropped?): {err}; nothing was changed")
    specs = store_categories(info)
    within = info.settings.get("within")
    read = [*_numeric_columns(info.columns, specs), *(c.column for c in specs), *info.partition.columns, *([within] if within else [])]
    there = [n for n, _ in described]
    missing = [c for c in dict.fromkeys(read) if c not in there]
    if not missing:
        return None
    return StoreError(f"store {store}: {'column' if len(missing) == 1 else 'columns'} {', '.join(missing)} of its source "
                      f"{label} not found (renamed or dropped?); columns there: {', '.join(there)}; nothing was changed")


@_names_its_source
def regrid(engine: Engine, store: str, progress: ProgressFn = quiet_progress, new_segment_shift: float = 3.0) -> Model:
    """Rebuild a store with a new grid from a new profile: every partition is rescanned.

    For when rows increasingly fall outside the built range (``status`` warns).
    Segment ids are matched to the current model's, and label views follow.
    """
    check_refresh_options(new_segment_shift=new_segment_shift)
    info = load(engine, store)
    specs = store_categories(info)
    _, model = build(
        engine, info.source, _numeric_columns(info.columns, specs), info.partition, _settings_of(info.settings), store=store,
        progress=progress, replace=True, previous=info, new_segment_shift=new_segment_shift, categories=specs or None,
    )
    return model


def _drop_store_statements(name: str, cells_table: str) -> list:
    return [
        sqlgen.delete_statement(STORES, sqlgen.equals_all({"store": name})),
        sqlgen.delete_statement(PARTS, sqlgen.equals_all({"store": name})),
        sqlgen.drop_statement(cells_table, "table"),
    ]


# ----------------------------------------------------------------------------- refresh


@_names_its_source
def refresh(
    engine: Engine,
    store: str,
    progress: ProgressFn = quiet_progress,
    drift_threshold: float = 0.5,
    new_segment_shift: float = 3.0,
    k: int | None = None,
    refine: int | None = None,
    force: bool = False,
    before_commit: Callable[[], None] | None = None,
    partitions: Sequence[str] | None = None,
    where: str | None = None,
    after_fingerprints: Callable[[], None] | None = None,
) -> RefreshReport:
    """Bring the store up to date with its source; re-segment and report drift.

    ``partitions`` (``"day=2026-01-15"`` items; one column's items are
    alternatives, different columns must all match) or ``where`` (a predicate
    on the partition columns only) limit the refresh to those partitions: only
    they are fingerprinted and rescanned, for pipelines that know what they
    loaded.  ``k`` and ``refine`` are stored and kept by later refreshes.

    Everything, the fingerprints included, runs in one transaction that reads
    one snapshot (REPEATABLE READ on PostgreSQL), so the stored fingerprints
    always vouch for the cells stored with them.  ``after_fingerprints`` and
    ``before_commit`` are called inside it (tests use them to interleave a
    writer or inject a failure).
    """
    check_refresh_options(k=k, drift_threshold=drift_threshold, new_segment_shift=new_segment_shift)
    require_transactions(engine)
    t0 = time.perf_counter()
    info = load(engine, store)
    report = RefreshReport(store=store)
    types = dict(engine.describe(info.source)) if (partitions or where) and not info.partition.files else None
    predicate = named_partitions_predicate(engine, info, partitions, where, types)
    if predicate is not None:
        report.checked = "named partitions"
    specs = store_categories(info)
    scan = _store_scan(engine, info.source, info.partition, specs)
    settings = _settings_of(info.settings, k=k, refine_passes=refine if refine is not None else info.settings.get("refine_passes"))
    settings_moved = _settings_dict(settings) != _settings_dict(_settings_of(info.settings))
    try:
        with _snapshot_transaction(engine):
            # 1. fingerprints, read in the transaction's snapshot
            stored = _stored_fingerprints(engine, store)
            if predicate is None:
                current = fingerprint_partitions(engine, scan, _fingerprint_columns(info.columns, specs), info.partition, stored)
                in_scope = set(stored)
            else:
                current = _fingerprints_where(engine, scan, info, predicate)
                in_scope = _stored_matching(engine, info, stored, predicate, types)
            if after_fingerprints is not None:
                after_fingerprints()
            report.seconds["fingerprints"] = time.perf_counter() - t0
            new = sorted(set(current) - set(stored))
            vanished = sorted(in_scope - set(current))
            changed = sorted(p for p in set(current) & set(stored) if (current[p].rows, current[p].fingerprint) != (stored[p].rows, stored[p].fingerprint))
            touched_meta = [p for p in set(current) & set(stored) if p not in changed and current[p] != stored[p]]
            report.unchanged = len(current) - len(new) - len(changed)
            report.new, report.changed = _shown(info, current, new), _shown(info, current, changed)
            report.vanished = _shown(info, stored, vanished)
            if partitions:  # said, not silent: a value that matched nothing is often a typo
                _warn_unmatched(engine, info, partitions, types, [f.values for f in current.values()] + [stored[p].values for p in in_scope])
            progress("fingerprints", f"{len(current):,} partitions{' (named)' if predicate is not None else ''}: {len(new)} new, {len(changed)} changed, {len(vanished)} vanished, {report.seconds['fingerprints']:.2f} s")
            recompute = new + changed
            if not (recompute or vanished or touched_meta or force or settings_moved):
                report.model = info.model
                store_history.record(engine, store, "refresh", info.model, report)  # a check that found no change is a refresh too
                return report
            # 2. claim the store: a concurrent refresh fails here
            _claim(engine, info)
            # 3. replace the cells of changed and vanished partitions, add new ones
            t1 = time.perf_counter()
            gone = changed + vanished
            within = info.settings.get("within")
            before = store_groups.group_cells(engine, info.cells_table, gone, len(info.columns)) if within is not None else {}
            if gone:
                engine.execute(sqlgen.delete_statement(info.cells_table, sqlgen.in_list("part", gone)))
            if recompute:
                engine.execute(sqlgen.insert_select_statement(info.cells_table, _restricted_cells(engine, info, scan, [current[p] for p in recompute], recompute, types)))
            if recompute and specs:
                report.other_rows = _other_rows(engine, info.cells_table, specs, recompute)
            report.seconds["cells"] = time.perf_counter() - t1
            progress("cells", f"{len(recompute)} partition(s) summarised ({len(new)} new, {len(changed)} changed), "
                              f"{len(vanished)} vanished partition(s) dropped, {report.seconds['cells']:.2f} s")
            # 4. their bookkeeping rows
            stale = gone + touched_meta
            if stale:
                engine.execute(sqlgen.delete_statement(PARTS, sqlgen.all_of([sqlgen.equals_all({"store": store}), sqlgen.in_list("part", stale)])))
            fresh = recompute + touched_meta
            if fresh:
                engine.execute(sqlgen.insert_values_statement(PARTS, _part_rows(store, current, fresh)))
            # 5. re-segment the merged cells (warm start, and fresh seeding when fresh_seeding_reason says), match ids, drift
            t2 = time.perf_counter()
            if within is not None:  # only the groups whose cells in new, changed or vanished partitions differ
                touched = store_groups.changed_groups(before, store_groups.group_cells(engine, info.cells_table, recompute, len(info.columns)))
                model = _resegment_groups(engine, info, settings, progress, new_segment_shift, drift_threshold, report,
                                          None if force or settings_moved else touched)
            else:
                report.seeding.update(_seeding_inputs(info, stored, current, new, changed, vanished))
                model, cells, std = _resegment(engine, info, settings, progress, new_segment_shift, report.seeding)
                report.drift, report.warnings = segment_drift(info.model, model, cells, np.where(std.sd > 0, std.sd, 1.0), drift_threshold)
            report.seconds["segment"] = time.perf_counter() - t2
            if report.seeding.get("segments_changed"):
                report.warnings.insert(0, _reseeded_warning(report.seeding))
            # 6. the new model and settings, then the registered label views
            _save_model(engine, info, model, settings)
            _relabel(engine, info, model)
            store_history.record(engine, store, "refresh", model, report)
            if before_commit is not None:
                before_commit()
    except TransactionConflict:  # the transaction rolled back: the store is as it was
        raise _busy(store) from None
    _vacuum_later(engine, info.version + 1, len(gone), len(stored) + len(new))
    report.model = model
    report.seconds["total"] = time.perf_counter() - t0
    return report


#: A refresh leaves the cells it deleted for a later checkpoint to reclaim, except at every COMPACT_EVERY-th
#: version of the store and when it replaced more than 1/COMPACT_EVERY of the partitions: so what is left
#: stays below about the size of the cells table itself.
COMPACT_EVERY = 16


def _vacuum_later(engine: Engine, version: int, replaced: int, partitions: int) -> None:
    """Defer reclaiming the deleted cells where the engine can (DuckDB: ``defer_vacuum``), or vacuum now when it is due."""
    defer = getattr(engine, "defer_vacuum", None)
    if defer is not None:
        defer(version % COMPACT_EVERY != 0 and replaced * COMPACT_EVERY <= partitions)


def _seeding_inputs(
    info: StoreInfo, stored: dict[str, Fingerprint], current: dict[str, Fingerprint], new: Sequence[str],
    changed: Sequence[str], vanished: Sequence[str],
) -> dict[str, Any]:
    """What ``fresh_seeding_reason`` weighs: the last model's unexplained share, the share of rows changed, the version."""
    moved = sum(current[p].rows for p in new) + sum(max(current[p].rows, stored[p].rows) for p in changed)
    moved += sum(stored[p].rows for p in vanished)
    total = max(sum(f.rows for f in stored.values()), 1)
    last = info.model.params.get("cell_unexplained")
    return {"last_unexplained": None if last is None else float(last), "changed_share": min(moved / total, 1.0),
            "vanished": len(vanished), "version": info.version + 1}


def _snapshot_transaction(engine: Engine):
    """A transaction reading one snapshot: the engine's own, else a plain one (DuckDB's is a snapshot)."""
    snapshot = getattr(engine, "snapshot_transaction", None)
    return snapshot() if snapshot is not None else engine.transaction()


def _shown(info: StoreInfo, fps: dict[str, Fingerprint], keys: Sequence[str]) -> list[str]:
    return sorted(part_label(fps[p].values, info.partition.columns, p) for p in keys)


def _reseeded_warning(seeding: dict[str, Any]) -> str:
    gain = 1.0 - seeding["fresh_sse"] / seeding["warm_sse"] if seeding["warm_sse"] > 0 else 0.0
    return (
        f"the segments changed: a fresh k-means++ seeding of the merged cells fits {100 * gain:.1f}% better than the "
        f"warm start from the last model (SSE {seeding['fresh_sse']:.6g} vs {seeding['warm_sse']:.6g}), so it was kept; "
        "ids were matched to the old segments where centroids are close, but check the segments before relying on them"
    )


def named_partitions_predicate(
    engine: Engine, info: StoreInfo, partitions: Sequence[str] | None, where: str | None, types: dict[str, str] | None = None
) -> Any:
    """The rows of the partitions a refresh was limited to (a sqlglot tree), or None for every partition."""
    if isinstance(partitions, str):
        partitions = [p for p in partitions.split(",") if p]
    if not partitions and not where:
        return None
    if partitions and where:
        raise ParameterError("give {partitions} or {where}, not both", "partitions", "where")
    if info.partition.files:
        raise ParameterError(
            "{partitions}/{where} name partitions of a table; a store over files already reads only the files "
            "whose size or modification time changed", "partitions", "where"
        )
    names = list(info.partition.columns)
    if where:
        try:
            return sqlgen.partition_predicate(where, names, engine.target)
        except ValueError as err:
            raise ParameterError(f"{{where}} {where!r}: {err}", "where") from None
    types = types or dict(engine.describe(info.source))
    return sqlgen.all_of(store_named.value_terms(engine, store_named.named_values(partitions or (), names), types))


def _warn_unmatched(engine: Engine, info: StoreInfo, partitions: Sequence[str] | str, types: dict[str, str] | None,
                    found: list[list[str | None]]) -> None:
    """A warning line naming each --partitions item that matched no partition."""
    items = [p for p in partitions.split(",") if p] if isinstance(partitions, str) else list(partitions)
    named = store_named.named_values(items, info.partition.columns)
    note = store_named.unmatched_note(engine, named, types or dict(engine.describe(info.source)), info.partition.columns, found)
    if note:
        warnings.warn(note, UserWarning, stacklevel=3)


def _fingerprints_where(engine: Engine, scan: Source, info: StoreInfo, predicate: Any) -> dict[str, Fingerprint]:
    """Fingerprints of only the partitions whose rows satisfy ``predicate`` (the engine can skip the others' blocks)."""
    columns = _fingerprint_columns(info.columns, store_categories(info))
    statement = sqlgen.fingerprint_statement(scan, columns, _partitioning(info.partition), engine.target, where=predicate)
    return _fingerprints_of(engine.query(statement), len(info.partition.columns))


def _stored_matching(
    engine: Engine, info: StoreInfo, stored: dict[str, Fingerprint], predicate: Any, types: dict[str, str] | None = None
) -> set[str]:
    """The stored partitions whose values satisfy ``predicate``: it is evaluated by the database on a
    VALUES list of their typed values, so it means exactly what it means on the source."""
    if not stored:
        return set()
    types = types or dict(engine.describe(info.source))
    names = list(info.partition.columns)
    kinds = [sqlgen.exp.DataType.build(types[n], dialect=engine.target.name) for n in names]
    key_alias = sqlgen.internal("part")
    rows = []
    for key, fp in stored.items():
        cells = [sqlgen.exp.Literal.string(key)]
        cells += [sqlgen.exp.cast(sqlgen.exp.Null() if v is None else sqlgen.exp.Literal.string(v), kind) for v, kind in zip(fp.values, kinds)]
        rows.append(sqlgen.exp.Tuple(expressions=cells))
    alias = sqlgen.exp.TableAlias(
        this=sqlgen.exp.to_identifier(sqlgen.internal("s"), quoted=True),
        columns=[sqlgen.exp.to_identifier(c, quoted=True) for c in [key_alias, *names]],
    )
    values = sqlgen.exp.Values(expressions=rows, alias=alias)
    got = engine.query(sqlgen.exp.select(sqlgen.col(key_alias)).from_(values).where(predicate.copy()))
    return {str(v) for v in got[key_alias]}


def _restricted_cells(
    engine: Engine, info: StoreInfo, scan: Source, fps: Sequence[Fingerprint], parts: Sequence[str], types: dict[str, str] | None = None
):
    """The cell pass over only the given partitions (files: only those files are read).

    Table partitions are picked by their raw typed values so the engine can skip
    the blocks of other partitions.
    """
    partitioning = _partitioning(info.partition)
    specs = store_categories(info)
    within = info.settings.get("within")
    if info.partition.files:
        files = _store_scan(engine, info.source, info.partition, specs, parts)
        return _cells_select(engine, files, info.columns, info.grid, specs, partitioning, within=within)
    types = types or dict(engine.describe(info.source))
    where = partitioning.filter([types[c] for c in info.partition.columns], [fp.values for fp in fps], engine.target)
    return _cells_select(engine, scan, info.columns, info.grid, specs, partitioning, where, within)


def _claim(engine: Engine, info: StoreInfo) -> None:
    """Claim the store inside the transaction: a concurrent refresh fails here, without waiting.

    The store's row is read with a lock where the dialect has one (PostgreSQL:
    FOR UPDATE NOWAIT errors at once while another transaction holds it) and
    its version bumped (DuckDB: the update conflicts with another open one).  Each
    engine reports losing that race as TransactionConflict.  A version other than
    the one loaded means another refresh committed since.
    """
    where = sqlgen.equals_all({"store": info.name})
    try:
        got = engine.query(sqlgen.lock_rows_statement(STORES, where, ["version"], engine.target))
        if len(got["version"]) != 1 or int(got["version"][0]) != info.version:
            raise _busy(info.name)
        engine.execute(sqlgen.update_statement(
            STORES, {"version": info.version + 1}, sqlgen.equals_all({"store": info.name, "version": info.version})
        ))
    except TransactionConflict:
        raise _busy(info.name) from None


def _busy(store: str) -> StoreBusy:
    return StoreBusy(f"store {store} was changed by another refresh at the same time; nothing was changed by this one, run it again")


def require_transactions(engine: Engine) -> None:
    """Refuse engines without multi-statement transactions: a store must change all at once or not at all."""
    if not engine.target.transactions:
        raise StoreError(
            "the summary store needs multi-statement transactions (a refresh swaps cells, partitions and model "
            "together, or changes nothing), which Spark SQL does not have; keep the store in DuckDB or PostgreSQL "
            "(for Parquet files: tillite store build PATH --db store.duckdb)"
        )


def _resegment(
    engine: Engine, info: StoreInfo, settings: Settings, progress: ProgressFn, new_segment_shift: float,
    seeding: dict[str, Any] | None = None,
):
    specs = store_categories(info)
    cells_grid, keys, skipped = store_cells(engine, info.cells_table, info.grid, info.columns, specs)
    if cells_grid.m == 0:
        raise InputError(f"store {info.name} has no usable rows left")
    old = info.model
    init = np.asarray(old.centroids) if settings.k == old.k else None
    model, cells, std = _segment_cells(
        engine, cat.with_indicators(info.source, specs, engine.target), info.columns, cells_grid, keys, skipped, info.grid,
        settings, f"store {info.name}", init, progress, seeding, specs,
    )
    ids, next_id = match_segments(np.asarray(old.centroids), old.segment_ids(), np.asarray(model.centroids), info.next_id, np.where(std.sd > 0, std.sd, 1.0), new_segment_shift)
    model.ids = ids
    model.names = dict(old.names)  # names follow the ids, which a refresh keeps
    info.next_id = next_id
    if info.partition.files:
        model.source = old.source
    return model, cells, std


def _resegment_groups(
    engine: Engine, info: StoreInfo, settings: Settings, progress: ProgressFn, new_segment_shift: float, drift_threshold: float,
    report: RefreshReport | None = None, touched: set[str | None] | None = None,
) -> Model:
    """A --within store's model after its cells changed: ``touched`` groups (None: all) re-segmented, ids
    matched per group; what changed per group goes into ``report``."""
    done = store_groups.segment_groups(
        engine, info.source, info.columns, info.cells_table, info.grid, settings, info.model.within["type"], f"store {info.name}",
        progress, old=info.model, touched=touched, new_segment_shift=new_segment_shift, drift_threshold=drift_threshold,
    )
    if info.partition.files:
        done.model.source = info.model.source
    if report is not None:
        report.groups, report.drift, report.warnings = done.groups, done.drift, done.warnings
    return done.model


def _save_model(engine: Engine, info: StoreInfo, model: Model, settings: Settings | None = None) -> None:
    """The new model; and the settings when given, so an option given to one refresh (--k) is kept."""
    values: dict[str, object] = {"model": model.to_json(), "next_id": info.next_id, "refreshed_at": _now()}
    if settings is not None:
        values["settings"] = json.dumps(_settings_dict(settings))
    engine.execute(sqlgen.update_statement(STORES, values, sqlgen.equals_all({"store": info.name})))


def _relabel(engine: Engine, info: StoreInfo, model: Model) -> None:
    """Re-create the store's registered label views/tables with the current model."""
    for r in engine.query_rows(sqlgen.select_where(LABELS, sqlgen.equals_all({"store": info.name}))):
        if store_owns_label(engine, r["name"], info.name):  # never drops what it did not make: warns and skips
            label_relation(engine, info.source, model, r["name"], materialize=bool(r["materialized"]), replace=True,
                           in_transaction=True, store=info.name)


def resegment(engine: Engine, store: str, progress: ProgressFn = quiet_progress, new_segment_shift: float = 3.0) -> Model:
    """Re-segment from the stored cells without scanning the source (e.g. after subtract_rows)."""
    require_transactions(engine)
    info = load(engine, store)
    with engine.transaction():
        _claim(engine, info)
        settings = _settings_of(info.settings)
        if settings.within is not None:
            model = _resegment_groups(engine, info, settings, progress, new_segment_shift, drift_threshold=0.5)
        else:
            model, _, _ = _resegment(engine, info, settings, progress, new_segment_shift)
        _save_model(engine, info, model)
        _relabel(engine, info, model)
    return model


def drop(engine: Engine, store: str) -> list[str]:
    """Remove a store: its rows in the registry tables and its cells table, in one transaction.

    Returns the tables dropped.  Label views made with ``label`` stay (they read
    the source, not the store), unmarked to plain labels of tillite's (``_unmark_labels``)
    so that `tillite label --model` and the demo may replace them.  The registry tables themselves are dropped
    with the last store, so a database without stores holds no tillite_* table
    of the store's making.
    """
    require_transactions(engine)
    info = load(engine, store)
    dropped = [info.cells_table]
    with engine.transaction():
        _claim(engine, info)
        for st in _drop_store_statements(store, info.cells_table):
            engine.execute(st)
        _unmark_labels(engine, store)
        engine.execute(sqlgen.delete_statement(LABELS, sqlgen.equals_all({"store": store})))
        left = engine.query_rows(sqlgen.select_where(STORES, None, ["store"]))
        store_history.forget(engine, store, drop_table=not left)
        if not left:
            for table in (STORES, PARTS, LABELS):
                engine.execute(sqlgen.drop_statement(table, "table"))
            dropped += [STORES, PARTS, LABELS, store_history.HISTORY]
    return dropped


def registered_labels(engine: Engine, store: str) -> list[str]:
    """The label views/tables registered by ``store`` (re-created by its refreshes); none for an unknown store."""
    try:
        return [r["name"] for r in engine.query_rows(sqlgen.select_where(LABELS, sqlgen.equals_all({"store": store})))]
    except Exception:  # no registry table: drop says why in its own words
        return []


def _unmark_labels(engine: Engine, store: str) -> None:
    """The store's registered label views/tables that still carry its mark become plain labels of
    tillite's (no longer re-created by refreshes, replaced by `label` without --replace)."""
    for r in engine.query_rows(sqlgen.select_where(LABELS, sqlgen.equals_all({"store": store}))):
        kind = engine.relation_kind(r["name"])
        if kind is not None and store_of_comment(engine.relation_comment(r["name"])) == store:
            engine.execute(sqlgen.mark_statement(r["name"], kind, owner_comment(None), engine.target))


# ----------------------------------------------------------------------------- deltas, labels, status


def subtract_rows(engine: Engine, store: str, part: str, rows: np.ndarray) -> int:
    """Subtract deleted rows (original units, store column order) from a partition's cells.

    For users who stream deletes.  The partition's fingerprint is marked stale,
    so the next refresh re-verifies it with a scan.  Returns the cells touched.
    """
    require_transactions(engine)
    info = load(engine, store)
    if info.model.within:
        raise StoreError(f"store {store} keeps cells per group of {info.model.within['column']}, which rows of the segmenting "
                         "columns alone do not name; refresh the partition instead")
    if info.model.categorical:
        raise StoreError(f"store {store} keeps categorical columns, whose rows subtract_rows cannot take (numbers only); "
                         "refresh the partition instead")
    part = _part_key(engine, info, part)
    rows = np.asarray(rows, dtype=np.float64).reshape(-1, len(info.columns))
    rows = rows[np.isfinite(rows).all(axis=1)]
    if not len(rows):
        return 0
    keys = info.grid.keys_of(rows)
    uniq, inverse = np.unique(keys, axis=0, return_inverse=True)
    values = rows - np.asarray(info.grid.center)[None, :]
    if info.grid.sums_scaled:  # the cells hold sums of (x - center) * inv_scale
        values = values * np.asarray(info.grid.inv_scale)[None, :]
    delta = F.from_groups(values, inverse.ravel(), len(uniq))
    names = info.grid.key_names()
    d = len(info.columns)
    with engine.transaction():
        _claim(engine, info)
        for i in range(len(uniq)):
            where = sqlgen.equals_all({"part": part, **{k: float(v) for k, v in zip(names, uniq[i])}})
            got = result_rows(engine.query(sqlgen.select_where(info.cells_table, where)))
            if not got or got[0]["n"] < delta.n[i]:
                raise StoreError(f"partition {part} of store {store} does not hold the rows being subtracted")
            cur = got[0]
            values = {"n": int(cur["n"] - delta.n[i])}
            values.update({f"ls{j}": float(cur[f"ls{j}"] - delta.ls[i, j]) for j in range(d)})
            values.update({f"ss{j}": float(cur[f"ss{j}"] - delta.ss[i, j]) for j in range(d)})
            engine.execute(sqlgen.update_statement(info.cells_table, values, where))
        engine.execute(sqlgen.delete_statement(info.cells_table, sqlgen.equals_all({"n": 0})))
        engine.execute(sqlgen.update_statement(PARTS, {"fingerprint": "delta applied"}, sqlgen.equals_all({"store": store, "part": part})))
    return len(uniq)


def _part_key(engine: Engine, info: StoreInfo, part: str) -> str:
    """A partition's key from its key or its shown name (``part_label``); refuses an unknown or ambiguous one."""
    stored = _stored_fingerprints(engine, info.name)
    if part in stored:
        return part
    found = [k for k, fp in stored.items() if part_label(fp.values, info.partition.columns, k) == part]
    if len(found) != 1:
        raise StoreError(f"partition {part} {'is ambiguous' if found else 'not found'} in store {info.name}")
    return found[0]


def label(engine: Engine, store: str, into: str, materialize: bool = False, replace: bool = False) -> str:
    """Labels from the store's current model, re-created by every refresh."""
    info = load(engine, store)
    into = into_name(into)  # registered as every later refresh splits it again
    made = label_relation(engine, info.source, info.model, into, materialize=materialize, replace=replace, store=store)
    with engine.transaction():
        engine.execute(sqlgen.delete_statement(LABELS, sqlgen.equals_all({"store": store, "name": into})))
        engine.execute(sqlgen.insert_values_statement(LABELS, [(store, into, materialize)]))
    return made


def _last_refresh(engine: Engine, store: str, info: StoreInfo) -> dict[str, Any]:
    """When the store was last refreshed (one that found no change included, from its history), and whether
    that refresh found anything new, changed or vanished (None when unknown)."""
    rows = [r for r in store_history.history(engine, store) if r["event"] == "refresh"]
    if not rows:
        return {"last_refresh": info.refreshed_at or None, "last_refresh_found_change": None}
    last = rows[-1]
    return {"last_refresh": last["at"][:19], "last_refresh_found_change": bool(last["new"] or last["changed"] or last["vanished"])}


def status(engine: Engine, store: str, outside_warn: float = 0.01) -> dict[str, Any]:
    """Partitions, rows, when summarised, the grid in use, and rows outside the built key range."""
    check_refresh_options(outside_warn=outside_warn)
    info = load(engine, store)
    parts = engine.query_rows(sqlgen.select_where(PARTS, sqlgen.equals_all({"store": store})))
    specs = store_categories(info)
    cells_grid, keys, skipped = store_cells(engine, info.cells_table, info.grid, info.columns, specs)
    keys = _range_keys(keys, specs)
    lo, hi = info.key_range
    outside = ((keys < lo[None, :]) | (keys > hi[None, :])).any(axis=1) if len(keys) else np.zeros(0, bool)
    usable = float(cells_grid.n.sum())
    share = float(cells_grid.n[outside].sum() / usable) if usable else 0.0
    warnings_ = []
    if share > outside_warn:
        warnings_.append(
            f"{100 * share:.1f}% of rows fall outside the grid's built range (over {100 * outside_warn:.1f}%): "
            "consider rebuilding the grid (--regrid)"
        )
    return {
        "store": store,
        "source": info.source.label,
        "columns": info.columns,
        **({"categorical": [{"column": sp.column, "categories": list(sp.values), "indicators": list(sp.names)} for sp in specs]}
           if specs else {}),
        "partition_by": info.partition.to_dict(),
        "partitions": len(parts),
        "rows": int(sum(p["rows"] for p in parts)),
        "usable_rows": int(usable),
        "skipped_rows": skipped,
        "cells": int(cells_grid.m) if not info.model.within else store_groups.cell_pairs(
            engine, info.cells_table, info.grid, len(info.columns), info.model.within["column"]),
        "cells_counted": "grid cells" if not info.model.within else store_groups.CELLS_COUNTED,
        "grid": {**info.grid.to_dict(), "axes_count": info.grid.dims},
        "outside_share": share,
        "built_at": info.built_at,
        "refreshed_at": info.refreshed_at,
        **_last_refresh(engine, store, info),
        "last_summarised": max((p["summarised_at"] for p in parts), default=None),
        "k": info.model.k,
        "settings": info.settings,
        "cells_table": info.cells_table,
        "tables": store_tables(engine, store),  # the list `store build` prints
        "segment_ids": info.model.segment_ids(),
        **store_groups.status_fields(info.model),
        "warnings": warnings_,
        "partition_list": [
            {"part": part_label(json.loads(p["part_values"]), info.partition.columns, p["part"]), "rows": p["rows"], "summarised_at": p["summarised_at"]}
            for p in parts
        ],
    }
