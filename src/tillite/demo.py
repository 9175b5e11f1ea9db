"""Seeded generator of the invented demo data: meter-days of the Saltmere Bay water co-operative.

Everything here is invented: Saltmere Bay, its water co-operative, its districts,
its meters and their readings.  No real people, brands, places or data sets.

The co-operative keeps one row per meter per day in ``meter_days``::

    meter_id        INTEGER  meter number, 0 .. meters-1
    district        VARCHAR  one of DISTRICTS
    day             DATE     consecutive days from 2026-01-01
    litres          DOUBLE   litres used that day (NULL on a failed read)
    night_share     DOUBLE   share of the day's litres used between 00:00 and 05:00
                             (0..1; NaN on a failed read)
    peak_litres     DOUBLE   litres in the busiest hour
    flow_run_hours  INTEGER  longest run of hours with continuous flow, 0..24
    zero_hours      INTEGER  hours with zero flow, 0..24

and a small ``meters(meter_id, district, kind)`` table holding the kind each meter
was generated from.  The kind is the invented ground truth, for the walkthrough
and the tests only; a segment found later is a statistical grouping, not a
diagnosis.

How the rows are made
---------------------
All generation runs inside DuckDB; Python only builds one statement (a sqlglot
expression tree, rendered for DuckDB) and never holds the rows, so memory on the
Python side does not grow with the row count.

* Meters come from ``range(meters)``, days from ``range(days)``; the rows are their
  cross product, cut at exactly ``rows`` rows (the last meter may have fewer days).
  Per-meter draws (kind, district, the meter's own level) are made once per meter.
* Every pseudo-random number is ``hash(key, salt, seed)`` of a row, meter or day
  number, a fixed per-draw salt and the seed, mapped to a uniform in (0, 1) by
  ``((h >> 11) + 0.5) / 2**53``; normals come from the Box–Muller transform.  The
  result depends only on (rows, days, seed), not on threads or chunking.
* Litres and peak litres get multiplicative (log-normal) noise: a per-meter level
  and a per-day factor, plus a weekend factor for households and a town-wide
  "dry day" factor for garden irrigation.  Shares and hours get additive normal
  noise, rounded and clipped to their ranges; ``zero_hours <= 24 - flow_run_hours``
  and ``peak_litres <= litres`` always hold.
* About 0.2 % of rows are failed reads: 0.15 % have NULL ``litres`` and 0.05 % have
  NaN ``night_share``.

At very small sizes (a few dozen meters) the rare kinds may be missing by chance;
``DemoSummary.kinds`` says how many meters each kind got.
"""

from __future__ import annotations

import datetime as _dt
import math
import operator
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import duckdb
from sqlglot import exp

from .errors import EngineError, ParameterError
from .outputs import has_duckdb_header
from .sqlgen import (
    OWNED_MARK,
    Source,
    all_of,
    case_when,
    col,
    comment_of_statement,
    join_table_name,
    describe_statement,
    greatest_of,
    least_of,
    list_tables_statement,
    mark_statement,
    num,
    paren,
    subquery,
    to_double,
    total_sum,
)

__all__ = [
    "demo_tables_present",
    "DEMO_COLUMNS",
    "DISTRICTS",
    "KINDS",
    "MeterKind",
    "MIN_ROWS",
    "MAX_ROWS",
    "START_DAY",
    "METERS_TABLE",
    "DemoSummary",
    "build_demo_database",
    "check_demo_database_file",
    "DEMO_MARK",
    "DEMO_TABLE_COLUMNS",
    "METERS_TABLE_COLUMNS",
    "write_demo_parquet",
    "demo_select",
]

#: The numeric columns a segmentation of the demo works on.
DEMO_COLUMNS: tuple[str, ...] = ("litres", "night_share", "peak_litres", "flow_run_hours", "zero_hours")

#: Invented districts of Saltmere Bay.
DISTRICTS: tuple[str, ...] = ("Harbour Row", "Dune Heights", "Old Quay", "Lantern Hill", "Marsh End", "Cliff Walk")

MIN_ROWS = 1_000
MAX_ROWS = 100_000_000
START_DAY = _dt.date(2026, 1, 1)
METERS_TABLE = "meters"

