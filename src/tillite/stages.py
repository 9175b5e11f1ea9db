"""The stages of a run, as a public API that ``pipeline.segment``, the summary store and the CLI compose.

check columns -> profile (SQL, sample) -> grid -> cell pass (SQL, one GROUP BY)
-> standardise (exact, from the cell CFs) -> second phase (numpy, on cell CFs)
-> refine passes (SQL, one GROUP BY segment each) -> make model.
Only samples of bounded size and CFs ever come back to Python.
"""

from __future__ import annotations

import math
import time
import uuid
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any, Callable, Iterator, Sequence, TypeVar

import numpy as np

from . import categorical as cat
from . import features as F
from . import sqlgen
from .engines import Engine, SourceError, is_numeric_type
from .errors import ColumnTypeError, InputError, ParameterError
from .features import CF
from .model import Model
from .segmenters import WARD_ENTRIES, KMeansResult, kmeans
from .sqlgen import Assignment, Grid, Source

if TYPE_CHECKING:
    from sqlglot import exp

    from .settings import Settings

#: What a run tells its caller as it goes: (stage, message).
ProgressFn = Callable[[str, str], None]


def quiet_progress(stage: str, message: str) -> None:
    """A ProgressFn that says nothing (the API's default)."""
    return None


# ----------------------------------------------------------------------------- checks


def columns_there(described: Sequence[tuple[str, str]], source: Source | None = None) -> str:
    """A source's columns with their types, as error lines list them: "a (DOUBLE), district (VARCHAR)";
    without the columns tillite derives on the way (``source``'s indicators and category codes)."""
    hidden = set(source.derived_names()) if source is not None else set()
    return ", ".join(f"{n} ({t})" for n, t in described if n not in hidden)


def check_columns(engine: Engine, source: Source, columns: Sequence[str], chosen: bool = True) -> list[str]:
    """All source columns, after checking the chosen ones exist and are numeric.

    ``chosen``: the columns were chosen to segment on (a column that is not a number is then said with a
    hint to give it as a categorical column); False for the columns of a model or a labels table."""
    check_column_list(columns)
    if not columns:
        raise InputError("no columns given to segment on")
    dupes = sorted({c for c in columns if list(columns).count(c) > 1})
    if dupes:
        raise InputError(f"columns given more than once: {', '.join(dupes)}")
    described = engine.describe(source)
    types = dict(described)
    missing = [c for c in columns if c not in types]
    if missing:
        raise SourceError(f"{'column' if len(missing) == 1 else 'columns'} {', '.join(missing)} not found in {source.label}; "
                          f"columns there: {columns_there(described, source)}")
    for c in columns:
        if not is_numeric_type(types[c]) and source.files and not engine_has_rows(engine, source):
            raise InputError(f"{source.label} has no rows (a header only?)")
        if not is_numeric_type(types[c]) and chosen:
            raise ColumnTypeError(f"column {c} of {source.label} has type {types[c]}, not a number: choose numeric {{columns}}, "
                                 f"or give it as {{categorical}} {c} to segment on its categories", "columns", "categorical")
        if not is_numeric_type(types[c]):
            raise SourceError(f"column {c} of {source.label} has type {types[c]}, not a number; choose numeric columns")
    return [n for n, _ in described]


def check_column_list(columns: Any, parameter: str = "columns") -> None:
    """The API's column list must be a list of names: a single string would read as one column per letter."""
    if isinstance(columns, str):
        raise ParameterError(f"{{{parameter}}} must be a list of column names, e.g. [{columns!r}], not the text {columns!r}",
                             parameter)


def resolve_table(engine: Engine, source: Source) -> Source:
    """A table source under the table's own name as the engine resolves it (``--table METER_DAYS`` is
    meter_days in DuckDB), so a model records the name the table has; unchanged when the name is exact,
    not found, or matches several tables (the read that follows says so)."""
    if not source.table or len(source.table) > 2:
        return source
    n, target = len(source.table), engine.target
    listed = {sqlgen.split_table_name(t) for t in engine.tables()}
    if source.table in listed:
        return source

    def matches(candidates: set[tuple[str, ...]]) -> set[tuple[str, ...]]:
        return {t for t in candidates if all(target.resolve_name(g, [a]) is not None for g, a in zip(source.table, t))}

    # a name as listed (DuckDB's main and PostgreSQL's public tables unqualified), else one in the listing's
    # only schema (Spark lists the current database's tables as database.table)
    found = matches({t for t in listed if len(t) == n}) or matches({t[-1:] for t in listed if n == 1 and len(t) == 2})
    return replace(source, table=found.pop()) if len(found) == 1 else source


def resolve_columns(engine: Engine, source: Source, names: Sequence[str]) -> list[str]:
    """Column names typed by a person, each as the engine resolves it against the source's columns
    (``Target.resolve_name``: DuckDB and Spark ignore case, PostgreSQL folds an unquoted name to lower
    case); a name matching none is kept as given, for the checks that follow to name it."""
    present = [n for n, _ in engine.describe(source)]
    return [engine.target.resolve_name(c, present) or c for c in names]


def resolve_names(engine: Engine, source: Source, columns: Sequence[str], settings: Settings) -> tuple[Source, list[str], Settings]:
    """The table and every column a run names (``columns``, ``categorical``, ``within``, the ``weights``' keys) as
    the engine resolves them, so the model records the table's and columns' own names."""
    check_column_list(columns)
    check_column_list(settings.categorical, "categorical")
    source = resolve_table(engine, source)
    named = [*columns, *settings.categorical, *([settings.within] if settings.within else []), *settings.weights]
    if not named:
        return source, list(columns), settings
    actual = dict(zip(named, resolve_columns(engine, source, named)))
    settings = replace(
        settings, categorical=tuple(actual[c] for c in settings.categorical),
        within=actual[settings.within] if settings.within else settings.within,
        weights={actual[c]: w for c, w in settings.weights.items()},
    )
    return source, [actual[c] for c in columns], settings


def engine_has_rows(engine: Engine, source: Source) -> bool:
    return int(engine.query(sqlgen.count_statement(source))["n"][0]) > 0


# ----------------------------------------------------------------------------- profile


@dataclass
class Profile:
    rows: int
    sample: np.ndarray  # usable sampled rows, original units (bounded size)
    center: np.ndarray
    scale: np.ndarray  # of the grid (sample sd, or 1 for scaling none)
    seconds: float
    repeats: str = "yes"  # whether the same data and seed give the same sample ("yes", "no", or the condition)


def fetch_matrix(engine: Engine, statement, d: int) -> np.ndarray:
    got = engine.query(statement)
    cols = [np.asarray(got[sqlgen.internal(f"x{j}")], dtype=np.float64) for j in range(d)]
    return np.column_stack(cols) if cols and len(cols[0]) else np.zeros((0, d))


def run_profile(engine: Engine, source: Source, columns: Sequence[str], settings: Settings) -> Profile:
    """Row count and a bounded sample of usable rows, with its centre and scale.

    The sample follows ``settings.seed``: a seeded ``TABLESAMPLE ... REPEATABLE``
    (DuckDB: BERNOULLI, since its SYSTEM sample changes with the threads; from a
    large base table, SYSTEM then BERNOULLI on one thread, ``block_sample_pays``), no
    LIMIT in SQL, and the rows put in a fixed order before anything uses them,
    so the same data and seed give the same grid (``sample_repeats`` says where
    an engine cannot promise that).
    """
    t0 = time.perf_counter()
    rows = count_rows(engine, source)
    d = len(columns)
    target = settings.sample_rows
    if profile_sample_kind(engine, source, rows, settings) == "block":
        sample = _block_sample(engine, source, columns, 150.0 * target / rows, settings.seed, 4 * target)
    else:
        sample = seeded_sample(
            engine, rows, settings,
            lambda **kw: fetch_matrix(engine, sqlgen.sample_statement(source, columns, engine.target, **kw), d), len,
        )
    sample = canonical_sample(sample, target, settings.seed)
    center, scale = center_and_scale(sample, settings.scaling, columns)
    repeats = sample_promise(engine, rows, settings)
    return Profile(rows=rows, sample=sample, center=center, scale=scale, seconds=time.perf_counter() - t0, repeats=repeats)


def profile_sample_kind(engine: Engine | None, source: Source, rows: int, settings: Settings) -> str:
    """How the profile samples ``rows`` rows: "whole" (at most twice the sample), "block" (DuckDB's two-stage
    block sample, ``block_sample_pays``) or "seeded" (the engine's TABLESAMPLE, ``seeded_sample``)."""
    target = settings.sample_rows
    if rows <= 2 * target:
        return "whole"
    if engine is not None and block_sample_pays(engine, source, min(100.0, 150.0 * target / rows)):
        return "block"
    return "seeded"


