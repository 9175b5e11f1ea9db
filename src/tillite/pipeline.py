"""One `segment` run and one `label` run, composed from the stages in ``stages``.

profile (SQL, sample) -> cell pass (SQL, one GROUP BY) -> second phase (numpy,
on cell CFs) -> refine passes (SQL, one GROUP BY segment each) -> model.
Only samples of bounded size and CFs ever come back to Python.  The stages
themselves live in ``stages``; their names are re-exported here so older
imports keep working (new code imports them from ``stages``).
"""

from __future__ import annotations

import functools
import hashlib
import os
import tempfile
import time
import warnings
from dataclasses import replace
from typing import Any, Callable, Sequence

import numpy as np

from . import categorical as cat
from . import sqlgen
from .engines import Engine, file_reader_for
from .errors import InputError, ParameterError
from .model import Model, usual_file_mode
from .outputs import is_input
# re-exported: store.py and older callers import these from here
from .settings import (  # noqa: F401
    MAX_SEED, MAX_WEIGHT, SETTING_CHOICES, SETTING_RANGES, Settings, check_range, check_refresh_options,
)
from .sqlgen import Source
from .stages import (  # noqa: F401  (re-exported: the stages' old import path)
    CONSTANT_ULPS, DENSITY_ROWS_PER_CELL, K_LIMIT_CELLS, K_LIMIT_FLOOR, WIDTH_SEARCH_ROWS,
    CellBoxes, CellPass, PhaseResult, Profile, ProgressFn, RefinedPhase, RefineResult, SegmentStats, Standardisation,
    attach_phase, canonical_sample, cell_target, cells_from_result, cf_from_result, check_columns, check_k_fits, check_k_limit,
    choose_width, constant_columns, engine_has_rows, fetch_matrix, grid_axes, grid_for_profile, k_limit, make_model,
    nothing_to_segment_on, null_mask, order_by_size, quiet_progress, refine_loop, refine_passes, refine_phase, robust_mean_sd,
    run_cell_pass, run_profile, run_refine_pass, run_second_phase, second_phase, size_order, standardise_cells,
    temporary_cell_map, resolve_names, check_model_columns,
    # categorical columns
    CODE_SPACING, categorical_source, code_assignment, indicator_weights, grid_with_category_codes, model_source, run_cell_pass_with_codes,
    run_refine_pass_with_codes,
)
from .stages import axes_text

__all__ = [
    "Settings",
    "Profile",
    "CellPass",
    "segment",
    "label",
    "check_columns",
    "cells_from_result",
    "run_profile",
    "run_cell_pass",
    "choose_width",
    "grid_for_profile",
    "ProgressFn",
    "InputError",
    "ParameterError",
]