#: The comment on the demo's tables: tillite's mark (as on its label views, stores and cell map tables),
#: so that rebuilding replaces the demo's own tables and never a user's tables of the same names.
DEMO_MARK = f"{OWNED_MARK}: demo table"

#: The meter-days and meters tables' columns and DuckDB types, as the demo builds them.  A table of the
#: demo's name without DEMO_MARK but with exactly these columns was built by a version before the mark, and
#: is replaced as the demo's own (a user's table of that name and shape would hold invented data anyway).
DEMO_TABLE_COLUMNS: tuple[tuple[str, str], ...] = (
    ("meter_id", "INTEGER"), ("district", "VARCHAR"), ("day", "DATE"), ("litres", "DOUBLE"), ("night_share", "DOUBLE"),
    ("peak_litres", "DOUBLE"), ("flow_run_hours", "INTEGER"), ("zero_hours", "INTEGER"),
)
METERS_TABLE_COLUMNS: tuple[tuple[str, str], ...] = (("meter_id", "INTEGER"), ("district", "VARCHAR"), ("kind", "VARCHAR"))

#: The demo report's caution: the general one (report.CAUTION), then what it means for this demo.
REPORT_CAUTION = (
    "A segment is a statistical grouping of rows that look alike on the chosen columns, not a diagnosis. "
    "In this demo, a segment named, say, 'probable leak' lists meters for the co-operative's usual inspection "
    "procedure to confirm; it does not show that any one of them leaks."
)

_FAIL_NULL_LITRES = 0.0015  # share of rows with NULL litres
_FAIL_NAN_NIGHT = 0.0005  # share of rows with NaN night_share


@dataclass(frozen=True)
class MeterKind:
    """Generating profile of one meter kind (all figures invented)."""

    name: str
    share: float  # share of meters
    litres: float  # typical litres per day (median)
    litres_meter_sd: float  # log-sd of the meter's own level around `litres`
    litres_day_sd: float  # log-sd of day-to-day noise
    weekend: float  # litres factor on Saturdays and Sundays
    dry_day: float  # log-sensitivity to the town-wide dry-day factor
    night: float  # typical night share
    night_meter_sd: float
    night_day_sd: float
    peak: float  # typical peak-hour litres (drawn as a ratio to litres, see peak_ratio)
    peak_sd: float  # log-sd of the peak ratio
    run: float  # typical longest flow run, hours
    run_sd: float
    zero: float  # typical zero-flow hours
    zero_sd: float
    habit_sd: float  # per-meter shift of run (and opposite shift of zero), hours
    districts: tuple[float, ...]  # weights over DISTRICTS
    always_on: bool = False  # continuous flow: run is 24 most days, zero hours 0
    always_on_share: float = 0.0  # share of days with a 24-hour run

    @property
    def peak_ratio(self) -> float:
        """Typical peak-hour litres as a share of the day's litres."""
        return self.peak / self.litres


#: Meter kinds in code order (code = index).  Shares sum to 1.  One row per kind, the figures
#: in MeterKind's field order: name, share, litres, litres_meter_sd, litres_day_sd, weekend,
#: dry_day | night, night_meter_sd, night_day_sd | peak, peak_sd | run, run_sd | zero, zero_sd,
#: habit_sd | districts.
KINDS: tuple[MeterKind, ...] = (
    MeterKind("steady household", 0.55, 320.0, 0.25, 0.18, 1.12, 0.0, 0.04, 0.010, 0.012, 70.0, 0.15, 3.0, 0.9, 9.0, 1.5, 0.4, (0.15, 0.15, 0.12, 0.22, 0.22, 0.14)),
    MeterKind("large household", 0.20, 850.0, 0.20, 0.18, 1.10, 0.0, 0.05, 0.012, 0.015, 190.0, 0.15, 5.0, 1.0, 5.0, 1.3, 0.4, (0.10, 0.25, 0.08, 0.17, 0.15, 0.25)),
    MeterKind("holiday home", 0.12, 25.0, 0.40, 0.45, 1.60, 0.0, 0.02, 0.008, 0.012, 10.0, 0.20, 1.0, 0.5, 21.0, 1.2, 0.2, (0.35, 0.10, 0.35, 0.05, 0.05, 0.10)),
    MeterKind("garden irrigation", 0.09, 1400.0, 0.20, 0.22, 1.0, 0.25, 0.35, 0.040, 0.050, 450.0, 0.15, 6.0, 1.0, 8.0, 1.5, 0.4, (0.05, 0.30, 0.05, 0.15, 0.20, 0.25)),
    MeterKind("probable leak", 0.04, 700.0, 0.25, 0.12, 1.0, 0.0, 0.22, 0.030, 0.030, 80.0, 0.15, 19.0, 2.5, 0.0, 0.0, 0.0, (0.25, 0.10, 0.30, 0.15, 0.10, 0.10),
              always_on=True, always_on_share=0.85),
)