def profile_statements(engine: Engine | None, source: Source, columns: Sequence[str], settings: Settings,
                       target: Any, rows: int | None = None) -> list[exp.Expression]:
    """The statements ``run_profile`` runs, for `tillite sql --stage profile`: the row count, then the sample
    that ``rows`` rows (counted through ``engine`` when not given) call for, with the same seed and size.

    Not shown: the BERNOULLI statement ``seeded_sample`` runs after a TABLESAMPLE that brought back under a
    tenth of the sample, and the single thread DuckDB's block sample runs on.
    """
    rows = count_rows(engine, source) if rows is None else rows
    n = settings.sample_rows
    count = sqlgen.count_statement(source)
    same = engine is not None and sqlgen.target_for(target).name == engine.target.name  # else no DuckDB block sample
    kind = profile_sample_kind(engine if same else None, source, rows, settings)
    if kind == "whole":
        return [count, sqlgen.sample_statement(source, columns, target)]
    if kind == "block":
        return [count, sqlgen.block_sample_statement(source, columns, 150.0 * n / rows, settings.seed, limit=4 * n)]
    first = sqlgen.target_for(target).first_sample_method
    return [count, sqlgen.sample_statement(source, columns, target, percent=min(100.0, 150.0 * n / rows), method=first,
                                           limit=4 * n, seed=settings.seed)]


def count_rows(engine: Engine, source: Source) -> int:
    """The source's row count; a source without rows is an error naming it."""
    rows = int(engine.query(sqlgen.count_statement(source))["n"][0])
    if rows == 0:
        raise InputError(f"{source.label} has no rows")
    return rows


SampleT = TypeVar("SampleT")


def seeded_sample(engine: Engine, rows: int, settings: Settings, fetch: Callable[..., SampleT],
                  size: Callable[[SampleT], int]) -> SampleT:
    """The profile's seeded sample drawn through ``fetch`` (which builds and runs the statement from
    ``sample_statement``'s keywords): the whole table up to twice the sample size, else the engine's first
    TABLESAMPLE method, and BERNOULLI when that brought back under a tenth of the sample (SYSTEM keeps
    whole blocks, too few on a small table). ``size`` counts the rows a fetch brought back."""
    target = settings.sample_rows
    if rows <= 2 * target:
        return fetch()
    percent = min(100.0, 150.0 * target / rows)
    first = engine.target.first_sample_method
    got = fetch(percent=percent, method=first, limit=4 * target, seed=settings.seed)
    if size(got) < target // 10 and first != "BERNOULLI":
        got = fetch(percent=percent, method="BERNOULLI", limit=4 * target, seed=settings.seed)
    return got


def center_and_scale(sample: np.ndarray, scaling: str, columns: Sequence[str] = ()) -> tuple[np.ndarray, np.ndarray]:
    """The sample's per-column center and the grid's scale: its sd under zscore, else 1.

    A column equal in every sampled row has only the mean's round-off as sd (1/sd may overflow): scale 1.
    A column doubles cannot carry through the SQL is refused (``check_fits_doubles``; ``columns`` names them).
    """
    d = sample.shape[1]
    center, sd = robust_mean_sd(sample)
    flat = np.ptp(sample, axis=0) == 0 if len(sample) else np.ones(d, dtype=bool)
    check_fits_doubles(sample, center, np.where(flat, 0.0, sd), scaling, columns)
    return center, (np.where(flat, 1.0, sd) if scaling == "zscore" else np.ones(d))


#: Centred values the SQL sums (across columns, for the finiteness test of a row) stay below this share of
#: the largest double, per column; under scaling none their squares are summed too, so they stay below 1e150.
CENTRED_HEADROOM = 0.25
UNSCALED_LIMIT = 1e150
#: Smallest spread (sd) scaled under zscore: the grid multiplies by 1/sd, the width (down to 1e-3) and weights.
SMALLEST_SPREAD = 1e-302


def check_fits_doubles(sample: np.ndarray, center: np.ndarray, sd: np.ndarray, scaling: str,
                       columns: Sequence[str] = ()) -> None:
    """Refuse, naming the column, a column whose centred values or spread doubles cannot carry through the SQL.

    Magnitude alone is fine (1e307 + a spread of 1e305 is centred before anything is summed); what fails is a
    spread near the largest double (centred values summed across columns overflow; under scaling none their
    squares too) or below about 1e-302 (1/sd, the grid's factor, overflows: subnormal values).  ``sd`` is 0 for
    columns equal in every sampled row, which are left to the constant-column check.
    """
    if len(sample) == 0:
        return
    d = sample.shape[1]
    with np.errstate(over="ignore", invalid="ignore"):
        reach = np.abs(sample - center[None, :]).max(axis=0)
    top = np.finfo(np.float64).max
    limit = UNSCALED_LIMIT if scaling == "none" else CENTRED_HEADROOM * top / max(d, 1)
    smallest = UNSCALED_LIMIT ** -1 if scaling == "none" else SMALLEST_SPREAD
    for j in range(d):
        name = columns[j] if j < len(columns) else f"column {j + 1}"
        if not (np.isfinite(center[j]) and reach[j] <= limit):
            raise InputError(
                f"column {name}: its values lie up to {reach[j]:.3g} from their mean {center[j]:.3g}; sums over rows "
                f"would overflow doubles (largest {top:.3g}{', squared' if scaling == 'none' else ''}): "
                f"divide it by a power of ten first (e.g. in a view)")
        if 0 < sd[j] < smallest:
            raise InputError(
                f"column {name}: its spread (sd {sd[j]:.3g}) is below what doubles carry through the grid "
                f"({smallest:.0e}; {'its squares underflow to 0' if scaling == 'none' else '1/sd overflows'}): "
                f"multiply it by a power of ten first (e.g. in a view)")


def sample_promise(engine: Engine, rows: int, settings: Settings) -> str:
    """Whether the same data and seed give the same sample: always when the table is read whole."""
    return "yes" if rows <= 2 * settings.sample_rows else sqlgen.sample_repeats(engine.target)


#: The block sample is used while its block stage reads at most this share (percent) of the table.
BLOCK_SAMPLE_MAX_PERCENT = 25.0


def block_sample_pays(engine: Engine, source: Source, percent: float) -> bool:
    """Whether the profile draws DuckDB's two-stage block sample (``sqlgen.block_sample_statement``).

    Only from a DuckDB base table, where SYSTEM sampling skips the vectors it leaves
    (a view or a file reader would be computed whole, on one thread), and only while
    the block stage reads at most BLOCK_SAMPLE_MAX_PERCENT of the table: on 20M rows
    x 8 columns it cost 0.17 of a plain scan against 2.2 for BERNOULLI REPEATABLE
    (benchmarks/bench_sample.py), which reads every row.
    """
    if not engine.target.block_sample or not source.table or not hasattr(engine, "one_thread"):
        return False
    if sqlgen.BLOCK_SAMPLE_SPREAD * percent > BLOCK_SAMPLE_MAX_PERCENT:
        return False
    return engine.relation_kind(source.label) == "table"


def _block_sample(engine: Engine, source: Source, columns: Sequence[str], percent: float, seed: int, limit: int) -> np.ndarray:
    """The block sample's rows, drawn on one DuckDB thread so the same seed gives the same rows."""
    with engine.one_thread():  # type: ignore[attr-defined]
        return fetch_matrix(engine, sqlgen.block_sample_statement(source, columns, percent, seed, limit=limit), len(columns))


def canonical_sample(sample: np.ndarray, target: int, seed: int) -> np.ndarray:
    """The sampled rows in lexicographic order, cut to ``target`` rows by a seeded choice.

    Engines return rows in any order (parallel scans), and later steps take
    seeded subsets by position, so the order is fixed here.
    """
    if len(sample) == 0:
        return sample
    sample = sample[np.lexsort(sample.T[::-1])]
    if len(sample) > target:
        keep = np.sort(np.random.default_rng(seed).choice(len(sample), size=target, replace=False))
        sample = sample[keep]
    return sample