def segment(
    engine: Engine,
    source: Source,
    columns: Sequence[str],
    settings: Settings,
    progress: ProgressFn = quiet_progress,
) -> Model:
    """Segment the source's rows on the columns; returns the model (nothing is written).

    ``settings.within``: a column whose groups are segmented separately (``within.segment_within``).
    ``columns`` is a list of names (a single string is refused, not read letter by letter); the table and
    every column named are taken as the engine resolves them (``stages.resolve_names``: ``LITRES`` is
    litres in DuckDB), and the model records their own names.
    """
    source, columns, settings = resolve_names(engine, source, columns, settings)
    if settings.within is not None:
        from .segmenters import one_blas_thread
        from .within import segment_within

        with one_blas_thread():  # entered once for every group's k-means, not once per group (1.5 ms each)
            return segment_within(engine, source, columns, settings, progress)
    columns = list(columns)
    settings.check(columns)
    t_start = time.perf_counter()
    specs: list[cat.CategoricalColumn] = []
    if settings.categorical:
        if settings.method == "density":
            raise ParameterError("{categorical} columns work with {method} kmeans or ward, not density", "categorical", "method")
        settings = replace(settings, keep_outliers=True)  # no outlier group: cells are keyed by category codes too
        source, specs, cat_prof = categorical_source(engine, source, columns, settings)
        columns = columns + [n for s in specs for n in s.names]
    else:
        check_columns(engine, source, columns)
    weights = indicator_weights(settings, columns, specs)
    groups = cat.indicator_positions(columns, specs)

    # 1. profile on a sample, and the grid from it
    t0 = time.perf_counter()
    if specs:
        prof = cat_prof
        t0 -= cat_prof.seconds  # the profile sample was taken with the categories
        grid = grid_with_category_codes(prof, settings, weights, groups)
    else:
        prof = run_profile(engine, source, columns, settings)
        grid = grid_for_profile(prof, settings, weights)
    prof.seconds = time.perf_counter() - t0
    progress("profile", f"{prof.rows:,} rows, sample of {len(prof.sample):,}, grid width {grid.width:.3g} on {axes_text(grid.dims)}, {prof.seconds:.2f} s")

    # 2. cell pass, and the exact standardisation from its CFs
    if specs:
        cp = run_cell_pass_with_codes(engine, source, columns, grid, groups, cat.code_names(specs))
    else:
        cp = run_cell_pass(engine, source, columns, grid)
    if cp.usable == 0:
        raise InputError(
            f"no usable rows in {source.label}: all {cp.skipped:,} rows have a NULL, NaN or infinite value in {', '.join(columns)}"
        )
    progress("cells", f"{cp.usable + cp.skipped:,} rows ({cp.skipped:,} skipped) -> {cells_count(cp):,} cells, {cp.seconds:.2f} s")
    cells, std = standardise_cells(cp.cells, grid, columns, settings, weights, groups)

    # 3. second phase on the cells (condensed by a CF tree when there are too many)
    t0 = time.perf_counter()
    phase = run_second_phase(cells, cp.keys, settings, std.weights, source.label, progress)
    t_second = time.perf_counter() - t0
    progress("second phase", f"{phase.summary}, {t_second:.2f} s")

    # 4. refine passes in SQL (not for density segments: they would undo the shapes)
    refined = refine_phase(engine, source, columns, cells, cp.keys, grid, std, phase, settings, progress, cp.usable,
                           codes=(groups, cat.code_names(specs)) if specs else None)
    model = make_model(
        columns, std, grid, refined.stats, settings, source, cp.usable + cp.skipped, cp.skipped,
        cells_count(cp), extra_params={"cell_sse": phase.sse, "sample_repeats": prof.repeats,
                                      "sizes_from": "cells" if settings.method != "density" and not refined.passes else "labels",
                                      **phase.params},
    )
    attach_phase(model, settings.method, phase, refined, grid, cp.keys)
    model.categorical = [s.to_dict() for s in specs]
    model.report_map = model_map(cp, model)
    model.timings = {"profile": prof.seconds, "cells": cp.seconds, "second_phase": t_second, **refined.timings}
    model.timings["total"] = time.perf_counter() - t_start
    return model


def model_map(cp: CellPass, model: Model) -> dict:
    """The report's map from the cells in hand (so `tillite report` needs no cell pass): a few thousand dots.

    A map that cannot be drawn (degenerate cells) is left out: the report then makes one cell pass."""
    from .report import stored_map
    from .segmenters import one_blas_thread

    try:  # one BLAS thread: the covariance of 10,000 cells x 25 columns took 1.4 s with OpenBLAS's threads here
        with np.errstate(all="ignore"), one_blas_thread():
            return stored_map(cp.cells, cp.keys, model)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError):
        return {}


def cells_count(cp: CellPass) -> int:
    return int((cp.cells.n > 0).sum())


# ----------------------------------------------------------------------------- label