# Salts of the independent draws.  Meter, day and row numbers overlap, so every
# draw has its own salt; changing one changes the data of every seed.
_S_KIND, _S_DISTRICT = 1, 2
_S_M1A, _S_M1B, _S_M2A, _S_M2B = 3, 4, 5, 6  # per-meter normals (two Box–Muller pairs)
_S_D1A, _S_D1B = 11, 12  # per-day normal (dry-day factor)
_S_R1A, _S_R1B, _S_R2A, _S_R2B, _S_R3A, _S_R3B = 21, 22, 23, 24, 25, 26  # per-row normals
_S_FAIL, _S_ALWAYS_ON = 27, 28

_TWO_POW_53 = 9007199254740992


@dataclass(frozen=True)
class DemoSummary:
    """What ``build_demo_database`` wrote.

    ``kinds`` maps each kind name of ``KINDS`` to its number of meters (0 if absent).
    """

    path: Path
    table: str
    rows: int
    days: int
    meters: int
    seed: int
    kinds: dict[str, int] = field(default_factory=dict)


# --------------------------------------------------------------------------- sqlglot helpers
#
# Literals, columns, parens, subqueries, CASE, LEAST/GREATEST and casts come from
# tillite.sqlgen.  ``num`` writes floats in exponent form (``2.235294117647059e-01``),
# which DuckDB reads as a DOUBLE: a CASE over plain ``0.2235...`` literals would be
# read as DECIMALs and widen to a slow 128-bit DECIMAL.


def _ident(name: str) -> exp.Identifier:
    return exp.to_identifier(name, quoted=True)


def _fn(name: str, *args: exp.Expression) -> exp.Expression:
    return exp.func(name, *args)


def _as(expression: exp.Expression, name: str) -> exp.Alias:
    return exp.Alias(this=expression, alias=_ident(name))


def _clip(x: exp.Expression, lo: exp.Expression, hi: exp.Expression) -> exp.Expression:
    return greatest_of([lo, least_of([hi, x])])


def _by_kind(values: Sequence[exp.Expression]) -> exp.Expression:
    """``CASE k WHEN 0 THEN v0 ... ELSE v_last END`` over the kind code column."""
    case = exp.case(col("k"))
    for code, value in enumerate(values[:-1]):
        case = case.when(num(code), value)
    return case.else_(values[-1])


def _uniform(key: str, salt: int, seed: int) -> exp.Expression:
    """Uniform in the open interval (0, 1) from ``hash(key, salt, seed)`` of the BIGINT column ``key``."""
    h = _fn("hash", col(key), exp.cast(num(salt), "BIGINT"), exp.cast(num(seed), "BIGINT"))
    top53 = paren(exp.BitwiseRightShift(this=h, expression=num(11)))
    return (to_double(top53) + num(0.5)) / num(_TWO_POW_53)


def _bm_radius(key: str, salt: int, seed: int) -> exp.Expression:
    """Box–Muller radius sqrt(-2 ln u)."""
    return _fn("sqrt", num(-2.0) * _fn("ln", _uniform(key, salt, seed)))


def _bm_angle(key: str, salt: int, seed: int) -> exp.Expression:
    """Box–Muller angle 2 pi u."""
    return num(2.0 * math.pi) * _uniform(key, salt, seed)


def _bm_columns(key: str, seed: int, *draws: tuple[int, int, str, str]) -> list[exp.Expression]:
    """A Box–Muller radius and angle column per (radius salt, angle salt, radius name, angle name)."""
    columns: list[exp.Expression] = []
    for radius_salt, angle_salt, radius, angle in draws:
        columns += [_as(_bm_radius(key, radius_salt, seed), radius), _as(_bm_angle(key, angle_salt, seed), angle)]
    return columns


