"""Every SQL statement tillite runs, built as sqlglot expression trees.

One builder per statement kind (describe, count, profile sample, cells, refine,
label).  User-supplied names only ever become quoted identifiers and numbers
only ever become literals, so a column called ``select`` or ``a"b`` is safe and
nothing typed by a user is pasted into SQL text.  ``render`` turns a tree into
text for one dialect; the engines execute the text.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
from sqlglot import exp

__all__ = [
    "Source",
    "Grid",
    "Assignment",
    "render",
    "describe_statement",
    "count_statement",
    "sample_statement",
    "cells_statement",
    "refine_statement",
    "label_select",
    "create_relation_statement",
    "copy_statement",
    "drop_statement",
    "list_tables_statement",
    "KEY_BITS",
]

#: Reserved prefix of the helper columns inside generated queries.
INTERNAL = "__tillite_"

#: Bits given to the packed cell key; each grid axis gets KEY_BITS // axes of them.
KEY_BITS = 62

FILE_READERS = {"parquet": "read_parquet", "csv": "read_csv_auto", "json": "read_json_auto"}


@dataclass(frozen=True)
class Source:
    """Where the rows are: a table (name parts) or files read in place."""

    table: tuple[str, ...] = ()
    files: tuple[str, ...] = ()
    reader: str = "parquet"

    @staticmethod
    def of_table(name: str | Sequence[str]) -> "Source":
        parts = tuple(name.split(".")) if isinstance(name, str) else tuple(name)
        if not parts or any(not p for p in parts):
            raise ValueError(f"not a table name: {name!r}")
        return Source(table=parts)

    @staticmethod
    def of_files(path: str | Sequence[str], reader: str) -> "Source":
        if reader not in FILE_READERS:
            raise ValueError(f"unknown file reader {reader!r}; expected one of {sorted(FILE_READERS)}")
        files = (path,) if isinstance(path, str) else tuple(path)
        return Source(files=files, reader=reader)

    @property
    def label(self) -> str:
        """Human-readable name for messages."""
        return ".".join(self.table) if self.table else ", ".join(self.files)

    def relation(self) -> exp.Expression:
        """The FROM item for this source."""
        if self.table:
            parts = [exp.to_identifier(p, quoted=True) for p in self.table]
            kwargs = {"this": parts[-1]}
            if len(parts) >= 2:
                kwargs["db"] = parts[-2]
            if len(parts) >= 3:
                kwargs["catalog"] = parts[-3]
            return exp.Table(**kwargs)
        paths = [exp.Literal.string(f) for f in self.files]
        arg = paths[0] if len(paths) == 1 else exp.Array(expressions=paths)
        return exp.Table(this=exp.Anonymous(this=FILE_READERS[self.reader], expressions=[arg]))


@dataclass(frozen=True)
class Grid:
    """How rows are binned into cells.

    u_j = (x_j - center_j) * inv_scale_j are the grid's standardised values.  The
    binned coordinates are u itself, or u @ axes (principal-axis scores) when
    ``axes`` is given (shape d x p).  key_a = floor(coord_a / width), clamped to
    the packable range, then packed into one BIGINT.
    """

    center: tuple[float, ...]
    inv_scale: tuple[float, ...]
    width: float
    axes: tuple[tuple[float, ...], ...] | None = None

    @property
    def dims(self) -> int:
        return len(self.axes[0]) if self.axes else len(self.center)

    @property
    def bits(self) -> int:
        return KEY_BITS // self.dims

    @property
    def half_range(self) -> int:
        return 1 << (self.bits - 1)

    def keys_of(self, u: np.ndarray) -> np.ndarray:
        """Per-axis integer keys of standardised rows u (n x d), as SQL computes them."""
        coords = u @ np.asarray(self.axes) if self.axes else u
        h = self.half_range
        return np.clip(np.floor(coords / self.width), -h, h - 1).astype(np.int64)

    def pack(self, keys: np.ndarray) -> np.ndarray:
        """Pack per-axis keys (n x p) into one int64 per row, as SQL does."""
        h, base = self.half_range, 1 << self.bits
        packed = np.zeros(keys.shape[0], dtype=np.int64)
        for a in range(keys.shape[1]):
            packed += (keys[:, a] + h) * (base**a)
        return packed

    def unpack(self, packed: np.ndarray) -> np.ndarray:
        """Per-axis keys (n x p) from packed keys."""
        h, base = self.half_range, 1 << self.bits
        packed = np.asarray(packed, dtype=np.int64)
        return np.stack([(packed // (base**a)) % base - h for a in range(self.dims)], axis=1)


@dataclass(frozen=True)
class Assignment:
    """Nearest-centroid assignment in standardised, weighted space.

    u_j = (x_j - center_j) * inv_scale_j;  dist_i = sum_j weight_j^2 (u_j - c_ij)^2.
    """

    center: tuple[float, ...]
    inv_scale: tuple[float, ...]
    weights: tuple[float, ...]
    centroids: tuple[tuple[float, ...], ...] = field(default_factory=tuple)


# --------------------------------------------------------------------------- helpers


def render(statement: exp.Expression, dialect: str = "duckdb", pretty: bool = False) -> str:
    """SQL text of a tree for one dialect."""
    return statement.sql(dialect=dialect, pretty=pretty)


def num(value: float | int) -> exp.Expression:
    """A numeric literal that round-trips the number exactly (negative as unary minus)."""
    if isinstance(value, (int, np.integer)):
        text = str(int(value))
    else:
        value = float(value)
        if not np.isfinite(value):
            raise ValueError(f"non-finite number {value!r} cannot go into SQL")
        # shortest round-trip digits in exponent form, which engines read as a
        # double (DuckDB would read 0.5 as a DECIMAL)
        text = np.format_float_scientific(value, unique=True, trim="0")
    if text.startswith("-"):
        return exp.Paren(this=exp.Neg(this=exp.Literal.number(text[1:])))
    return exp.Literal.number(text)


def col(name: str, table: str | None = None) -> exp.Column:
    return exp.column(name, table=table, quoted=True)


def internal(name: str) -> str:
    return f"{INTERNAL}{name}"


def to_double(e: exp.Expression) -> exp.Expression:
    return exp.cast(e, exp.DataType.build("DOUBLE"))


def is_finite(e: exp.Expression, dialect: str) -> exp.Expression:
    """True for a finite number, False for NaN/Inf, NULL for NULL."""
    if dialect == "duckdb":
        return exp.Anonymous(this="isfinite", expressions=[e])
    # x - x is NaN for NaN and +-Inf, and NaN = 0 is false in every engine we target.
    return exp.EQ(this=exp.Paren(this=exp.Sub(this=e, expression=e.copy())), expression=num(0))


def all_of(conditions: list[exp.Expression]) -> exp.Expression:
    out = conditions[0]
    for c in conditions[1:]:
        out = exp.And(this=out, expression=c)
    return out


def total_sum(terms: list[exp.Expression]) -> exp.Expression:
    if not terms:
        return num(0.0)
    out = terms[0]
    for t in terms[1:]:
        out = exp.Add(this=out, expression=t)
    return out


def least_of(args: list[exp.Expression]) -> exp.Expression:
    """LEAST(...) as a plain call: our arguments are never partly NULL, so no NULL shim."""
    return exp.Anonymous(this="LEAST", expressions=args)


def greatest_of(args: list[exp.Expression]) -> exp.Expression:
    return exp.Anonymous(this="GREATEST", expressions=args)


def paren(e: exp.Expression) -> exp.Expression:
    return exp.Paren(this=e)


def square(e: exp.Expression) -> exp.Expression:
    return exp.Mul(this=paren(e), expression=paren(e.copy()))


def case_when(cond: exp.Expression, value: exp.Expression) -> exp.Expression:
    return exp.Case(ifs=[exp.If(this=cond, true=value)])


def subquery(select: exp.Select, alias: str) -> exp.Subquery:
    return exp.Subquery(this=select, alias=exp.TableAlias(this=exp.to_identifier(alias, quoted=True)))


def standardised(columns: Sequence[str], center: Sequence[float], inv_scale: Sequence[float]) -> list[exp.Expression]:
    """(CAST(x AS DOUBLE) - center) * inv_scale for each column."""
    out = []
    for name, c, s in zip(columns, center, inv_scale):
        out.append(exp.Mul(this=paren(exp.Sub(this=to_double(col(name)), expression=num(c))), expression=num(s)))
    return out


def usable_rows(u_names: Sequence[str], dialect: str) -> exp.Expression:
    """All standardised values finite (NULL when any is NULL)."""
    return all_of([is_finite(col(n), dialect) for n in u_names])


# --------------------------------------------------------------------------- statements


def describe_statement(source: Source) -> exp.Select:
    """SELECT * FROM source LIMIT 0: the column names and types."""
    return exp.select(exp.Star()).from_(source.relation()).limit(0)


def count_statement(source: Source) -> exp.Select:
    return exp.select(exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True)).from_(source.relation())


def list_tables_statement() -> exp.Select:
    """Tables and views visible through information_schema."""
    return (
        exp.select(col("table_schema"), col("table_name"), col("table_type"))
        .from_(exp.Table(this=exp.to_identifier("tables", quoted=True), db=exp.to_identifier("information_schema")))
        .order_by(col("table_schema"), col("table_name"))
    )


def sample_statement(
    source: Source,
    columns: Sequence[str],
    dialect: str,
    percent: float | None = None,
    method: str = "SYSTEM",
    limit: int | None = None,
) -> exp.Select:
    """Rows of the chosen columns as DOUBLE, optionally from a TABLESAMPLE.

    NULL/NaN/Inf rows are filtered out in SQL so the sample holds usable rows only.
    """
    rel = source.relation()
    if percent is not None and percent < 100.0:
        rel.set("sample", exp.TableSample(method=exp.var(method), percent=num(float(percent))))
    names = [internal(f"x{j}") for j in range(len(columns))]
    inner = exp.select(*[exp.alias_(to_double(col(c)), n, quoted=True) for c, n in zip(columns, names)]).from_(rel)
    outer = exp.select(*[col(n) for n in names]).from_(subquery(inner, internal("s"))).where(usable_rows(names, dialect))
    if limit is not None:
        outer = outer.limit(num(int(limit)))
    return outer


def _packed_key(coords: list[exp.Expression], grid: Grid) -> exp.Expression:
    """sum_a (clamp(floor(coord_a / width)) + H) * base^a as BIGINT."""
    h, base = grid.half_range, 1 << grid.bits
    inv_w = 1.0 / grid.width
    terms = []
    for a, coord in enumerate(coords):
        scaled = exp.Floor(this=exp.Mul(this=paren(coord), expression=num(inv_w)))
        clamped = least_of([greatest_of([scaled, num(float(-h))]), num(float(h - 1))])
        key = exp.cast(clamped, exp.DataType.build("BIGINT"))
        shifted = exp.Add(this=key, expression=num(h))
        terms.append(shifted if a == 0 else exp.Mul(this=paren(shifted), expression=num(base**a)))
    return total_sum(terms)


def cells_statement(source: Source, columns: Sequence[str], grid: Grid, dialect: str) -> exp.Select:
    """The cell pass: one GROUP BY over the packed grid key.

    Returns columns key, n, ls0..ls{d-1}, ss0..ss{d-1}, all on the grid's
    standardised values u.  Rows with a NULL/NaN/Inf value fall in the group
    whose key is NULL: its n is the skipped count and its sums are meaningless.
    """
    d = len(columns)
    u = [internal(f"u{j}") for j in range(d)]
    ok = internal("ok")
    stage1 = exp.select(
        *[exp.alias_(e, n, quoted=True) for e, n in zip(standardised(columns, grid.center, grid.inv_scale), u)]
    ).from_(source.relation())
    stage2 = exp.select(*[col(n) for n in u], exp.alias_(usable_rows(u, dialect), ok, quoted=True)).from_(
        subquery(stage1, internal("a"))
    )
    if grid.axes:
        axes = np.asarray(grid.axes)
        coords = [total_sum([exp.Mul(this=col(u[j]), expression=num(float(axes[j, a]))) for j in range(d)]) for a in range(axes.shape[1])]
    else:
        coords = [col(n) for n in u]
    key = case_when(col(ok), _packed_key(coords, grid))
    vals = [case_when(col(ok), col(n)) for n in u]
    stage3 = exp.select(
        exp.alias_(key, "key", quoted=True),
        *[exp.alias_(v, n, quoted=True) for v, n in zip(vals, u)],
    ).from_(subquery(stage2, internal("b")))
    aggs = [exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True)]
    aggs += [exp.alias_(exp.Sum(this=col(n)), f"ls{j}", quoted=True) for j, n in enumerate(u)]
    aggs += [exp.alias_(exp.Sum(this=square(col(n))), f"ss{j}", quoted=True) for j, n in enumerate(u)]
    return exp.select(col("key"), *aggs).from_(subquery(stage3, internal("c"))).group_by(col("key"))


def _assignment_layers(
    source: Source, columns: Sequence[str], assign: Assignment, dialect: str, keep_source: bool
) -> tuple[exp.Select, str, str]:
    """A query with the nearest centroid per row (NULL for unusable rows).

    Returns (select, segment column, squared distance column); when keep_source
    the select also carries every source column.
    """
    d, k = len(columns), len(assign.centroids)
    u = [internal(f"u{j}") for j in range(d)]
    dist = [internal(f"d{i}") for i in range(k)]
    best, seg = internal("best"), internal("segment")
    src_cols = [exp.Star()] if keep_source else []
    stage1 = exp.select(
        *src_cols, *[exp.alias_(e, n, quoted=True) for e, n in zip(standardised(columns, assign.center, assign.inv_scale), u)]
    ).from_(source.relation())
    ok = usable_rows(u, dialect)
    passthrough = [exp.Star()] if keep_source else [col(n) for n in u]
    dist_exprs = []
    for i in range(k):
        terms = []
        for j in range(d):
            w2 = assign.weights[j] ** 2
            if w2 == 0.0:
                continue
            diff = square(exp.Sub(this=col(u[j]), expression=num(float(assign.centroids[i][j]))))
            terms.append(diff if w2 == 1.0 else exp.Mul(this=num(w2), expression=diff))
        dist_exprs.append(case_when(ok.copy(), total_sum(terms)))
    stage2 = exp.select(*passthrough, *[exp.alias_(e, n, quoted=True) for e, n in zip(dist_exprs, dist)]).from_(
        subquery(stage1, internal("a"))
    )
    least = col(dist[0]) if k == 1 else least_of([col(n) for n in dist])
    stage3 = exp.select(exp.Star(), exp.alias_(least, best, quoted=True)).from_(subquery(stage2, internal("b")))
    pick = exp.Case(ifs=[exp.If(this=exp.EQ(this=col(dist[i]), expression=col(best)), true=num(i)) for i in range(k)])
    stage4 = exp.select(exp.Star(), exp.alias_(pick, seg, quoted=True)).from_(subquery(stage3, internal("c")))
    return stage4, seg, best


def refine_statement(source: Source, columns: Sequence[str], assign: Assignment, dialect: str) -> exp.Select:
    """A refine pass: nearest centroid per row, GROUP BY segment.

    Returns segment, n, ls*, ss* (on u) and dist = the summed squared distance to
    the assigned centroid (the exact row-level SSE of this assignment).  The
    segment NULL group counts skipped rows.
    """
    inner, seg, best = _assignment_layers(source, columns, assign, dialect, keep_source=False)
    u = [internal(f"u{j}") for j in range(len(columns))]
    aggs = [exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True)]
    aggs += [exp.alias_(exp.Sum(this=col(n)), f"ls{j}", quoted=True) for j, n in enumerate(u)]
    aggs += [exp.alias_(exp.Sum(this=square(col(n))), f"ss{j}", quoted=True) for j, n in enumerate(u)]
    aggs += [exp.alias_(exp.Sum(this=col(best)), "dist", quoted=True)]
    return (
        exp.select(exp.alias_(col(seg), "segment", quoted=True), *aggs)
        .from_(subquery(inner, internal("d")))
        .group_by(col(seg))
    )


def label_select(
    source: Source,
    columns: Sequence[str],
    source_columns: Sequence[str],
    assign: Assignment,
    dialect: str,
    segment_name: str = "segment",
    distance_name: str = "distance",
) -> exp.Select:
    """Every source column plus the segment id and the distance to its centroid."""
    inner, seg, best = _assignment_layers(source, columns, assign, dialect, keep_source=True)
    distance = exp.Sqrt(this=col(best))
    return exp.select(
        *[col(c) for c in source_columns],
        exp.alias_(exp.cast(col(seg), exp.DataType.build("INT")), segment_name, quoted=True),
        exp.alias_(distance, distance_name, quoted=True),
    ).from_(subquery(inner, internal("d")))


def table_name(name: str) -> exp.Table:
    parts = [exp.to_identifier(p, quoted=True) for p in name.split(".")]
    kwargs = {"this": parts[-1]}
    if len(parts) >= 2:
        kwargs["db"] = parts[-2]
    if len(parts) >= 3:
        kwargs["catalog"] = parts[-3]
    return exp.Table(**kwargs)


def create_relation_statement(name: str, select: exp.Select, materialize: bool) -> exp.Create:
    """CREATE OR REPLACE VIEW (or TABLE) name AS select."""
    return exp.Create(this=table_name(name), kind="TABLE" if materialize else "VIEW", replace=True, expression=select)


def drop_statement(name: str, kind: str) -> exp.Drop:
    """DROP VIEW / DROP TABLE IF EXISTS name."""
    return exp.Drop(this=table_name(name), kind="VIEW" if kind == "view" else "TABLE", exists=True)


def copy_statement(select: exp.Select, path: str, file_format: str) -> exp.Copy:
    """COPY (select) TO 'path' (FORMAT ...): labels of file sources go to a file."""
    return exp.Copy(
        this=exp.Subquery(this=select),
        kind=False,
        files=[exp.Literal.string(path)],
        params=[exp.CopyParameter(this=exp.var("FORMAT"), expression=exp.var(file_format.upper()))],
    )