def _holding_cell_map(label_fn: Callable[..., str]) -> Callable[..., str]:
    """Labels written once (a table, a file) join the cell map as a temporary relation, dropped afterwards.

    A view outlives the session: it reads its own map table (``cell_map_table``), filled from the
    temporary relation (or from an inline VALUES list where the engine holds none).
    """

    @functools.wraps(label_fn)
    def wrapper(engine: Engine, source: Source, model: Model, into: str, materialize: bool = False, *args: Any, **kw: Any) -> str:
        cell_map = None if model.within else model.cell_map_spec()
        with temporary_cell_map(engine, cell_map) as held:
            if held is not None and held.table is not None:
                model = replace(model, cell_map={**model.cell_map, "table": held.table})
            return label_fn(engine, source, model, into, materialize, *args, **kw)

    return wrapper


@_holding_cell_map
def label(
    engine: Engine,
    source: Source,
    model: Model,
    into: str,
    materialize: bool = False,
    replace: bool = False,
    in_transaction: bool = False,
    store: str | None = None,
) -> str:
    """Create the labels view (or table, or file for file sources); returns what was made.

    The source is only ever read.  Every view or table made here carries
    tillite's mark (a comment, see ``owner_comment``).  An existing relation of
    that name is replaced without ``replace`` only when it is a view tillite
    made, and not another store's labels; anything else (a table, a view or
    table someone else made) needs ``replace``.  ``store``: the summary store
    whose labels these are.  ``in_transaction``: the caller already holds a
    transaction (a store refresh).
    """
    into = into_name(into, files=bool(source.files))
    check_model_columns(engine, source, model)
    source = model_source(engine, source, model)
    source_columns = [c for c in check_columns(engine, source, model.columns, chosen=False) if c not in source.derived_names()]
    check_label_columns(engine, source, source_columns, model)
    if model.within:  # segments within groups: the centroid set chosen by each row's group
        from .within import label_within_select

        cat.check_sql_type(model.within["type"], f"the --within column {model.within['column']}")

        select = label_within_select(engine, source, model, source_columns, materialize or bool(source.files))
    else:
        columns, assign, lookups = list(model.columns), model.assignment(), []
        specs = cat.specs_of(model.categorical)
        if specs:
            columns, assign, lookups = code_assignment(columns, assign, cat.indicator_positions(columns, specs), cat.code_names(specs))
        select = sqlgen.label_select(
            source, columns, source_columns, assign, engine.target, cell_map=label_cell_map(model, into, materialize, source),
            materialize=materialize or bool(source.files), lookups=lookups,
        )
    if model.names and not model.within:  # a segment_name column once segments are named (`tillite name`)
        select = sqlgen.segment_names_column(select, "segment", {int(k): v for k, v in model.names.items()})
    elif model.within and any(g.get("names") for g in model.within["groups"]):  # named per group (`name --group`)
        from .within_sql import group_segment_names_column

        select = group_segment_names_column(
            select, model.within["column"], model.within["type"], "segment",
            [(g["value"], {int(k): v for k, v in g["names"].items()}) for g in model.within["groups"] if g.get("names")],
            engine.target)
    if source.files:
        return _label_to_file(engine, source, select, into, replace)
    target = tuple(p.lower() for p in sqlgen.split_table_name(into))
    table = tuple(p.lower() for p in source.table)
    same_schema = len(target) == 1 or len(table) == 1 or target[-2] == table[-2]
    if target[-1] == table[-1] and same_schema:
        raise InputError(f"--into {into} is the source table; labels never overwrite the source")
    refuse_own_table(into)
    check_into_schema(engine, into)
    kind = existing_relation_kind(engine, into)
    comment = engine.relation_comment(into) if kind is not None else None
    if kind is not None and not replace:
        check_may_replace(into, kind, comment, store)
    made = "table" if materialize else "view"
    map_statements = [] if model.within else cell_map_statements(
        engine, into, label_cell_map(model, into, materialize, source), model.cell_map_spec())
    statements = [
        *map_statements,
        sqlgen.create_relation_statement(into, select, materialize),
        sqlgen.mark_statement(into, made, owner_comment(store), engine.target),
    ]
    # no engine but DuckDB has CREATE OR REPLACE TABLE, and PostgreSQL replaces a view only by one
    # with the same leading columns: anything but a view of ours is dropped first, in the same transaction;
    # so is a view whose cell map table is dropped or made (PostgreSQL drops no table a view reads)
    if kind == "table" or kind == "view" and (materialize or not is_owned(comment) or map_statements):
        statements.insert(0, sqlgen.drop_statement(into, kind))
    if in_transaction:
        for st in statements:
            engine.execute(st)
    else:
        engine.run_in_transaction(statements)
    return f"{made} {into}"