def _bm_pair(radius: str, angle: str) -> tuple[exp.Expression, exp.Expression]:
    """Two independent standard normals from a Box–Muller radius and angle column."""
    return (
        col(radius) * _fn("cos", col(angle)),
        col(radius) * _fn("sin", col(angle)),
    )


def _select(projections: Sequence[exp.Expression], source: exp.Expression) -> exp.Select:
    return exp.select(*projections, copy=False).from_(source, copy=False)


def _range(n: int, alias: str, column: str) -> exp.Table:
    return exp.Table(
        this=_fn("range", num(n)),
        alias=exp.TableAlias(this=_ident(alias), columns=[_ident(column)]),
    )


# --------------------------------------------------------------------------- statements


def _check_int(name: str, value: object, lo: int, hi: int | None = None) -> int:
    if isinstance(value, bool):
        raise TypeError(f"{name} must be an int, got {value!r}")
    try:
        value = operator.index(value)  # type: ignore[arg-type]
    except TypeError:
        raise TypeError(f"{name} must be an int, got {value!r}") from None
    if value < lo or (hi is not None and value > hi):
        bound = f"between {lo:,} and {hi:,}" if hi is not None else f">= {lo:,}"
        raise ValueError(f"{name} must be {bound}, got {value!r}")
    return value


def _check_args(rows: object, days: object, seed: object) -> tuple[int, int, int]:
    rows = _check_int("rows", rows, MIN_ROWS, MAX_ROWS)
    days = _check_int("days", days, 1)
    seed = _check_int("seed", seed, -(2**63), 2**63 - 1)
    return rows, days, seed


def _meter_select(meters: int, seed: int) -> exp.Select:
    """One row per meter: kind code, district, kind name and the meter's own levels.

    Columns: mid, k, kind, district, lvl_litres, lvl_night, peak_ratio, base_run, base_zero,
    sd_litres, sd_night, sd_peak, sd_run, sd_zero, log_weekend, dry_sens, always_on, on_share.
    """
    mid = "mid"
    # kind code from cumulative shares
    kind_case = exp.case()
    cum = 0.0
    for code, kind in enumerate(KINDS[:-1]):
        cum += kind.share
        kind_case = kind_case.when(col("uk") < num(round(cum, 12)), num(code))
    kind_case = kind_case.else_(num(len(KINDS) - 1))

    draws = _select(
        [
            _as(col(mid), "mid"),
            _as(_uniform(mid, _S_KIND, seed), "uk"),
            _as(_uniform(mid, _S_DISTRICT, seed), "ud"),
            *_bm_columns(mid, seed, (_S_M1A, _S_M1B, "r1", "t1"), (_S_M2A, _S_M2B, "r2", "t2")),
        ],
        _range(meters, "m", "mid"),
    )

    # district from per-kind weights
    district_cases = []
    for kind in KINDS:
        total = sum(kind.districts)
        case = exp.case()
        cum = 0.0
        for name, weight in zip(DISTRICTS[:-1], kind.districts[:-1]):
            cum += weight / total
            case = case.when(col("ud") < num(round(cum, 12)), exp.Literal.string(name))
        district_cases.append(case.else_(exp.Literal.string(DISTRICTS[-1])))

    z_litres, z_night = _bm_pair("r1", "t1")

    def per_kind(attr: str) -> exp.Expression:
        return _by_kind([num(getattr(kind, attr)) for kind in KINDS])

    coded = _select([exp.Star(), _as(kind_case, "k")], subquery(draws, "md"))
    levels = _select(
        [
            col("mid"),
            col("k"),
            _as(_by_kind([exp.Literal.string(kind.name) for kind in KINDS]), "kind"),
            _as(_by_kind(district_cases), "district"),
            _as(
                per_kind("litres") * _fn("exp", per_kind("litres_meter_sd") * z_litres),
                "lvl_litres",
            ),
            _as(per_kind("night") + per_kind("night_meter_sd") * z_night, "lvl_night"),
            _as(_by_kind([num(kind.peak_ratio) for kind in KINDS]), "peak_ratio"),
            _as(per_kind("run") + per_kind("habit_sd") * _bm_pair("r2", "t2")[0], "base_run"),
            _as(per_kind("zero") - num(2.0) * per_kind("habit_sd") * _bm_pair("r2", "t2")[0], "base_zero"),
            _as(per_kind("litres_day_sd"), "sd_litres"),
            _as(per_kind("night_day_sd"), "sd_night"),
            _as(per_kind("peak_sd"), "sd_peak"),
            _as(per_kind("run_sd"), "sd_run"),
            _as(per_kind("zero_sd"), "sd_zero"),
            _as(_by_kind([num(math.log(kind.weekend)) for kind in KINDS]), "log_weekend"),
            _as(per_kind("dry_day"), "dry_sens"),
            _as(_by_kind([exp.true() if kind.always_on else exp.false() for kind in KINDS]), "always_on"),
            _as(per_kind("always_on_share"), "on_share"),
        ],
        subquery(coded, "mk"),
    )
    return levels