def robust_mean_sd(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-column mean and population sd that neither overflow (values near 1e152)
    nor underflow (near 1e-300): deviations are divided by their largest size first."""
    d = x.shape[1]
    if len(x) == 0:
        return np.zeros(d), np.ones(d)
    with np.errstate(over="ignore"):
        center = x.mean(axis=0)
    if not np.isfinite(center).all() and np.isfinite(x).all():  # the sum overflowed: average the values
        top = np.abs(x).max(axis=0)                              # divided by a power of two near their largest
        power = np.frexp(np.where(top > 0, top, 1.0))[1]
        center = np.ldexp(np.ldexp(x, -power[None, :]).mean(axis=0), power)
    dev = x - center[None, :]
    big = np.abs(dev).max(axis=0)
    safe = np.where(big > 0, big, 1.0)
    sd = np.sqrt(((dev / safe[None, :]) ** 2).mean(axis=0)) * np.where(big > 0, big, 0.0)
    return center, sd


def grid_axes(sample_u: np.ndarray, weights: np.ndarray, settings: Settings, usable_cols: np.ndarray) -> np.ndarray:
    """Columns of the matrix mapping standardised values to binned coordinates.

    Weighted columns themselves, or, above ``principal_above`` columns, the top
    principal axes of the weighted sample (covariance from the profile sample).
    """
    d = len(weights)
    active = np.flatnonzero((weights > 0) & usable_cols)
    if len(active) == 0:
        active = np.arange(d)
    if len(active) <= settings.principal_above or len(sample_u) < 2 or settings.principal_axes >= len(active):
        axes = np.zeros((d, len(active)))
        axes[active, np.arange(len(active))] = weights[active]
        return axes
    xw = sample_u * weights[None, :]
    cov = np.cov(xw, rowvar=False, bias=True)
    vals, vecs = np.linalg.eigh(cov)
    order = np.argsort(vals)[::-1][: settings.principal_axes]
    order = order[vals[order] > 1e-12 * max(vals.max(), 1e-300)]
    return vecs[:, order] * weights[:, None]


def grid_for_profile(prof: Profile, settings: Settings, weights: np.ndarray | None = None) -> Grid:
    """The grid of a run: standardisation, binned axes and width, all from the sample."""
    d = len(prof.center)
    weights = np.ones(d) if weights is None else weights
    sample_u = (prof.sample - prof.center[None, :]) / prof.scale[None, :]
    varied = np.ptp(prof.sample, axis=0) > 0 if len(prof.sample) else np.ones(d, dtype=bool)
    axes = grid_axes(sample_u, weights, settings, varied)
    width = settings.width or choose_width(sample_u @ axes, prof.rows, cell_target(settings, prof.rows))
    return Grid(
        center=tuple(map(float, prof.center)),
        inv_scale=tuple(map(float, 1.0 / prof.scale)),
        width=float(width),
        axes=tuple(tuple(map(float, r)) for r in axes),
        sums_scaled=True,
    )


#: density: rows an occupied cell should hold on average, so that a blob's cells are
#: dense and touch; the grid of a small table is then chosen from the data's scale
#: rather than the cell budget alone (one row per cell leaves nothing dense).
DENSITY_ROWS_PER_CELL = 20


def cell_target(settings: Settings, rows: int) -> int:
    """How many occupied cells the grid aims for: the cell budget, and for density at most
    rows / DENSITY_ROWS_PER_CELL."""
    if settings.method == "density":
        return max(min(settings.cell_budget, rows // DENSITY_ROWS_PER_CELL), 1)
    return settings.cell_budget


#: Sample rows used to choose the grid width (more buys little accuracy).
WIDTH_SEARCH_ROWS = 40_000


def choose_width(coords: np.ndarray, rows: int, budget: int) -> float:
    """Smallest grid width whose estimated number of occupied cells fits the budget.

    Occupied cells keep growing with the row count (the tails fill in), so the
    count seen in the sample is extrapolated to the table on the log-log slope
    between a quarter of the sample and the whole sample, capped at the row
    count.  The width is searched on a log scale (scaled units).
    """
    if len(coords) == 0:
        return 1.0
    if len(coords) > WIDTH_SEARCH_ROWS:
        coords = coords[np.random.default_rng(3).permutation(len(coords))[:WIDTH_SEARCH_ROWS]]
    m = len(coords)
    growth = math.log(rows / m) if rows > m and m >= 4 else 0.0  # a quarter of fewer than 4 rows shows no growth
    quarter = np.random.default_rng(7).permutation(m)[: max(m // 4, 1)]
    mix = np.random.default_rng(12345).integers(1, 2**62, size=coords.shape[1]) | 1

    def distinct(rows_coords: np.ndarray, width: float) -> int:
        keys = np.floor(rows_coords / width).astype(np.int64)
        with np.errstate(over="ignore"):
            hashed = (keys * mix[None, :]).sum(axis=1)  # wraps around; collisions are negligible
        hashed.sort()  # distinct values counted without np.unique, which imports numpy.ma (a command's start-up)
        return int(1 + np.count_nonzero(hashed[1:] != hashed[:-1])) if len(hashed) else 0

    def estimate(width: float) -> float:
        seen = distinct(coords, width)
        if growth == 0.0:
            return float(seen)
        slope = math.log(seen / max(distinct(coords[quarter], width), 1)) / math.log(m / len(quarter))
        return min(seen * math.exp(min(max(slope, 0.0), 1.0) * growth), float(rows))

    lo, hi = math.log(1e-3), math.log(50.0)
    if estimate(math.exp(lo)) <= budget:
        return math.exp(lo)
    for _ in range(12):
        mid = 0.5 * (lo + hi)
        if estimate(math.exp(mid)) <= budget:
            hi = mid
        else:
            lo = mid
    return math.exp(hi)


# ----------------------------------------------------------------------------- cell pass


@dataclass
class CellPass:
    cells: CF  # on the grid's standardised values
    keys: np.ndarray  # (cells x axes) per-axis integer keys, as floats
    usable: int
    skipped: int
    seconds: float


def cf_from_result(got: dict[str, np.ndarray], d: int, keep: np.ndarray | None = None) -> CF:
    """CF array from the n, ls*, ss* columns of a cells or refine result."""
    n = np.asarray(got["n"], dtype=np.float64)
    ls = np.column_stack([np.asarray(got[f"ls{j}"], dtype=np.float64) for j in range(d)]) if len(n) else np.zeros((0, d))
    ss = np.column_stack([np.asarray(got[f"ss{j}"], dtype=np.float64) for j in range(d)]) if len(n) else np.zeros((0, d))
    cf = CF(n, ls, ss)
    return cf if keep is None else cf[keep]


def is_masked_array(values: Any) -> bool:
    """Is this result column a masked array (it has NULLs)?  Asked without ``np.ma``: merely reading
    ``np.ma`` imports numpy.ma, 25-60 ms of a command's start-up, even when no result had a NULL."""
    return hasattr(values, "mask") and hasattr(values, "filled")


def unmasked(values: Any) -> np.ndarray:
    """A result column's values without its NULL mask (``np.ma.getdata``, without importing numpy.ma)."""
    return values.data if is_masked_array(values) else np.asarray(values)


def null_mask(values: np.ndarray) -> np.ndarray:
    if is_masked_array(values):
        return np.ma.getmaskarray(values)
    values = np.asarray(values)
    if values.dtype.kind == "f":
        return np.isnan(values)
    if values.dtype == object:
        return np.array([v is None for v in values], dtype=bool)
    return np.zeros(len(values), dtype=bool)


def run_cell_pass(engine: Engine, source: Source, columns: Sequence[str], grid: Grid) -> CellPass:
    """One GROUP BY over the grid key: cell CFs plus the skipped-row count."""
    t0 = time.perf_counter()
    got = engine.query(sqlgen.cells_statement(source, columns, grid, engine.target))
    cells, keys, skipped = cells_from_result(got, grid, len(columns))
    return CellPass(cells=cells, keys=keys, usable=int(round(cells.n.sum())), skipped=skipped, seconds=time.perf_counter() - t0)


def cells_from_result(got: dict[str, np.ndarray], grid: Grid, d: int) -> tuple[CF, np.ndarray, int]:
    """Cell CFs on the grid's standardised values, their per-axis keys, and the skipped rows.

    The groups whose first key is NULL hold the rows with a NULL/NaN/Inf value.
    """
    names = grid.key_names()
    null = null_mask(got[names[0]])
    skipped = int(np.asarray(got["n"], dtype=np.int64)[null].sum())
    keep = ~null
    cells = cf_from_result(got, d, keep)
    if not grid.sums_scaled:
        cells = F.affine(cells, np.asarray(grid.inv_scale), np.zeros(d))
    if not keep.any():
        return cells, np.zeros((0, len(names))), skipped
    keys = np.column_stack([np.asarray(unmasked(got[k]), dtype=np.float64)[keep] for k in names])
    order = np.lexsort(keys.T[::-1])  # groups come back in any order; later steps pick cells by position
    return cells[order], keys[order], skipped


# ----------------------------------------------------------------------------- refine


@dataclass
class SegmentStats:
    """Per-segment count, centroid and SSE (weighted, scaled units)."""

    n: np.ndarray
    centroids: np.ndarray
    sse: np.ndarray

    def take(self, order: np.ndarray) -> "SegmentStats":
        """The segments in the given order."""
        return SegmentStats(self.n[order], self.centroids[order], self.sse[order])

    @staticmethod
    def of_cfs(cf: CF, weights: np.ndarray) -> "SegmentStats":
        return SegmentStats(cf.n.copy(), F.centroids(cf), F.scatter(cf, weights))


@dataclass
class RefineResult:
    assigned: SegmentStats  # rows at the centroids they were assigned to
    updated: SegmentStats  # the same rows at their new means
    skipped: int
    seconds: float


def run_refine_pass(
    engine: Engine, source: Source, columns: Sequence[str], assign: Assignment, cell_map: sqlgen.CellMap | None = None
) -> RefineResult:
    """One SQL pass: assign rows to the nearest centroid, then the exact new means and SSEs.

    Moving a segment's centroid from c to its mean m lowers its SSE by exactly
    n ||m - c||^2 (weighted), so both SSEs come from n, LS and the summed distances.
    """
    t0 = time.perf_counter()
    got = engine.query(sqlgen.refine_statement(source, columns, assign, engine.target, cell_map=cell_map))
    seg, null, n_all = refine_rows(got, assign)
    k, d = len(assign.centroids), len(columns)
    n = np.bincount(seg, weights=n_all[~null], minlength=k)
    ls_su = np.column_stack([np.asarray(got[f"ls{j}"], dtype=np.float64)[~null] for j in range(d)])  # already scaled
    ls_u = np.column_stack([np.bincount(seg, weights=ls_su[:, j], minlength=k) for j in range(d)])
    return refine_result(got, assign, seg, null, n_all, n, ls_u, t0)


def refine_rows(got: dict[str, np.ndarray], assign: Assignment) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A refine statement's rows: each row's segment position, the rows left out (NULL segment, or
    the outlier group, which takes no part in the centroids), and the row counts."""
    null = null_mask(got["segment"])
    ids = np.asarray(unmasked(got["segment"]), dtype=np.float64)
    null = null | (ids < 0)
    position = {sid: i for i, sid in enumerate(assign.segment_ids())}
    seg = np.array([position[int(i)] for i in ids[~null]], dtype=np.int64)
    return seg, null, np.asarray(got["n"], dtype=np.float64)


def rows_in_key_order(got: dict[str, np.ndarray], keys: Sequence[str]) -> dict[str, np.ndarray]:
    """A GROUP BY's rows sorted by its key columns (NULL keys last). Engines return them in any order
    (parallel aggregation), and sums that Python then takes over several rows per segment must not
    depend on it: the same data and seed give the same figures to the last bit."""
    columns: list[np.ndarray] = []
    for key in reversed(keys):  # np.lexsort sorts by the last key first
        values = got[key]
        columns += [np.asarray(unmasked(values), dtype=np.float64), null_mask(values)]
    order = np.lexsort([np.where(np.isnan(c), -np.inf, c) if c.dtype.kind == "f" else c for c in columns])
    return {name: values[order] for name, values in got.items()}


def refine_result(
    got: dict[str, np.ndarray], assign: Assignment, seg: np.ndarray, null: np.ndarray, n_all: np.ndarray,
    n: np.ndarray, ls_u: np.ndarray, t0: float,
) -> RefineResult:
    """The pass's statistics: each segment's SSE about its old centroid (the summed distances) and
    about its new mean, lower by exactly n ||m - c||^2 (weighted)."""
    k = len(assign.centroids)
    dist = np.bincount(seg, weights=np.asarray(unmasked(got["dist"]), dtype=np.float64)[~null], minlength=k)
    assigned, updated = moved_to_means(n, ls_u, dist, np.asarray(assign.centroids, dtype=np.float64),
                                       np.asarray(assign.weights, dtype=np.float64))
    return RefineResult(assigned=assigned, updated=updated, skipped=int(round(n_all[null].sum())),
                        seconds=time.perf_counter() - t0)


def moved_to_means(n: np.ndarray, ls_u: np.ndarray, dist: np.ndarray, old: np.ndarray, weights: np.ndarray
                   ) -> tuple[SegmentStats, SegmentStats]:
    """A refine pass's segments at the centroids it assigned by (SSE: the summed distances) and at their
    new means (an empty segment keeps its centroid): moving a centroid from c to its mean m lowers its
    SSE by exactly n ||m - c||^2 (weighted)."""
    means = np.where(n[:, None] > 0, ls_u / np.where(n > 0, n, 1.0)[:, None], old)
    shift = (((means - old) * weights[None, :]) ** 2).sum(axis=1)
    dist = np.maximum(dist, 0.0)
    return SegmentStats(n, old, dist), SegmentStats(n, means, np.maximum(dist - n * shift, 0.0))


# ----------------------------------------------------------------------------- segment


@dataclass
class Standardisation:
    """The exact standardisation of a run: u_j = (x_j - center_j) / scale_j, times weight_j in distances."""

    center: np.ndarray
    sd: np.ndarray  # exact population standard deviation
    scale: np.ndarray  # sd, or 1 for scaling "none" and for constant columns
    weights: np.ndarray
    constant: np.ndarray  # bool per column

    def assignment(self, centroids: np.ndarray, ids: Sequence[int] | None = None) -> Assignment:
        return Assignment(
            tuple(map(float, self.center)),
            tuple(map(float, 1.0 / self.scale)),
            tuple(map(float, self.weights)),
            tuple(tuple(map(float, c)) for c in centroids),
            ids=tuple(int(i) for i in ids) if ids is not None else (),
        )


def standardise_cells(
    cells_grid: CF, grid: Grid, columns: Sequence[str], settings: Settings, weights: np.ndarray,
    indicator_groups: Sequence[np.ndarray] = (),
) -> tuple[CF, Standardisation]:
    """Exact mean and sd from the total of the cell CFs, and the cells moved into that standardisation.

    ``cells_grid`` is on the grid's standardised values; an affine change of a CF
    is exact.  A column with zero spread warns and gets weight 0.
    """
    d = len(columns)
    grid_center = np.asarray(grid.center)
    grid_scale = 1.0 / np.asarray(grid.inv_scale)
    total = F.total(cells_grid)
    n = float(total.n[0])
    center = grid_center + total.ls[0] / n * grid_scale
    scatter = F.column_scatter(total)[0]
    sd = np.sqrt(scatter / n) * grid_scale
    constant = constant_columns(center, sd) | unresolved_spread(scatter, total.ss[0])
    fixed = np.full(d, np.nan)  # the indicators of a categorical column share one scale (categorical.group_scale)
    for pos in indicator_groups:
        s_ = cat.group_scale(center[pos])
        constant[pos] = s_ == 0.0
        fixed[pos] = s_ if s_ > 0.0 else 1.0
    shown = constant_names(columns, constant, indicator_groups)
    if not (np.where(constant, 0.0, weights) > 0).any():  # the error alone: no warning line before it
        raise InputError(nothing_to_segment_on(columns, constant, weights, indicator_groups))
    if constant.any():
        warnings.warn(f"constant column(s) {', '.join(shown)}: they carry no weight", UserWarning, stacklevel=3)
    weights = np.where(constant, 0.0, weights)
    scale = np.where(constant, 1.0, sd) if settings.scaling == "zscore" else np.ones(d)
    scale = np.where(np.isnan(fixed), scale, fixed)
    cells = F.affine(cells_grid, grid_scale / scale, (grid_center - center) / scale)
    return cells, Standardisation(center=center, sd=sd, scale=scale, weights=weights, constant=constant)


#: A column is constant when its spread is within this many units of round-off of its own size.
CONSTANT_ULPS = 4.0


#: A column's spread is not resolved by its sums when its scatter is within this many units of round-off of its
#: square sum.
RESOLVED_ULPS = 16.0


def unresolved_spread(scatter: np.ndarray, ss: np.ndarray) -> np.ndarray:
    """True where the scatter (ss - ls^2/n, in grid units) is round-off of the square sum itself.

    The one-pass sums cannot tell such a spread from none: rows far from the
    grid's centre that are all equal (a constant group of a --within store on the
    table's shared grid) leave a scatter of a few units of round-off of ss,
    which the test on the spread's own size would take for a real spread.
    Rows near the grid's centre (every plain run) are unaffected.
    """
    return scatter <= RESOLVED_ULPS * np.finfo(np.float64).eps * np.abs(ss)


def constant_columns(center: np.ndarray, sd: np.ndarray) -> np.ndarray:
    """True for columns whose exact spread is round-off of their own magnitude.

    Relative to each column's own size only (no absolute floor), so data in
    units of 1e-300 or shifted by 1e13 keep their spread.
    """
    magnitude = np.abs(center) + sd
    return ~(sd > CONSTANT_ULPS * np.finfo(np.float64).eps * magnitude)


def constant_names(columns: Sequence[str], constant: np.ndarray, indicator_groups: Sequence[np.ndarray] = ()) -> list[str]:
    """The constant columns as a user named them: a categorical column with a single category (or only
    NULLs) once, as "COLUMN (one category)", not as each of its indicators."""
    return user_names(columns, constant, indicator_groups, " (one category)")


def user_names(columns: Sequence[str], flags: np.ndarray, indicator_groups: Sequence[np.ndarray], note: str = "") -> list[str]:
    """The flagged columns, a categorical column whose indicators are all flagged named once (with ``note``)."""
    names = {j: c for j, (c, flag) in enumerate(zip(columns, flags)) if flag}
    for pos in indicator_groups:
        if len(pos) and all(int(j) in names for j in pos):
            other = columns[pos[-2]] if len(pos) >= 2 else columns[pos[0]]
            column = other[: -len("=(other)")] if other.endswith("=(other)") else other
            for j in pos[1:]:
                del names[int(j)]
            names[int(pos[0])] = f"{column}{note}"
    return [names[j] for j in sorted(names)]


def nothing_to_segment_on(columns: Sequence[str], constant: np.ndarray, weights: np.ndarray,
                          indicator_groups: Sequence[np.ndarray] = ()) -> str:
    """Why every column carries weight 0, naming a categorical column once (not each indicator)."""
    if not (weights > 0).any():
        return "every weight is 0: at least one column needs a weight above 0"
    zero = user_names(columns, ~(weights > 0) & ~constant, indicator_groups)
    const = constant_names(columns, constant, indicator_groups)
    why = f"constant column(s) {', '.join(const)}" + (f" and weight 0 on {', '.join(zero)}" if zero else "")
    return f"nothing to segment on: {why}; every row would fall in one segment"


def narrowed_candidates_note(asked: Sequence[int], usable: Sequence[int], filled: int) -> str:
    """Why only some of the asked candidate ks were compared."""
    from .model import k_list_text

    return (f"only k = {k_list_text(usable)} of the asked {k_list_text(asked)} compared: a k above 1 must be smaller "
            f"than the {filled:,} distinct grid cells")


def axes_text(n: int) -> str:
    """'1 axis', '3 axes'."""
    return f"{n} axis" if n == 1 else f"{n} axes"


def check_k_fits(cells: CF, k: int, where: str) -> None:
    """A clear error when k exceeds the non-empty cells (or entries) there are to segment."""
    nonempty = int((cells.n > 0).sum())
    if k > nonempty:
        distinct = " (only that many distinct rows)" if nonempty == int(round(cells.n.sum())) else "; try a smaller k or a finer --width"
        raise ParameterError(f"{{k}} {k:,} is larger than the {nonempty:,} distinct grid cells of {where}{distinct}", "k")


K_LIMIT_CELLS = 20  # k-means refuses more segments than one per this many non-empty cells ...
K_LIMIT_FLOOR = 50  # ... unless k is at most this


def k_limit(cells: CF) -> int:
    """The largest k the k-means second phase accepts on these cells (see check_k_limit)."""
    return max(K_LIMIT_FLOOR, int((cells.n > 0).sum()) // K_LIMIT_CELLS)


def check_k_limit(cells: CF, ks: Sequence[int], where: str) -> None:
    """A clear error for k above k_limit: fewer than 20 cells per segment leave the grid too coarse to
    tell the segments apart, and the run would take minutes."""
    limit = k_limit(cells)
    over = [k for k in ks if k > limit]
    if over:
        raise ParameterError(
            f"{{k}} {max(over):,} is too large for the {int((cells.n > 0).sum()):,} grid cells of {where}: at most {limit:,} "
            f"segments (one per {K_LIMIT_CELLS} cells, or {K_LIMIT_FLOOR}); give a smaller {{k}} or a larger {{cell_budget}}",
            "k", "cell_budget",
        )


def second_phase(
    cells: CF, settings: Settings, weights: np.ndarray, where: str, init: np.ndarray | None = None,
    progress: ProgressFn | None = None,
) -> KMeansResult:
    """Weighted k-means++ on the cells (warm-started from ``init`` when given)."""
    check_k_fits(cells, settings.k, where)
    check_k_limit(cells, [settings.k], where)
    tell = None if progress is None else (lambda message: progress("second phase", message))
    return kmeans(cells, settings.k, weights, n_init=settings.n_init, seed=settings.seed, init=init, progress=tell)


@dataclass
class PhaseResult:
    """The second phase's outcome on the cells."""

    cell_labels: np.ndarray  # (cells,) position of each cell's segment, -1 outliers/noise
    centroids: np.ndarray  # (k, d) unweighted standardised coordinates
    k: int
    sse: float
    summary: str
    params: dict[str, Any] = field(default_factory=dict)
    extras: dict[str, Any] = field(default_factory=dict)
    needs_cell_map: bool = False
    map_all: bool = False  # every cell in the map (density), else only the outlier group's cells
    unmapped: str = "nearest"  # what rows of cells not in the map get: "nearest" or "noise"

    def cell_map(self, grid: Grid, keys: np.ndarray) -> sqlgen.CellMap | None:
        """The outlier cells (-1) for the refine passes, or None."""
        if self.needs_cell_map and not self.map_all:
            out = self.cell_labels < 0
            if out.any():
                return sqlgen.CellMap(grid, tuple(map(tuple, keys[out])), tuple([-1] * int(out.sum())), "nearest")
        return None

    def cell_map_dict(self, grid: Grid, keys: np.ndarray, ids: np.ndarray) -> dict[str, Any]:
        """The map the label SQL needs: outlier cells only (k-means, Ward), or every cell (density)."""
        rows = np.ones(len(self.cell_labels), bool) if self.map_all else self.cell_labels < 0
        segs = np.where(self.cell_labels[rows] < 0, -1, ids[np.maximum(self.cell_labels[rows], 0)])
        return {"keys": keys[rows].tolist(), "segments": segs.astype(int).tolist(), "unmapped": self.unmapped}


def run_second_phase(
    cells: CF, keys: np.ndarray, settings: Settings, weights: np.ndarray, where: str, progress: ProgressFn
) -> PhaseResult:
    """k-means, Ward or density segments on the cells; a CF tree first when the cells exceed its budget."""
    from . import tree as cftree
    from .segmenters import choose_k, density, format_k_table, ward

    if settings.method == "density":
        res = density(cells, keys, min_count=settings.min_count, adjacency=settings.adjacency, radius=settings.radius,
                      noise="attach" if settings.noise == "attach" else "drop", weights=weights)
        if res.n_segments == 0:
            raise ParameterError(f"no dense cells in {where}: lower the density threshold ({{min_count}}, now {res.min_count:.3g})", "min_count")
        noise_rows = int(cells.n[res.labels < 0].sum())
        sse = F.sse(F.group_sum(cells, res.labels, res.n_segments), weights)
        return PhaseResult(
            res.labels, res.centroids, res.n_segments, sse,
            f"density: {res.n_segments} segment(s) from {int(res.dense.sum()):,} dense cells (n >= {res.min_count:.3g}), {noise_rows:,} noise rows",
            params={"min_count": res.min_count, "adjacency": settings.adjacency, "radius": res.radius, "noise": settings.noise},
            extras={"noise_rows": noise_rows},
            needs_cell_map=True, map_all=True, unmapped="noise" if settings.noise == "drop" else "nearest",
        )
    entries, membership, params, extras = cells, np.arange(cells.m), {}, {}
    tree_budget = settings.cell_budget if settings.tree_budget is None else settings.tree_budget
    for_ward = settings.method == "ward" and bool(tree_budget) and cells.m > WARD_ENTRIES and WARD_ENTRIES < tree_budget
    if for_ward:
        tree_budget = WARD_ENTRIES
    if tree_budget and cells.m > tree_budget:
        # condensing only to speed Ward up keeps every cell (no outlier group the user did not ask for)
        keep_outliers = settings.keep_outliers or (for_ward and cells.m <= (settings.tree_budget or settings.cell_budget))
        cond = cftree.condense(cells, threshold=settings.threshold, branching=settings.branching,
                               leaf_capacity=settings.leaf_capacity, budget=tree_budget,
                               criterion=settings.criterion, weights=weights, keep_outliers=keep_outliers,
                               seed=settings.seed)
        entries, membership = cond.entries, cond.membership
        params.update({"tree": {"threshold": cond.threshold, "branching": cond.branching, "leaf_capacity": cond.leaf_capacity,
                                "budget": cond.budget, "criterion": cond.criterion, "rebuilds": cond.rebuilds,
                                "entries": int(entries.m)}})
        if for_ward:
            params["tree"]["reason"] = f"condensed before Ward, which runs on at most {WARD_ENTRIES:,} entries"
        out_rows = int(cells.n[membership < 0].sum())
        extras["outliers"] = {"rows": out_rows, "cells": int((membership < 0).sum()), "entries": int(cond.outliers.m)}
        progress("tree", f"{cells.m:,} cells -> {entries.m:,} entries (T {cond.threshold:.3g}, {cond.rebuilds} rebuild(s)), "
                         f"{out_rows:,} rows in the outlier group")
    k = settings.k
    if settings.k_candidates:
        filled = int((entries.n > 0).sum())
        # a k equal to the cells puts every cell alone: no score can rank it (Calinski-Harabasz needs k < cells)
        usable = [c for c in settings.k_candidates if c < filled or c == 1]
        if not usable:
            raise ParameterError(f"every candidate {{k}} ({settings.k_candidates[0]}..{settings.k_candidates[-1]}) is not "
                                 f"smaller than the {filled:,} distinct grid cells of {where}; give a smaller {{k}}", "k")
        check_k_limit(entries, settings.k_candidates, where)
        choice = choose_k(entries, usable, weights, n_init=settings.n_init, seed=settings.seed, rule=settings.k_rule,
                          progress=lambda message: progress("choose k", message))
        k = choice.k
        params["k_choice"] = {"rule": choice.rule, "table": choice.table, "k": k, "reason": choice.reason}
        if len(usable) < len(settings.k_candidates):  # said, not silent: why fewer candidates than asked were compared
            params["k_choice"]["narrowed"] = narrowed_candidates_note(settings.k_candidates, usable, filled)
            progress("choose k", params["k_choice"]["narrowed"])
        progress("choose k", "candidates compared:\n" + format_k_table(choice))
    if settings.method == "ward":
        check_k_fits(entries, k, where)
        res = ward(entries, k, weights)
        labels, centroids, sse = res.labels, res.centroids, res.sse
        extras["merge_heights"] = [float(h) for h in res.heights[-30:]]
        summary = f"Ward on {entries.m:,} entries, SSE {sse:.6g}"
    else:
        res = second_phase(entries, replace(settings, k=k), weights, where, progress=progress)
        labels, centroids, sse = res.labels, res.centroids, res.sse
        summary = f"k-means++ x{res.restarts} on {entries.m:,} {'entries' if entries is not cells else 'cells'}, SSE {sse:.6g}"
    cell_labels = np.where(membership >= 0, labels[np.maximum(membership, 0)], -1)
    return PhaseResult(cell_labels, centroids, k, sse, summary, params=params, extras=extras,
                       needs_cell_map=bool((cell_labels < 0).any()), unmapped="nearest")


@dataclass
class CellBoxes:
    """Per cell, a box (exact standardised units) that holds every row of the cell, and the cell's segment position.

    A cell of a grid binning the columns themselves is a box in every column
    that carries weight; principal-axis grids bound only the axes, so they give
    no boxes.
    """

    lo: np.ndarray  # (cells, d)
    hi: np.ndarray  # (cells, d)
    labels: np.ndarray  # (cells,) segment position, -1 for mapped (outlier) cells

    @staticmethod
    def of_grid(grid: Grid, keys: np.ndarray, std: Standardisation, labels: np.ndarray) -> "CellBoxes | None":
        factors = grid.key_factors()
        weighted = std.weights > 0
        nonzero = factors != 0
        if len(keys) == 0 or keys.shape[1] != factors.shape[1]:
            return None
        if (nonzero[weighted].sum(axis=1) != 1).any() or (nonzero.sum(axis=0) > 1).any():
            return None  # a weighted column is not its own axis: rows are unbounded across the axes
        d = len(std.center)
        lo, hi = np.zeros((len(keys), d)), np.zeros((len(keys), d))
        for j in np.flatnonzero(weighted):
            a = int(np.flatnonzero(nonzero[j])[0])
            f = factors[j, a]
            ends = np.stack([keys[:, a] / f, (keys[:, a] + 1.0) / f])  # x_j - grid centre_j
            shift = grid.center[j] - std.center[j]
            lo[:, j] = (ends.min(axis=0) + shift) / std.scale[j]
            hi[:, j] = (ends.max(axis=0) + shift) / std.scale[j]
        slack = 1e-9 * (np.abs(lo) + np.abs(hi)) + 1e-300  # rounding of the SQL's floor arguments
        return CellBoxes(lo - slack, hi + slack, np.asarray(labels))

    def all_settled(self, centroids: np.ndarray, weights: np.ndarray) -> bool:
        """True when every row of every cell is strictly nearer its cell's centroid than any other.

        ||u - c_own||^2 - ||u - c_j||^2 is linear in u, so its largest value over
        a box is at a corner: sum over columns of the larger end.  A relative
        margin of 1e-9 keeps the SQL's rounding from breaking a near tie.
        """
        keep = self.labels >= 0
        own = centroids[self.labels[keep]]  # (m, d)
        w2 = np.asarray(weights, dtype=np.float64) ** 2
        lo, hi = self.lo[keep], self.hi[keep]
        for j in range(len(centroids)):
            coef = -2.0 * w2[None, :] * (own - centroids[j][None, :])  # (m, d)
            const = (w2[None, :] * (own * own - centroids[j][None, :] ** 2)).sum(axis=1)
            worst = np.maximum(coef * lo, coef * hi).sum(axis=1) + const
            scale = (np.abs(coef) * np.maximum(np.abs(lo), np.abs(hi))).sum(axis=1) + np.abs(const)
            other = self.labels[keep] != j
            if (worst[other] >= -1e-9 * scale[other] - 1e-300).any():
                return False
        return True


def refine_passes(
    engine: Engine,
    source: Source,
    columns: Sequence[str],
    std: Standardisation,
    centroids: np.ndarray,
    stats: SegmentStats,
    settings: Settings,
    progress: ProgressFn,
    usable: int,
    cell_map: sqlgen.CellMap | None = None,
    cell_boxes: CellBoxes | None = None,
    codes: tuple[Sequence[np.ndarray], Sequence[str]] | None = None,
) -> tuple[SegmentStats, list[dict], dict[str, float]]:
    """Row-level Lloyd passes in SQL until the SSE gain falls below the tolerance.

    Rows of cells in ``cell_map`` (the outlier group) keep their mapped segment
    (-1) and take no part in the centroids.  With ``cell_boxes``, no pass runs
    when every cell lies wholly nearest the centroid of its own segment (the
    means of the cells' CFs, ``stats``): a pass would then move no row, and
    ``stats`` are already the rows' exact counts, means and SSEs.
    """
    passes: list[dict] = []
    timings: dict[str, float] = {}
    if cell_boxes is not None and settings.refine_passes > 0 and (stats.n > 0).all():
        t0 = time.perf_counter()
        settled = cell_boxes.all_settled(stats.centroids, std.weights)
        timings["refine_check"] = time.perf_counter() - t0
        if settled:
            progress("refine", "no pass needed: every cell lies wholly nearest its own segment's centroid")
            return stats, passes, timings
    with temporary_cell_map(engine, cell_map) as held_map:
        stats, centroids = refine_loop(engine, source, columns, std, centroids, stats, settings, progress, usable, held_map, passes,
                                       timings, codes)
    return stats, passes, timings


def refine_loop(
    engine: Engine, source: Source, columns: Sequence[str], std: Standardisation, centroids: np.ndarray,
    stats: SegmentStats, settings: Settings, progress: ProgressFn, usable: int, cell_map: sqlgen.CellMap | None,
    passes: list[dict], timings: dict[str, float], codes: tuple[Sequence[np.ndarray], Sequence[str]] | None = None,
) -> tuple[SegmentStats, np.ndarray]:
    """The passes of ``refine_passes``; appends to passes and timings, returns the last stats and centroids.

    The model keeps the last pass's assignment: the centroids the rows were
    assigned to, with those rows' exact counts and SSE.  Labels assign with the
    same centroids, so they reproduce the model's sizes row for row; moving the
    centroids to the new means afterwards (a gain below the tolerance) could
    move rows across a boundary and break that.
    """
    for p in range(1, settings.refine_passes + 1):
        if codes is not None:  # categorical columns (no cell map: their runs keep every cell)
            rr = run_refine_pass_with_codes(engine, source, columns, std.assignment(centroids), *codes)
        else:
            rr = run_refine_pass(engine, source, columns, std.assignment(centroids), cell_map)
        before, after = float(rr.assigned.sse.sum()), float(rr.updated.sse.sum())
        gain = (before - after) / before if before > 0 else 0.0
        passes.append({"pass": p, "sse_assigned": before, "sse": after, "gain": gain})
        timings[f"refine_{p}"] = rr.seconds  # seconds only under timings: the rest of the file repeats
        progress("refine", f"pass {p}: {usable:,} rows, SSE {before:.6g} -> {after:.6g}, {rr.seconds:.2f} s")
        stats, centroids = rr.updated, rr.updated.centroids
        empty = stats.n == 0
        if empty.any():
            warnings.warn(f"refine pass {p}: segment(s) {np.flatnonzero(empty).tolist()} got no rows", UserWarning, stacklevel=3)
        if gain < settings.tolerance or p == settings.refine_passes:
            return rr.assigned, rr.assigned.centroids
    return stats, centroids


@contextmanager
def temporary_cell_map(engine: Engine, cell_map: sqlgen.CellMap | None) -> Iterator[sqlgen.CellMap | None]:
    """The cell map held by the engine as a small temporary relation while the block runs, then dropped.

    A statement then joins a table of a few thousand rows instead of carrying
    them inline as a VALUES list, which costs more to build, render and plan
    than the pass itself.  Engines that cannot hold one (``hold_temporary``
    False or missing) get the inline map back unchanged.  Not for views: they
    outlive the session.
    """
    hold = getattr(engine, "hold_temporary", None)
    if cell_map is None or cell_map.table is not None or hold is None:
        yield cell_map
        return
    name = sqlgen.internal(f"map_{uuid.uuid4().hex[:12]}")
    if not hold(name, cell_map.columns()):
        yield cell_map
        return
    try:
        yield replace(cell_map, table=name)
    finally:
        engine.drop_temporary(name)


def size_order(stats: SegmentStats) -> np.ndarray:
    """Segment positions largest first, so ids read the same way every run."""
    return np.argsort(-stats.n, kind="stable")


def order_by_size(stats: SegmentStats) -> SegmentStats:
    """Segments renumbered largest first (ids 0..k-1)."""
    return stats.take(size_order(stats))


@dataclass
class RefinedPhase:
    """The second phase's segments after the refine passes, renumbered largest first."""

    stats: SegmentStats  # in id order 0..k-1
    new_id: np.ndarray  # the id of each second-phase position
    passes: list[dict]
    timings: dict[str, float]


def refine_phase(
    engine: Engine, source: Source, columns: Sequence[str], cells: CF, keys: np.ndarray, grid: Grid,
    std: Standardisation, phase: PhaseResult, settings: Settings, progress: ProgressFn, usable: int,
    codes: tuple[Sequence[np.ndarray], Sequence[str]] | None = None,
) -> RefinedPhase:
    """Refine passes on the second phase's segments (none when the cells settle it, and none for density:
    they would undo its shapes), then ids largest first (density's come numbered so already)."""
    stats = SegmentStats.of_cfs(F.group_sum(cells, phase.cell_labels, phase.k), std.weights)
    passes: list[dict] = []
    timings: dict[str, float] = {}
    if settings.method != "density":
        stats, passes, timings = refine_passes(
            engine, source, columns, std, phase.centroids, stats, settings, progress, usable,
            cell_map=phase.cell_map(grid, keys), cell_boxes=CellBoxes.of_grid(grid, keys, std, phase.cell_labels),
            codes=codes,
        )
    order = size_order(stats) if settings.method != "density" else np.arange(len(stats.n))
    new_id = np.empty(len(order), dtype=np.int64)
    new_id[order] = np.arange(len(order))
    return RefinedPhase(stats.take(order), new_id, passes, timings)


def attach_phase(model: Model, method: str, phase: PhaseResult, refined: RefinedPhase, grid: Grid, keys: np.ndarray) -> Model:
    """The method, the second phase's extras, the label cell map (in the new ids) and the passes, on the model."""
    model.method = method
    model.extras = phase.extras
    model.cell_map = phase.cell_map_dict(grid, keys, refined.new_id) if phase.needs_cell_map else {}
    model.passes = refined.passes
    return model


def make_model(
    columns: Sequence[str],
    std: Standardisation,
    grid: Grid,
    stats: SegmentStats,
    settings: Settings,
    source: Source,
    rows: int,
    skipped: int,
    cells: int,
    extra_params: dict | None = None,
    ids: Sequence[int] | None = None,
) -> Model:
    """The model file's content from a finished run."""
    centroids = stats.centroids
    original = centroids * std.scale[None, :] + std.center[None, :]
    params = settings.model_params()
    params.update(extra_params or {})
    return Model(
        columns=list(columns),
        center=std.center.tolist(),
        scale=std.scale.tolist(),
        weights=std.weights.tolist(),
        scaling=settings.scaling,
        centroids=original.tolist(),
        centroids_scaled=centroids.tolist(),
        sizes=[int(round(v)) for v in stats.n],
        sse=float(stats.sse.sum()),
        segment_sse=stats.sse.tolist(),
        radius=np.sqrt(stats.sse / np.where(stats.n > 0, stats.n, 1.0)).tolist(),
        rows=rows,
        skipped=skipped,
        source=source.label,
        k=len(centroids),
        ids=list(ids) if ids is not None else list(range(len(centroids))),
        constant_columns=[c for c, flag in zip(columns, std.constant) if flag],
        grid={**grid.to_dict(), "cells": cells, "sd": std.sd.tolist()},
        params=params,
        created=datetime.now(timezone.utc).isoformat(timespec="seconds"),
    )


# ----------------------------------------------------------------------------- categorical columns


def categorical_source(
    engine: Engine, source: Source, columns: Sequence[str], settings: Settings,
    fixed: Sequence[cat.CategoricalColumn] | None = None,
) -> tuple[Source, list[cat.CategoricalColumn], Profile]:
    """Check the numeric and categorical columns; take the profile sample (seeded, as ``run_profile``) with
    the categorical columns as text; each categorical column's top categories by sampled rows; the source
    read with their indicators; and the profile of the numeric columns followed by one category code
    column per categorical column.  ``fixed``: the categories already chosen (a store's regrid keeps
    them), used instead of the sample's top ones."""
    t0 = time.perf_counter()
    described, rows = checked_categorical_source(engine, source, columns, settings)
    p, target, texts = len(columns), settings.sample_rows, list(settings.categorical)

    def fetch(**kw: Any) -> tuple[np.ndarray, list[list[Any]]]:
        got = engine.query(sqlgen.sample_statement(source, columns, engine.target, text_columns=texts, **kw))
        x = [np.asarray(got[sqlgen.internal(f"x{j}")], dtype=np.float64) for j in range(p)]
        m = len(got[sqlgen.internal("t0")])
        values = sampled_texts(got, len(texts))
        return (np.column_stack(x) if p else np.zeros((m, 0))), values

    x, values = seeded_sample(engine, rows, settings, fetch, lambda got: len(got[0]))
    specs, codes = category_specs(texts, values, described, settings, fixed)
    sample = canonical_sample(np.hstack([x, codes]), target, settings.seed)
    prof = profile_with_codes(engine, sample, p, rows, settings, t0, columns)
    return cat.with_indicators(source, specs, engine.target), specs, prof


def checked_categorical_source(engine: Engine, source: Source, columns: Sequence[str], settings: Settings) -> tuple[dict[str, str], int]:
    """The source's columns and types, and its row count, after refusing bad numeric or categorical columns."""
    described = dict(engine.describe(source))
    cat.check_categorical(columns, settings.categorical, described, source.label)
    if columns:
        check_columns(engine, source, columns)
    return described, count_rows(engine, source)


def profile_with_codes(engine: Engine, sample: np.ndarray, p: int, rows: int, settings: Settings, t0: float,
                       columns: Sequence[str] = ()) -> Profile:
    """The profile of a sample holding ``p`` numeric columns (named ``columns``), then one category code per
    categorical column (centre 0 and scale 1: the codes are keys, not values)."""
    codes = sample.shape[1] - p
    center, scale = center_and_scale(sample[:, :p], settings.scaling, columns)
    return Profile(rows=rows, sample=sample, center=np.concatenate([center, np.zeros(codes)]),
                   scale=np.concatenate([scale, np.ones(codes)]), seconds=time.perf_counter() - t0,
                   repeats=sample_promise(engine, rows, settings))


def indicator_weights(settings: Settings, columns: Sequence[str], specs: Sequence[cat.CategoricalColumn]) -> np.ndarray:
    """Each column's weight, every indicator of a categorical column taking that column's (--weights district=0.5)."""
    weights = settings.column_weights(columns)
    for spec, pos in zip(specs, cat.indicator_positions(columns, specs)):
        weights[pos] = float(settings.weights.get(spec.column, 1.0))
    return weights


def sampled_texts(got: dict[str, Any], count: int) -> list[list[Any]]:
    """The sample's text columns t0.. as lists of values, NULL as None."""
    return [[None if null else v for v, null in zip(unmasked(got[sqlgen.internal(f"t{i}")]).tolist(),
                                                    null_mask(got[sqlgen.internal(f"t{i}")]))] for i in range(count)]


def category_specs(texts: Sequence[str], values: Sequence[Sequence[Any]], described: dict[str, str], settings: Settings,
                   fixed: Sequence[cat.CategoricalColumn] | None = None) -> tuple[list[cat.CategoricalColumn], np.ndarray]:
    """Each categorical column's top categories by sampled rows (its indicators named apart from ``described``'s
    columns), or ``fixed``'s (a store's, kept since its build), and the sampled rows' category codes (rows x
    columns, 1-based: listed, then other, then NULL)."""
    taken = set(described)
    specs, codes = [], []
    for i, (column, vals) in enumerate(zip(texts, values)):
        if fixed is not None:
            specs.append(fixed[i])
            top = fixed[i].values
        else:
            distinct, counts = np.unique(np.array(["\0NULL" if v is None else v for v in vals], dtype=object).astype(str), return_counts=True)
            cat.check_distinct(column, len(distinct), len(vals))
            labels = [None if v == "\0NULL" else v for v in distinct.tolist()]
            top = cat.top_categories(labels, counts, settings.max_categories)
            names = cat.indicator_names(column, (*top, cat.OTHER, cat.NULL), taken)
            specs.append(cat.CategoricalColumn(column, described[column], top, names))
        position = {v: i + 1 for i, v in enumerate(top)}
        codes.append([len(top) + 2 if v is None else position.get(v, len(top) + 1) for v in vals])
    rows = len(values[0]) if values else 0
    return specs, np.asarray(codes, dtype=np.float64).T.reshape(rows, len(texts))


def model_source(engine: Engine, source: Source, model: Model) -> Source:
    """The source as a model reads it: with the indicators of its categorical columns, if any."""
    return cat.with_indicators(source, cat.specs_of(model.categorical), engine.target)


def check_model_columns(engine: Engine, source: Source, model: Model, where: str = "the model") -> None:
    """Every column the model reads (numeric, categorical, the --within group column) is in the source; else one
    line naming the first missing one, its role and ``where`` (the model file), before any statement runs."""
    described = engine.describe(source)
    types, names = dict(described), [n for n, _ in described]
    needed = [(model.columns[j], "numeric") for j in model.numeric_positions()]
    needed += [(c["column"], "categorical") for c in model.categorical]
    if model.within:
        needed.append((model.within["column"], "--within group"))
    for column, role in needed:
        if engine.target.resolve_name(column, names, typed=False) is None:
            raise SourceError(f"{role} column {column} of {where} not found in {source.label}; columns there: {columns_there(described, source)}")
    for spec in model.categorical:  # its categories are cast to the model's type, then compared with the column
        cat.check_sql_type(spec["type"], f"categorical column {spec['column']}")
        have = types[engine.target.resolve_name(spec["column"], names, typed=False)]
        if cat.type_family(have) != cat.type_family(spec["type"]):
            raise SourceError(
                f"categorical column {spec['column']} is {spec['type']} in {where} but {have} in {source.label}, so its "
                f"categories cannot be compared; read {source.label} through a view that casts it to {spec['type']}"
            )


def other_source_note(model: Model, source: Source, where: str = "the model") -> str | None:
    """A line saying the model was built on another source than the one given (its figures - sizes, SSE - are of
    that source), or None when they are the same (compared without case and a leading main.)."""
    def plain(label: str) -> str:
        text = label.strip().lower()
        return text[len("main."):] if text.startswith("main.") else text

    if not model.source or plain(model.source) == plain(source.label):
        return None
    return (f"{where} was built on {model.source}, not {source.label}: its own figures (sizes, SSE) are of "
            f"{model.source}, the report's statistics of {source.label}")


#: Spacing of category codes in the width search's coordinates: above its widest width (50), so
#: every code stays its own bin there as it does in SQL.
CODE_SPACING = 100.0


def grid_with_category_codes(prof: Profile, settings: Settings, weights: np.ndarray, groups: Sequence[np.ndarray]) -> Grid:
    """The grid of a run with categorical columns, on every column (numeric ones first, then the
    indicators).  ``prof`` holds the numeric columns and one category code per categorical column.

    The grid bins the numeric columns (with none, one axis that is 0 for every row); indicators have
    centre 0 and scale 1 in it and no axis.  The cell pass also groups on each categorical column's code
    (``run_cell_pass_with_codes``), so the width is chosen with the codes in the count of occupied cells."""
    g = len(groups)
    p = len(prof.center) - g
    d = p + sum(len(pos) for pos in groups)
    numeric_w = weights[:p]
    sample_u = (prof.sample[:, :p] - prof.center[None, :p]) / prof.scale[None, :p]
    varied = np.ptp(prof.sample[:, :p], axis=0) > 0 if len(prof.sample) else np.ones(p, dtype=bool)
    axes = np.zeros((d, 1))
    width = 1.0
    if (numeric_w > 0).any():
        num_axes = grid_axes(sample_u, numeric_w, settings, varied)
        coords = np.hstack([sample_u @ num_axes, prof.sample[:, p:] * CODE_SPACING])
        width = settings.width or choose_width(coords, prof.rows, cell_target(settings, prof.rows))
        axes = np.zeros((d, num_axes.shape[1]))
        axes[:p] = num_axes
    return Grid(
        center=tuple(map(float, np.concatenate([prof.center[:p], np.zeros(d - p)]))),
        inv_scale=tuple(map(float, np.concatenate([1.0 / prof.scale[:p], np.ones(d - p)]))),
        width=float(width),
        axes=tuple(tuple(map(float, r)) for r in axes),
        sums_scaled=True,
    )


def numeric_positions(d: int, groups: Sequence[np.ndarray]) -> np.ndarray:
    """Positions of the numeric columns among d, the categorical columns' indicators being ``groups``."""
    numeric = np.ones(d, dtype=bool)
    for pos in groups:
        numeric[pos] = False
    return np.flatnonzero(numeric)


def cells_statement_with_codes(
    source: Source, columns: Sequence[str], grid: Grid, groups: Sequence[np.ndarray], code_names: Sequence[str], target: Any,
    partition: sqlgen.Partitioning | None = None, where: Any = None,
) -> tuple[Any, Grid, np.ndarray]:
    """The cell statement of a run with categorical columns (keyed by the numeric grid and each column's
    code; with ``partition`` by (partition, cell, codes), ``where`` filtering the rows), the grid on the
    numeric columns alone, and those columns' positions."""
    sub, num_idx = numeric_grid(grid, len(columns), groups)
    statement = sqlgen.cells_statement(source, [columns[j] for j in num_idx], sub, target, extra_keys=code_names,
                                       partition=partition, where=where)
    return statement, sub, num_idx


def numeric_grid(grid: Grid, d: int, groups: Sequence[np.ndarray]) -> tuple[Grid, np.ndarray]:
    """The grid on the numeric columns alone (none: no key but the codes), and their positions among d."""
    num_idx = numeric_positions(d, groups)
    center, inv_scale = np.asarray(grid.center), np.asarray(grid.inv_scale)
    sub = Grid(center=tuple(center[num_idx]), inv_scale=tuple(inv_scale[num_idx]), width=grid.width,
               axes=tuple(tuple(r) for r in np.asarray(grid.axes)[num_idx]) if len(num_idx) else None, sums_scaled=True)
    return sub, num_idx


def run_cell_pass_with_codes(
    engine: Engine, source: Source, columns: Sequence[str], grid: Grid, groups: Sequence[np.ndarray], code_names: Sequence[str]
) -> CellPass:
    """The cell pass of a run with categorical columns: GROUP BY the numeric grid key and each categorical
    column's code.  Only the numeric columns are summed in SQL; every row of a cell has the same
    indicators, so their sums follow exactly from the cell's count (``categorical.indicator_cells``)."""
    t0 = time.perf_counter()
    statement, sub, num_idx = cells_statement_with_codes(source, columns, grid, groups, code_names, engine.target)
    cp = cells_with_codes(engine.query(statement), grid, sub, num_idx, groups, len(columns))
    cp.seconds = time.perf_counter() - t0
    return cp


def cells_with_codes(got: dict[str, np.ndarray], grid: Grid, sub: Grid, num_idx: np.ndarray, groups: Sequence[np.ndarray],
                     d: int) -> CellPass:
    """The cells of a cell statement with category codes (``cells_statement_with_codes``), in key order: the
    numeric columns' sums as returned, the indicators' from each cell's count and code."""
    center, inv_scale = np.asarray(grid.center), np.asarray(grid.inv_scale)
    names = sub.key_names()
    n_all = np.asarray(got["n"], dtype=np.float64)
    null = null_mask(got[names[0]]) if names else np.zeros(len(n_all), dtype=bool)
    skipped = int(n_all[null].sum())
    keep = ~null
    n = n_all[keep]
    ls, ss = np.zeros((len(n), d)), np.zeros((len(n), d))
    if len(num_idx):
        numeric_cf = cf_from_result(got, len(num_idx), keep)
        ls[:, num_idx], ss[:, num_idx] = numeric_cf.ls, numeric_cf.ss
    codes = np.column_stack([np.asarray(unmasked(got[f"q{i}"]), dtype=np.float64)[keep] for i in range(len(groups))])
    for i, pos in enumerate(groups):
        ls[:, pos], ss[:, pos] = cat.indicator_cells(n, codes[:, i], center[pos], inv_scale[pos])
    keys = np.column_stack([np.asarray(unmasked(got[k]), dtype=np.float64)[keep] for k in names] + [codes]) if names else codes
    order = np.lexsort(keys.T[::-1])
    cells = CF(n, ls, ss)[order]
    return CellPass(cells=cells, keys=keys[order], usable=int(round(n.sum())), skipped=skipped, seconds=0.0)


def code_assignment(
    columns: Sequence[str], assign: Assignment, groups: Sequence[np.ndarray], code_names: Sequence[str]
) -> tuple[list[str], Assignment, list[sqlgen.CodeLookup]]:
    """The nearest-centroid SQL of a run with categorical columns: the numeric columns' assignment, and per
    categorical column a lookup of the squared distance its indicators add, by category code:
    D_i[q] = sum_c w_c^2 ((delta_cq - m_c) s_c - C_ic)^2 over the column's indicators c."""
    d = len(columns)
    idx = numeric_positions(d, groups)
    center, inv_scale = np.asarray(assign.center), np.asarray(assign.inv_scale)
    w2 = np.asarray(assign.weights) ** 2
    cent = np.asarray(assign.centroids, dtype=np.float64).reshape(len(assign.centroids), d)
    lookups = []
    for pos, name in zip(groups, code_names):
        rows_u = (np.eye(len(pos)) - center[pos][None, :]) * inv_scale[pos][None, :]  # (codes, indicators)
        diff = rows_u[None, :, :] - cent[:, pos][:, None, :]  # (k, codes, indicators)
        tables = (diff * diff * w2[pos][None, None, :]).sum(axis=2)
        lookups.append(sqlgen.CodeLookup(name, tuple(tuple(map(float, t)) for t in tables)))
    numeric_assign = Assignment(
        tuple(center[idx].tolist()), tuple(inv_scale[idx].tolist()), tuple(np.asarray(assign.weights)[idx].tolist()),
        tuple(tuple(map(float, c[idx])) for c in cent), ids=assign.ids,
    )
    return [columns[j] for j in idx], numeric_assign, lookups


def run_refine_pass_with_codes(
    engine: Engine, source: Source, columns: Sequence[str], assign: Assignment, groups: Sequence[np.ndarray],
    code_names: Sequence[str],
) -> RefineResult:
    """``run_refine_pass`` for a run with categorical columns: one GROUP BY (segment, codes); the
    indicators' linear sums follow from the counts per code."""
    t0 = time.perf_counter()
    d = len(columns)
    numeric_cols, numeric_assign, lookups = code_assignment(columns, assign, groups, code_names)
    num_idx = [columns.index(c) for c in numeric_cols]
    got = engine.query(sqlgen.refine_statement(source, numeric_cols, numeric_assign, engine.target, lookups=lookups))
    got = rows_in_key_order(got, ["segment", *[f"q{g}" for g in range(len(groups))]])
    seg, null, n_all = refine_rows(got, assign)
    k = len(assign.centroids)
    n_rows = n_all[~null]
    n = np.bincount(seg, weights=n_rows, minlength=k)
    center, inv_scale = np.asarray(assign.center), np.asarray(assign.inv_scale)
    ls_u = np.zeros((k, d))
    for j, col_j in zip(num_idx, range(len(num_idx))):
        ls_u[:, j] = np.bincount(seg, weights=np.asarray(got[f"ls{col_j}"], dtype=np.float64)[~null], minlength=k)  # scaled
    for g, pos in enumerate(groups):
        codes = np.asarray(unmasked(got[f"q{g}"]), dtype=np.float64)[~null]
        ls_c, _ = cat.indicator_cells(n_rows, codes, center[pos], inv_scale[pos])
        for c_i, j in enumerate(pos):
            ls_u[:, j] = np.bincount(seg, weights=ls_c[:, c_i], minlength=k)
    return refine_result(got, assign, seg, null, n_all, n, ls_u, t0)