#: Names of the columns the labels add to the source's (``segment_name`` only once segments are named).
LABEL_COLUMNS = ("segment", "distance")
NAME_COLUMN = "segment_name"


def looks_like_file(into: str) -> bool:
    """Whether --into names a file (a path, or a .parquet/.csv name) rather than a view or table."""
    return "/" in into or "\\" in into or into.lower().endswith((".parquet", ".csv"))


def into_name(into: str, files: bool = False) -> str:
    """--into as the labels take it: for a database source a view or table name, read exactly as --table
    is (``sqlgen.split_table_name``: a part in double quotes may hold a dot, its quotes are not part of
    the name), returned in the one form every later step splits again (``sqlgen.join_table_name``).
    ``files``: the source is files, whose labels go to a file (checked by ``_label_to_file``)."""
    if files:
        return into
    if looks_like_file(into):
        raise ParameterError(f"{{into}} {into} is a file, but only Parquet/CSV sources label to files; the labels of a "
                             "database table go to a view or table in that database (name one with {into})", "into")
    try:
        parts = sqlgen.split_table_name(into)
    except ValueError:
        raise ParameterError(f"{{into}} {into} has an unclosed double quote; write a name holding a dot as \"my.view\"",
                             "into") from None
    if not all(p.strip() for p in parts):
        raise ParameterError(f"{{into}} {into!r} is not a view or table name", "into")
    return sqlgen.join_table_name(parts)


def check_label_columns(engine: Engine, source: Source, source_columns: Sequence[str], model: Model) -> None:
    """Refuse (one line) a source already holding a column the labels add: the label view would hold two
    columns of one name (DuckDB renames ours, PostgreSQL refuses), so `segment` would read the source's."""
    named = bool(model.names) or bool(model.within and any(g.get("names") for g in model.within["groups"]))
    added = [*LABEL_COLUMNS, *([NAME_COLUMN] if named else [])]
    clash = [c for c in added if any(engine.target.same_name(c, have) for have in source_columns)]
    if clash:
        raise InputError(
            f"{source.label} already has {'a column' if len(clash) == 1 else 'columns'} {', '.join(clash)}, named as the "
            f"columns the labels add ({', '.join(added)}); label a view of {source.label} that renames or leaves out "
            f"{'that column' if len(clash) == 1 else 'those columns'}"
        )


#: A label view whose rows are labelled through their grid cell (an outlier group, density segments) reads
#: its cell map from a table beside it, named with this prefix (see ``cell_map_table``).
CELL_MAP_PREFIX = "tillite_cellmap_"


def cell_map_table(into: str) -> str:
    """The table holding the cell map of the label view ``into``: tillite_cellmap_<view>, in the view's schema.

    A view name too long for PostgreSQL's 63-byte identifiers is shortened and a hash of it appended."""
    *schema, name = sqlgen.split_table_name(into)
    own = f"{CELL_MAP_PREFIX}{name}"
    if len(own.encode()) > 63:
        head = name.encode()[:24].decode(errors="ignore")
        own = f"{CELL_MAP_PREFIX}{head}_{hashlib.sha256(name.encode()).hexdigest()[:12]}"
    return sqlgen.join_table_name([*schema, own])