def _day_select(days: int, seed: int) -> exp.Select:
    """One row per day: di, weekend flag (0/1) and the town-wide dry-day normal."""
    di = "di"
    # 2026-01-01 is a Thursday; with Monday = 0, weekday = (di + 3) % 7; 5, 6 = weekend
    weekday = paren(col(di) + num(START_DAY.weekday())) % num(7)
    weekend = case_when(weekday >= num(5), num(1.0)).else_(num(0.0), copy=False)
    z_dry = _bm_radius(di, _S_D1A, seed) * _fn("cos", _bm_angle(di, _S_D1B, seed))
    return _select([_as(col(di), "di"), _as(weekend, "weekend"), _as(z_dry, "z_dry")], _range(days, "d", "di"))


def demo_select(rows: int = 1_000_000, days: int = 60, seed: int = 7) -> exp.Select:
    """The SELECT (a sqlglot tree) producing the ``meter_days`` rows, in column order.

    Render with ``.sql(dialect="duckdb")``; it relies on DuckDB's ``hash`` and ``range``.
    """
    rows, days, seed = _check_args(rows, days, seed)
    meters = math.ceil(rows / days)
    day_count = min(days, rows)

    def rn() -> exp.Expression:
        return col("mid", "ml") * num(days) + col("di", "dd")

    crossed = (
        exp.select(
            _as(rn(), "rn"),
            exp.Star(),  # ml.*, dd.*  (column names are disjoint)
            copy=False,
        )
        .from_(subquery(_meter_select(meters, seed), "ml"), copy=False)
        .join(subquery(_day_select(day_count, seed), "dd"), join_type="CROSS", copy=False)
        .where(rn() < num(rows), copy=False)
    )

    key = "rn"
    draws = _select(
        [
            exp.Star(),
            *_bm_columns(key, seed, (_S_R1A, _S_R1B, "q1", "a1"), (_S_R2A, _S_R2B, "q2", "a2"), (_S_R3A, _S_R3B, "q3", "a3")),
            _as(_uniform(key, _S_FAIL, seed), "uf"),
        ],
        subquery(crossed, "x"),
    )

    z_l, z_n = _bm_pair("q1", "a1")
    z_p = _bm_pair("q2", "a2")[0]
    z_z, _unused = _bm_pair("q3", "a3")
    litres = col("lvl_litres") * _fn(
        "exp",
        total_sum([col("sd_litres") * z_l, col("log_weekend") * col("weekend"), col("dry_sens") * col("z_dry")]),
    )
    always_on_run = case_when(_uniform(key, _S_ALWAYS_ON, seed) < col("on_share"), num(24)).else_(
        _clip(_fn("round", col("base_run") + col("sd_run") * _bm_pair("q2", "a2")[1]), num(0), num(23)), copy=False
    )
    run = case_when(col("always_on"), always_on_run).else_(
        _clip(_fn("round", col("base_run") + col("sd_run") * _bm_pair("q2", "a2")[1]), num(0), num(24)), copy=False
    )
    values = _select(
        [
            col("mid"),
            col("district"),
            col("di"),
            col("uf"),
            _as(_fn("round", litres, num(1)), "v_litres"),
            _as(_clip(col("lvl_night") + col("sd_night") * z_n, num(0.0), num(1.0)), "v_night"),
            _as(col("peak_ratio") * _fn("exp", col("sd_peak") * z_p), "v_peak_ratio"),
            _as(run, "v_run"),
            _as(col("base_zero") + col("sd_zero") * z_z, "v_zero_raw"),
        ],
        subquery(draws, "w"),
    )

    def v_litres() -> exp.Column:
        return col("v_litres")

    def uf() -> exp.Column:
        return col("uf")

    final = _select(
        [
            _as(exp.cast(col("mid"), "INTEGER"), "meter_id"),
            _as(col("district"), "district"),
            _as(exp.cast(exp.Literal.string(START_DAY.isoformat()), "DATE") + exp.cast(col("di"), "INTEGER"), "day"),
            _as(
                case_when(uf() < num(_FAIL_NULL_LITRES), exp.null()).else_(v_litres(), copy=False),
                "litres",
            ),
            _as(
                case_when(
                    all_of([uf() >= num(_FAIL_NULL_LITRES), uf() < num(_FAIL_NULL_LITRES + _FAIL_NAN_NIGHT)]),
                    to_double(exp.Literal.string("NaN")),
                ).else_(_fn("round", col("v_night"), num(4)), copy=False),
                "night_share",
            ),
            _as(
                _fn("round", least_of([v_litres(), v_litres() * col("v_peak_ratio")]), num(1)),
                "peak_litres",
            ),
            _as(exp.cast(col("v_run"), "INTEGER"), "flow_run_hours"),
            _as(
                exp.cast(
                    _clip(_fn("round", col("v_zero_raw")), num(0), num(24) - col("v_run")),
                    "INTEGER",
                ),
                "zero_hours",
            ),
        ],
        subquery(values, "v"),
    )
    return final


def _meters_table_select(meters: int, seed: int) -> exp.Select:
    """The SELECT of the ``meters`` table: meter_id, district, kind (the invented ground truth)."""
    return _select(
        [
            _as(exp.cast(col("mid"), "INTEGER"), "meter_id"),
            _as(col("district"), "district"),
            _as(col("kind"), "kind"),
        ],
        subquery(_meter_select(meters, seed), "ml"),
    ).order_by(col("meter_id"), copy=False)


def _connect(database: str) -> duckdb.DuckDBPyConnection:
    from .engines import connect_duckdb  # new files in the storage format older DuckDB shells open

    con = connect_duckdb(database)
    con.execute("SET enable_progress_bar = false")
    return con


def _table_exists(con: duckdb.DuckDBPyConnection, name: str) -> bool:
    return bool(con.execute(list_tables_statement(named=name).sql(dialect="duckdb")).fetchall())


def check_demo_database_file(path: str | os.PathLike[str]) -> None:
    """A file at ``path`` that is not a DuckDB database is refused in one line naming it (DuckDB would say only
    "not a valid DuckDB database file"); a missing file is fine: the demo creates it."""
    path = Path(path)
    if path.is_dir():
        raise ParameterError(f"{{path}} {path} is a folder; give the demo's DuckDB database file", "path")
    if not path.exists():
        return
    try:
        duckdb_file = has_duckdb_header(path)
    except OSError as err:
        raise ParameterError(f"{{path}} {path} cannot be read: {err.strerror}", "path") from None
    if not duckdb_file:
        raise ParameterError(f"{{path}} {path} exists and is not a DuckDB database; the demo builds its tables only in a "
                             "DuckDB file and never writes over another file: give another {path}", "path")


def _check_demos_own(con: duckdb.DuckDBPyConnection, path: Path, name: str, table: str) -> None:
    """Refuse to replace ``name`` unless it is the demo's own table: marked DEMO_MARK, or unmarked from a version
    before the mark, recognised by ``_built_before_the_mark``."""
    kind = con.execute(list_tables_statement(named=name).sql(dialect="duckdb")).fetchall()[0][2]
    comment = con.execute(comment_of_statement(join_table_name([name]), "duckdb").sql(dialect="duckdb")).fetchall()
    if "VIEW" not in kind.upper() and comment and comment[0][0] == DEMO_MARK:
        return
    if "VIEW" not in kind.upper() and _built_before_the_mark(con, table):
        return
    raise ParameterError(
        f"{{path}} {path}: {'view' if 'VIEW' in kind.upper() else 'table'} {name} was not made by the demo (it carries no "
        "tillite mark), so the demo does not replace it; give another {path} for the demo", "path",
    )