def label_cell_map(model: Model, into: str, materialize: bool, source: Source) -> sqlgen.CellMap | None:
    """The model's cell map as the labels read it: for a view, from its own table (``cell_map_table``),
    joined once per row rather than an inline VALUES list of thousands of rows evaluated per row.
    Tables and files join it held as a temporary relation (``_holding_cell_map``) or inline."""
    cell_map = model.cell_map_spec()
    if cell_map is None or materialize or source.files:
        return cell_map
    return replace(cell_map, table=cell_map_table(into))


def cell_map_statements(
    engine: Engine, into: str, cell_map: sqlgen.CellMap | None, fill: sqlgen.CellMap | None = None,
) -> list[sqlgen.exp.Expression]:
    """Drop the cell map table of the labels ``into`` that tillite made before, and make the view's new one
    (``cell_map``, read from its table) from ``fill``: the map held as a temporary relation, or inline.

    Nothing when no map table is needed and none of ours exists.  A relation of that name tillite did not
    make is never dropped: left alone when no map is needed, one error line naming --into when one is."""
    table = cell_map_table(into)
    kind = existing_relation_kind(engine, table)
    if kind is not None and not is_owned(engine.relation_comment(table)):
        if cell_map is None or cell_map.table != table:
            return []
        raise ParameterError(
            f"{{into}} {into}: its labels keep their cell map in the table {table}, but a {kind} of that name "
            "exists that tillite did not make; drop or rename it, or choose another {into}", "into",
        )
    out = [sqlgen.drop_statement(table, kind)] if kind is not None else []
    if cell_map is not None and cell_map.table == table:
        out += [
            sqlgen.create_relation_statement(table, (fill or replace(cell_map, table=None)).table_select(), materialize=True),
            sqlgen.mark_statement(table, "table", f"{OWNED_MARK}: cell map of labels {into}", engine.target),
        ]
    return out


OWNED_MARK = sqlgen.OWNED_MARK
_STORE_MARK = f"{OWNED_MARK}: labels of store "


def owner_comment(store: str | None = None) -> str:
    """The comment on labels tillite made (for a summary store: naming the store)."""
    return f"{_STORE_MARK}{store}" if store is not None else f"{OWNED_MARK}: labels"


def is_owned(comment: str | None) -> bool:
    """Whether a relation's comment is tillite's mark."""
    return comment is not None and comment.startswith(OWNED_MARK)


def store_of_comment(comment: str | None) -> str | None:
    """The summary store whose labels a relation with this comment holds, if any."""
    return comment[len(_STORE_MARK):] if comment is not None and comment.startswith(_STORE_MARK) else None


def check_into_schema(engine: Engine, into: str) -> None:
    """A schema.name --into whose schema does not exist: said naming --into, before any database error
    (targets whose information_schema.schemata lists them; Spark's catalog answers for itself)."""
    parts = sqlgen.split_table_name(into)
    if len(parts) > 3:
        raise ParameterError(f"{{into}} {into} has {len(parts)} parts; give name, schema.name or database.schema.name", "into")
    if len(parts) == 1 or not engine.target.lists_schemata:
        return
    catalog = parts[0] if len(parts) == 3 else None
    got = engine.query(sqlgen.schema_count_statement(parts[-2], fold_case=engine.target.folds_schema_names, catalog=catalog))
    if not int(got["n"][0]):
        where = f"schema {parts[1]} of database {parts[0]}" if catalog is not None else f"schema {parts[0]}"
        raise ParameterError(f"{{into}} {into}: {where} does not exist; create it first or choose another {{into}}",
                             "into")