def _built_before_the_mark(con: duckdb.DuckDBPyConnection, table: str) -> bool:
    """Whether the tables are the demo's from a version that did not mark them: every one of them there has exactly
    the demo's columns, and the meters table is there and holds only the demo's invented kinds and districts."""
    if not _table_exists(con, METERS_TABLE):
        return False
    for name, columns in ((table, DEMO_TABLE_COLUMNS), (METERS_TABLE, METERS_TABLE_COLUMNS)):
        if _table_exists(con, name) and _columns_of(con, name) != columns:
            return False
    kinds_query = _select([col("kind"), col("district")], exp.Table(this=_ident(METERS_TABLE))).distinct()
    found = con.execute(kinds_query.sql(dialect="duckdb")).fetchall()
    return all(k in {kind.name for kind in KINDS} and d in DISTRICTS for k, d in found)


def _columns_of(con: duckdb.DuckDBPyConnection, name: str) -> tuple[tuple[str, str], ...]:
    """(name, DuckDB type) of each column of a table."""
    cursor = con.execute(describe_statement(Source.of_table(name)).sql(dialect="duckdb"))
    return tuple((d[0], str(d[1]).upper()) for d in cursor.description)


def build_demo_database(
    path: str | os.PathLike[str],
    rows: int = 1_000_000,
    days: int = 60,
    seed: int = 7,
    table: str = "meter_days",
    replace: bool = False,
) -> DemoSummary:
    """Create the demo DuckDB file with the tables ``table`` (meter-days) and ``meters``.

    ``rows`` (1,000 .. 100,000,000) rows are written to ``table``: meters
    ``0 .. ceil(rows / days) - 1`` with ``days`` consecutive days each from
    2026-01-01, the last meter possibly with fewer days.  The same
    (rows, days, seed) always gives the same tables.

    The file is created if missing.  If ``table`` or ``meters`` already exists in
    it, ``FileExistsError`` is raised unless ``replace=True``, which replaces both,
    but only when they are the demo's own: both tables carry ``DEMO_MARK`` (their
    comment), and an unmarked table (or a view) of either name raises ParameterError
    naming it, unless the pair was built by a version before the mark
    (``_built_before_the_mark``).  Both tables are written and marked in one transaction.

    Raises ValueError for out-of-range ``rows``, ``days`` or ``seed`` and for a
    ``table`` name that is empty or clashes with ``meters``; ParameterError for a
    ``path`` that is not a DuckDB file.
    """
    rows, days, seed = _check_args(rows, days, seed)
    if not isinstance(table, str) or not table.strip():
        raise ValueError(f"table must be a non-empty name, got {table!r}")
    if table.lower() == METERS_TABLE:
        raise ValueError(f"table must not be called {METERS_TABLE!r}: that name holds the meter kinds")
    meters = math.ceil(rows / days)
    path = Path(path)

    check_demo_database_file(path)
    from .engines import duckdb_errors

    try:
        with duckdb_errors():
            return _build_demo_tables(path, table, rows, days, seed, meters, replace)
    except EngineError as err:  # DuckDB's own line (a damaged file, a full disk), said with the file it is about
        raise type(err)(f"demo database {path}: {err}", err.sqlstate) from None


def demo_tables_present(path: str | os.PathLike[str], table: str = "meter_days") -> bool:
    """Whether the DuckDB file at ``path`` already holds the demo's own tables (both), so a run may reuse them.

    False when it holds neither (the demo builds them).  A table of either name that the demo did not make
    is refused in one line naming it, as ``--rebuild`` refuses it; so is one table without the other.
    """
    path = Path(path)
    if not path.exists():
        return False
    con = _connect(str(path))
    try:
        existing = [name for name in (table, METERS_TABLE) if _table_exists(con, name)]
        for name in existing:
            _check_demos_own(con, path, name, table)
    finally:
        con.close()
    if len(existing) == 1:
        raise ParameterError(f"{{path}} {path} holds the demo's table {existing[0]} without its partner; "
                             "give --rebuild to make both again", "path")
    return bool(existing)


def _build_demo_tables(path: Path, table: str, rows: int, days: int, seed: int, meters: int, replace: bool) -> DemoSummary:
    """build_demo_database's work on the file, in one transaction."""
    con = _connect(str(path))
    try:
        existing = [name for name in (table, METERS_TABLE) if _table_exists(con, name)]
        if existing and not replace:
            raise FileExistsError(
                f"{path}: table(s) {', '.join(repr(n) for n in existing)} already exist; pass replace=True to replace them"
            )
        for name in existing:
            _check_demos_own(con, path, name, table)
        statements = [
            exp.Create(
                this=exp.Table(this=_ident(table)),
                kind="TABLE",
                expression=demo_select(rows, days, seed),
                replace=True,
            ),
            exp.Create(
                this=exp.Table(this=_ident(METERS_TABLE)),
                kind="TABLE",
                expression=_meters_table_select(meters, seed),
                replace=True,
            ),
            *(mark_statement(join_table_name([name]), "table", DEMO_MARK, "duckdb") for name in (table, METERS_TABLE)),
        ]
        from .engines import duckdb_transaction

        with duckdb_transaction(con):
            for statement in statements:
                con.execute(statement.sql(dialect="duckdb"))
        counts_query = _select(
            [col("kind"), _fn("count", exp.Star())],
            exp.Table(this=_ident(METERS_TABLE)),
        ).group_by(col("kind"), copy=False)
        found = dict(con.execute(counts_query.sql(dialect="duckdb")).fetchall())
    finally:
        con.close()

    kinds = {kind.name: int(found.get(kind.name, 0)) for kind in KINDS}
    return DemoSummary(path=path, table=table, rows=rows, days=days, meters=meters, seed=seed, kinds=kinds)


def write_demo_parquet(
    directory: str | os.PathLike[str],
    rows: int = 1_000_000,
    days: int = 60,
    seed: int = 7,
) -> list[Path]:
    """Write the demo meter-days as one Parquet file per day, hive-style.

    Layout: ``directory/day=YYYY-MM-DD/part-0.parquet``; the files hold every
    column except ``day``, which lives in the folder name (read back with
    ``read_parquet('directory/*/*.parquet', hive_partitioning = true)``).  The rows
    are the same as ``build_demo_database`` writes for the same (rows, days, seed).

    ``directory`` is created if missing and must be empty otherwise
    (``FileExistsError``).  Returns the written files sorted by day.
    """
    rows, days, seed = _check_args(rows, days, seed)
    directory = Path(directory)
    if directory.exists():
        if not directory.is_dir():
            raise FileExistsError(f"{directory}: exists and is not a directory")
        if any(directory.iterdir()):
            raise FileExistsError(f"{directory}: directory is not empty")
    directory.mkdir(parents=True, exist_ok=True)

    copy = exp.Copy(
        this=exp.Subquery(this=demo_select(rows, days, seed)),
        kind=False,
        files=[exp.Literal.string(str(directory))],
        params=[
            exp.CopyParameter(this=exp.var("FORMAT"), expression=exp.var("parquet")),
            exp.CopyParameter(
                this=exp.var("PARTITION_BY"),
                expression=paren(col("day")),
            ),
            exp.CopyParameter(this=exp.var("FILENAME_PATTERN"), expression=exp.Literal.string("part-{i}")),
        ],
    )
    con = _connect(":memory:")
    try:
        con.execute(copy.sql(dialect="duckdb"))
    finally:
        con.close()
    return sorted(directory.glob("day=*/*.parquet"))


#: The demo's example of segments within groups: each district segmented on its own.
WITHIN_EXAMPLE_K = 3


def within_district_example(engine: Any, source: Any, k: int = WITHIN_EXAMPLE_K, progress: Any = None) -> str:
    """The printed example of `segment --within district`: k segments per district, from one scan per pass.

    Returns the command it stands for and one line per district (rows, segment shares, and the
    largest segment in words).
    """
    from .pipeline import Settings, segment

    model = segment(engine, source, list(DEMO_COLUMNS), Settings(k=k, within="district"),
                    progress=progress or (lambda stage, message: None))
    from .model import group_models, whole_percents

    lines = [
        f"Segments within each district (tillite segment tillite-demo.duckdb --table meter_days "
        f"--columns {','.join(DEMO_COLUMNS)} --within district --k {k}):",
    ]
    groups = group_models(model)
    width = max(len(g["name"]) for g, _ in groups)
    for g, one in groups:
        shares = ", ".join(f"{p}%" for p in whole_percents(g["sizes"]))
        lines.append(f"  {g['name'].ljust(width)}  {g['rows']:>9,} rows  segments {shares}; largest: {one.segment_description(0)}")
    return "\n".join(lines)