def check_may_replace(into: str, kind: str, comment: str | None, store: str | None = None) -> None:
    """Refuse (one line) to replace an existing view/table (with this comment) unless it is ours to replace."""
    if not is_owned(comment):
        raise ParameterError(f"a {kind} named {into} already exists and was not made by tillite; {{replace}} overwrites it",
                             "replace", spelled=REPLACE_SPELLED)
    holder = store_of_comment(comment)
    if holder is not None and holder != store:
        raise ParameterError(
            f"{kind} {into} holds the labels of store {holder}, re-created by every refresh; "
            f"label with --store {holder}, or choose another --into ({{replace}} takes it over)",
            "replace", spelled=REPLACE_SPELLED,
        )
    if kind == "table":
        raise ParameterError(f"a table named {into} already exists; {{replace}} overwrites it", "replace", spelled=REPLACE_SPELLED)


#: How an API message spells the flag that allows replacing (the CLI says --replace, or its own option).
REPLACE_SPELLED = {"replace": "replace=True"}


def store_owns_label(engine: Engine, name: str, store: str) -> bool:
    """Whether a refresh of ``store`` may re-create its registered label ``name``; warns when not.

    True when nothing of that name exists or it carries this store's mark.  A
    relation someone else made (or took over with --replace) is never dropped.
    """
    kind = existing_relation_kind(engine, name)
    if kind is None or store_of_comment(engine.relation_comment(name)) == store:
        return True
    warnings.warn(
        f"{kind} {name} is no longer store {store}'s labels (replaced by something else); not re-created. "
        f"Drop it and run `tillite label --store {store} --into {name}` to have it refreshed again",
        UserWarning, stacklevel=2,
    )
    return False


#: Every table tillite keeps for itself (store registry and cells, macro registry) starts with this.
OWN_TABLE_PREFIX = "tillite_"


def refuse_own_table(into: str) -> None:
    """Labels never go into a table of tillite's own naming (tillite_stores, tillite_cells_*, ...), whatever the flags."""
    if sqlgen.split_table_name(into)[-1].lower().startswith(OWN_TABLE_PREFIX):
        raise InputError(
            f"--into {into}: names starting with {OWN_TABLE_PREFIX} are kept for tillite's own tables "
            "(store registry, cells, macro registry); choose another name"
        )


def _label_to_file(engine: Engine, source: Source, select, into: str, replace: bool) -> str:
    """COPY the labels of a file source to a Parquet/CSV file, atomically.

    Refuses a target that is (or matches) a source file, and an existing file
    unless ``replace``; the COPY goes to a temporary name first, so a failure
    leaves any existing file as it was.
    """
    fmt = file_reader_for(into)
    if fmt not in ("parquet", "csv"):
        raise InputError(f"labels of files go to a .parquet or .csv file; {into!r} is neither")
    target = os.path.realpath(into)
    if any(is_input(into, pattern) for pattern in source.files):
        raise InputError(f"--into {into} is a source file; labels never overwrite the source")
    if os.path.exists(into) and not replace:
        raise ParameterError(f"file {into} already exists; pass {{replace}} to overwrite it", "replace", spelled=REPLACE_SPELLED)
    folder = os.path.dirname(target)
    if not os.path.isdir(folder):
        raise InputError(f"folder {folder} for --into {into} does not exist")
    fd, tmp = tempfile.mkstemp(prefix=".tillite-", suffix=os.path.splitext(into)[1], dir=folder)
    os.close(fd)
    try:
        engine.execute(sqlgen.copy_statement(select, tmp, fmt))
        os.chmod(tmp, usual_file_mode())  # the writer may keep mkstemp's 0600; colleagues read label files
        os.replace(tmp, into)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return f"file {into}"


def existing_relation_kind(engine: Engine, name: str) -> str | None:
    """'table', 'view' or None for a (possibly schema-qualified) name.

    Each engine answers in its own way: DuckDB and PostgreSQL through
    information_schema (case-insensitive in DuckDB; in PostgreSQL case as
    written, unqualified names in current_schema()), Spark through its catalog.
    """
    return engine.relation_kind(name)
