"""Every SQL statement tillite runs, built as sqlglot expression trees.

One builder per statement kind (describe, count, profile sample, cells, refine,
label).  User-supplied names only ever become quoted identifiers and numbers
only ever become literals, so a column called ``select`` or ``a"b`` is safe and
nothing typed by a user is pasted into SQL text.  ``render`` turns a tree into
text for one dialect; the engines execute the text.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property, reduce
from typing import Sequence

import numpy as np
from sqlglot import exp

from .targets import FILE_READER_CALLS, SPARK_FILE_FORMATS, SPARK_QUANTILE_ACCURACY, TARGETS, SparkFamily, Target, target_for

#: A target, or a sqlglot dialect name standing for its target (``targets.target_for``).
TargetLike = Target | str

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
    "current_schema_statement",
    "floor_of",
    "table_sample",
    "sample_repeats",
    "for_dialect",
    "Target",
    "target_for",
    "temporary_view",
]

#: Reserved prefix of the helper columns inside generated queries.
INTERNAL = "__tillite_"

FILE_READERS = dict(zip(("parquet", "csv", "json"), FILE_READER_CALLS))


@dataclass(frozen=True)
class Source:
    """Where the rows are: a table (name parts) or files read in place."""

    table: tuple[str, ...] = ()
    files: tuple[str, ...] = ()
    reader: str = "parquet"
    filename: bool = False  # add the file name as a column `filename` (files only)
    #: columns computed from the row (name, expression), e.g. category indicators (categorical.py):
    #: every statement then reads the source through a projection that adds them
    derived: tuple[tuple[str, exp.Expression], ...] = ()

    @staticmethod
    def of_table(name: str | Sequence[str]) -> "Source":
        parts = split_table_name(name) if isinstance(name, str) else tuple(name)
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
        """Human-readable name for messages (a part holding a dot in double quotes, as it is written)."""
        return join_table_name(self.table) if self.table else ", ".join(self.files)

    def relation(self, sample: exp.TableSample | None = None) -> exp.Expression:
        """The FROM item for this source (``sample`` on the stored rows, before any derived column)."""
        base = self._stored_relation()
        if sample is not None:
            base.set("sample", sample)
        if not self.derived:
            return base
        added = [exp.alias_(e.copy(), n, quoted=True) for n, e in self.derived]
        return subquery(exp.select(exp.Star(), *added).from_(base), internal("src"))

    def derived_names(self) -> list[str]:
        """Names of the derived columns (not in the stored rows)."""
        return [n for n, _ in self.derived]

    def _stored_relation(self) -> exp.Expression:
        if self.table:
            return table_of(self.table)
        paths = [exp.Literal.string(f) for f in self.files]
        arg = paths[0] if len(paths) == 1 else exp.Array(expressions=paths)
        args: list[exp.Expression] = [arg]
        if self.filename:
            args.append(exp.EQ(this=exp.column("filename"), expression=exp.true()))
        return exp.Table(this=exp.Anonymous(this=FILE_READERS[self.reader], expressions=args))


def split_table_name(name: str) -> tuple[str, ...]:
    """schema.table -> its parts; a part in double quotes may hold dots ("my.table"), and "" is a quote.

    Raises ValueError for an unclosed quote.
    """
    parts: list[str] = []
    current, quoted, i = "", False, 0
    while i < len(name):
        ch = name[i]
        if quoted:
            if ch == '"' and name[i + 1:i + 2] == '"':
                current += '"'
                i += 1
            elif ch == '"':
                quoted = False
            else:
                current += ch
        elif ch == '"':
            quoted = True
        elif ch == ".":
            parts.append(current)
            current = ""
        else:
            current += ch
        i += 1
    if quoted:
        raise ValueError(f"not a table name (unclosed quote): {name!r}")
    parts.append(current)
    return tuple(parts)


def quote_name_part(part: str) -> str:
    """A name part as written on the command line: in double quotes when it holds a dot or a quote."""
    return '"' + part.replace('"', '""') + '"' if "." in part or '"' in part else part


def join_table_name(parts: Sequence[str]) -> str:
    """Name parts as one name that ``split_table_name`` reads back into them (``Source.label``'s form)."""
    return ".".join(quote_name_part(p) for p in parts)


@dataclass(frozen=True)
class Grid:
    """How rows are binned into cells.

    u_j = (x_j - center_j) * inv_scale_j are the grid's standardised values.  The
    binned coordinates are u itself, or u @ axes (principal-axis scores) when
    ``axes`` is given (shape d x p).  key_a = floor(coord_a / width).
    """

    center: tuple[float, ...]
    inv_scale: tuple[float, ...]
    width: float
    axes: tuple[tuple[float, ...], ...] | None = None
    #: the cell pass sums u = (x - center) * inv_scale (True), or the centred v = x - center
    #: (False: grids written before the sums were scaled in SQL, which over- or underflow for
    #: values near 1e152 or 1e-300)
    sums_scaled: bool = False

    @property
    def dims(self) -> int:
        return len(self.axes[0]) if self.axes else len(self.center)

    def key_factors(self) -> np.ndarray:
        """F (d x p) with key_a = floor(sum_j F_ja (x_j - center_j)): scale, axes and width folded."""
        axes = np.asarray(self.axes) if self.axes else np.eye(len(self.center))
        return axes * np.asarray(self.inv_scale)[:, None] / self.width

    def to_dict(self) -> dict:
        return {
            "width": self.width,
            "center": list(self.center),
            "inv_scale": list(self.inv_scale),
            "axes": [list(r) for r in self.axes] if self.axes else None,
            **({"sums": "scaled"} if self.sums_scaled else {}),
        }

    @staticmethod
    def from_dict(data: dict) -> "Grid":
        axes = data.get("axes")
        return Grid(
            center=tuple(map(float, data["center"])),
            inv_scale=tuple(map(float, data["inv_scale"])),
            width=float(data["width"]),
            axes=tuple(tuple(map(float, r)) for r in axes) if axes else None,
            sums_scaled=data.get("sums") == "scaled",
        )

    def key_names(self) -> list[str]:
        """Result columns holding the per-axis cell keys."""
        return [f"k{a}" for a in range(self.dims)]

    def keys_of(self, x: np.ndarray) -> np.ndarray:
        """Per-axis cell keys of rows x (n x d, original units), as SQL computes them."""
        coords = (x - np.asarray(self.center)[None, :]) @ self.key_factors()
        return np.floor(coords)


@dataclass(frozen=True)
class Assignment:
    """Nearest-centroid assignment in standardised, weighted space.

    u_j = (x_j - center_j) * inv_scale_j;  dist_i = sum_j weight_j^2 (u_j - c_ij)^2.
    """

    center: tuple[float, ...]
    inv_scale: tuple[float, ...]
    weights: tuple[float, ...]
    centroids: tuple[tuple[float, ...], ...] = field(default_factory=tuple)
    ids: tuple[int, ...] = ()  # segment id of each centroid; 0..k-1 when empty

    def segment_ids(self) -> tuple[int, ...]:
        return self.ids if self.ids else tuple(range(len(self.centroids)))

    def score_coefficients(self) -> tuple[np.ndarray, np.ndarray]:
        """a (k x d), b (k): dist_i - ||u||_w^2 = b_i + sum_j a_ij (x_j - center_j).

        a_ij = -2 w_j^2 c_ij s_j and b_i = sum_j w_j^2 c_ij^2 with s = inv_scale.
        """
        c = np.asarray(self.centroids, dtype=np.float64)
        w2 = np.asarray(self.weights, dtype=np.float64) ** 2
        s = np.asarray(self.inv_scale, dtype=np.float64)
        return -2.0 * c * (w2 * s)[None, :], (c * c * w2[None, :]).sum(axis=1)

    def norm_coefficients(self) -> np.ndarray:
        """w_j^2 s_j^2: ||u||_w^2 = sum_j w_j^2 s_j^2 (x_j - center_j)^2."""
        return np.asarray(self.weights, dtype=np.float64) ** 2 * np.asarray(self.inv_scale, dtype=np.float64) ** 2


# --------------------------------------------------------------------------- helpers


def render(statement: exp.Expression, target: TargetLike = "duckdb", pretty: bool = False) -> str:
    """SQL text of a tree for one target (or sqlglot dialect name)."""
    target = target_for(target)
    return target.prepare(statement).sql(dialect=target.name, pretty=pretty)


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
    return exp.cast(e, exp.DataType.build(exp.DataType.Type.DOUBLE))


def is_finite(e: exp.Expression, target: TargetLike) -> exp.Expression:
    """True for a finite number, False for NaN/Inf, NULL for NULL."""
    return target_for(target).is_finite(e)


def all_of(conditions: list[exp.Expression]) -> exp.Expression:
    """c0 AND c1 AND ... (sqlglot's own builder; the conditions are taken as they are, not copied)."""
    return exp.and_(*conditions, copy=False, wrap=False)


def total_sum(terms: list[exp.Expression]) -> exp.Expression:
    if not terms:
        return num(0.0)
    out = terms[0]
    for t in terms[1:]:
        out = exp.Add(this=out, expression=t)
    return out


def joined_text(pieces: Sequence[exp.Expression]) -> exp.Expression:
    """p0 || p1 || ... (left to right, as written by hand)."""
    return reduce(lambda out, piece: exp.DPipe(this=out, expression=piece), pieces[1:], pieces[0])


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


def centered(columns: Sequence[str], center: Sequence[float]) -> list[exp.Expression]:
    """CAST(x AS DOUBLE) - center for each column.

    Sums are taken on centred values so nothing cancels (values near 1e9 with a
    spread near 1 keep their digits); scaling is exact afterwards (features.affine).
    """
    return [exp.Sub(this=to_double(col(name)), expression=num(c)) for name, c in zip(columns, center)]


def usable_rows(v_names: Sequence[str], target: TargetLike) -> exp.Expression:
    """True when every centred value is finite; NULL when any is NULL.

    One finiteness test of their sum: NaN or an infinity in any term makes the
    sum non-finite (centred finite values do not overflow a double).
    """
    return is_finite(paren(total_sum([col(n) for n in v_names])), target)


def linear_form(names: Sequence[str], coefs: Sequence[float], constant: float | None = None) -> exp.Expression:
    """constant + sum_j coefs_j * names_j, leaving out zero coefficients."""
    terms: list[exp.Expression] = [num(float(constant))] if constant else []
    for n, c in zip(names, coefs):
        if c == 0.0:
            continue
        terms.append(col(n) if c == 1.0 else exp.Mul(this=num(float(c)), expression=col(n)))
    return total_sum(terms)


# --------------------------------------------------------------------------- statements


def describe_statement(source: Source) -> exp.Select:
    """SELECT * FROM source LIMIT 0: the column names and types."""
    return exp.select(exp.Star()).from_(source.relation()).limit(0)


def count_statement(source: Source) -> exp.Select:
    return exp.select(exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True)).from_(source.relation())


def list_tables_statement(named: str | None = None) -> exp.Select:
    """Tables and views visible through information_schema; with ``named``, only the one of that name
    (any case) in the current schema: the one catalog look-up every module uses."""
    query = (
        exp.select(col("table_schema"), col("table_name"), col("table_type"))
        .from_(exp.Table(this=exp.to_identifier("tables", quoted=True), db=exp.to_identifier("information_schema")))
        .order_by(col("table_schema"), col("table_name"))
    )
    if named is None:
        return query
    return query.where(exp.and_(
        exp.func("lower", col("table_name")).eq(exp.func("lower", exp.Literal.string(named))),
        col("table_schema").eq(exp.func("current_schema")),
    ))


def sample_statement(
    source: Source,
    columns: Sequence[str],
    target: TargetLike,
    percent: float | None = None,
    method: str = "SYSTEM",
    limit: int | None = None,
    seed: int | None = None,
    text_columns: Sequence[str] = (),
) -> exp.Select:
    """Rows of the chosen columns as DOUBLE, optionally from a TABLESAMPLE.
    ``text_columns`` come along as text t0, t1, ... (categorical columns; NULL stays NULL).

    NULL/NaN/Inf rows are filtered out in SQL so the sample holds usable rows only.
    With ``seed`` the sample repeats where the engine can repeat one
    (``REPEATABLE (seed)``; on Spark a ``rand(seed)`` filter, repeatable for the
    same input partitioning); see ``sample_repeats``.
    """
    target = target_for(target)
    sampled = percent is not None and percent < 100.0
    by_filter = target.seeded_sample_filter(num(int(seed)), num(float(percent) / 100.0)) if sampled and seed is not None else None
    rel = source.relation(table_sample(float(percent), method, target, seed=seed) if sampled and by_filter is None else None)
    names = [internal(f"x{j}") for j in range(len(columns))]
    texts = [internal(f"t{j}") for j in range(len(text_columns))]
    inner = exp.select(
        *[exp.alias_(to_double(col(c)), n, quoted=True) for c, n in zip(columns, names)],
        *[exp.alias_(exp.cast(col(c), exp.DataType.build("VARCHAR")), n, quoted=True) for c, n in zip(text_columns, texts)],
    ).from_(rel)
    if by_filter is not None:
        inner = inner.where(by_filter)
    outer = exp.select(*[col(n) for n in names + texts]).from_(subquery(inner, internal("s"))).where(usable_rows(names, target))
    if limit is not None:
        outer = outer.limit(num(int(limit)))
    return outer


def _sums(v_names: Sequence[str], target: TargetLike = "duckdb") -> list[exp.Expression]:
    """n, ls_j = sum(v_j), ss_j = sum(v_j * v_j)."""
    aggs = [exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True)]
    aggs += [exp.alias_(float_sum(col(n), target), f"ls{j}", quoted=True) for j, n in enumerate(v_names)]
    aggs += [exp.alias_(float_sum(square(col(n)), target), f"ss{j}", quoted=True) for j, n in enumerate(v_names)]
    return aggs


def float_sum(e: exp.Expression, target: TargetLike) -> exp.Expression:
    """Sum of doubles; in DuckDB its compensated ``fsum`` (``targets.DuckDB.float_sum``)."""
    return target_for(target).float_sum(e)


@dataclass(frozen=True)
class Partitioning:
    """How rows map to partitions: raw expressions grouped on, and their text form.

    Grouping on the raw values (a DATE, an INTEGER) is cheaper than building a
    text per row; the text ``part`` is built once per group from the grouped
    values p0, p1, ...  With ``only`` given, the scan keeps only those
    partitions, compared on the raw typed columns so the engine can skip blocks.
    """

    expressions: tuple[exp.Expression, ...]
    names: tuple[str, ...]  # source column names, for the text form; empty for files

    def aliases(self) -> list[str]:
        return [internal(f"p{i}") for i in range(len(self.expressions))]

    def projected(self) -> list[exp.Expression]:
        return [exp.alias_(e.copy(), a, quoted=True) for e, a in zip(self.expressions, self.aliases())]

    def text(self) -> exp.Expression:
        """The partition's text: one value, or name=value pairs joined by '/'; NULL reads 'NULL'."""
        def as_text(alias: str) -> exp.Expression:
            return exp.Coalesce(this=exp.cast(col(alias), exp.DataType.build("VARCHAR")), expressions=[exp.Literal.string("NULL")])

        aliases = self.aliases()
        if len(aliases) == 1:
            return as_text(aliases[0])
        pieces: list[exp.Expression] = []
        for i, (name, alias) in enumerate(zip(self.names, aliases)):
            pieces += ([exp.Literal.string("/")] if i else []) + [exp.Literal.string(f"{name}="), as_text(alias)]
        return joined_text(pieces)

    def key(self) -> exp.Expression:
        """The partition's key: an injective text of its typed values (the store keys partitions by it).

        Files: the file name.  Columns: per column ``~`` for NULL, else the value's
        text prefixed by its length in characters and ``:`` (``10:2026-01-15``), all
        concatenated.  NULL and the string 'NULL' get different keys, and values
        holding separators cannot run into the next column, unlike ``text()``.
        """
        if not self.names:
            return self.text()

        def piece(alias: str) -> exp.Expression:
            text = exp.cast(col(alias), exp.DataType.build("VARCHAR"))
            length = exp.cast(exp.Length(this=text.copy()), exp.DataType.build("VARCHAR"))
            value = exp.DPipe(this=exp.DPipe(this=length, expression=exp.Literal.string(":")), expression=text)
            return exp.Coalesce(this=value, expressions=[exp.Literal.string("~")])  # NULL || text is NULL

        return joined_text([piece(a) for a in self.aliases()])

    def value_columns(self) -> list[exp.Expression]:
        """Each grouped value as text (NULL stays NULL), returned as pv0, pv1, ..."""
        return [
            exp.alias_(exp.cast(col(a), exp.DataType.build("VARCHAR")), f"pv{i}", quoted=True)
            for i, a in enumerate(self.aliases())
        ]

    def filter(
        self, types: Sequence[str], values: Sequence[Sequence[str | None]], target: TargetLike | None = None
    ) -> exp.Expression:
        """Rows of the listed partitions: OR over partitions of AND over columns of col = CAST('v' AS type).

        ``types`` are the column types as the engine's describe() names them,
        read in the target's dialect (PostgreSQL's DOUBLE PRECISION, TIMESTAMPTZ, ...).
        """
        dialect = target_for(target).name if target is not None else None
        alternatives = []
        for row in values:
            terms = []
            for e, t, v in zip(self.expressions, types, row):
                if v is None:
                    terms.append(exp.Is(this=e.copy(), expression=exp.Null()))
                else:
                    kind = exp.DataType.build(t, dialect=dialect)
                    terms.append(exp.EQ(this=e.copy(), expression=exp.cast(exp.Literal.string(v), kind)))
            alternatives.append(paren(all_of(terms)))
        return exp.or_(*alternatives, copy=False, wrap=False)

    @staticmethod
    def of_columns(names: Sequence[str]) -> "Partitioning":
        return Partitioning(tuple(col(n) for n in names), tuple(names))

    @staticmethod
    def of_files() -> "Partitioning":
        return Partitioning((exp.column("filename"),), ())


def cells_statement(
    source: Source,
    columns: Sequence[str],
    grid: Grid,
    target: TargetLike,
    partition: Partitioning | None = None,
    where: exp.Expression | None = None,
    extra_keys: Sequence[str] = (),
) -> exp.Select:
    """The cell pass: one GROUP BY over the per-axis grid keys.

    Returns k0..k{p-1} (floor of each binned coordinate, as DOUBLE: no cast, no
    clamp, no aliasing of far outliers), n, ls0..ls{d-1} and ss0..ss{d-1} on the
    standardised values u = (x - grid.center) * inv_scale when ``grid.sums_scaled``
    (squares of values near 1e152 would overflow and of values near 1e-300
    underflow), else on the centred values v = x - grid.center.  Rows with a NULL/NaN/Inf value get k0 NULL: the groups with k0
    NULL count the skipped rows and their sums are meaningless.

    With ``partition`` the cells are keyed by (partition, cell) and the first
    result column is the partition's text ``part``; ``where`` filters the rows
    scanned (e.g. ``Partitioning.filter``).  ``extra_keys``: source columns also
    grouped on, returned as q0, q1, ... (category codes, categorical.py).
    """
    d = len(columns)
    v = [internal(f"v{j}") for j in range(d)]
    parts = partition.projected() if partition is not None else []
    parts += [exp.alias_(col(name), f"q{i}", quoted=True) for i, name in enumerate(extra_keys)]
    stage1 = exp.select(*parts, *[exp.alias_(e, n, quoted=True) for e, n in zip(centered(columns, grid.center), v)]).from_(
        source.relation()
    )
    if where is not None:
        stage1 = stage1.where(where)
    factors = grid.key_factors()
    keys = [floor_of(linear_form(v, factors[:, a]), target) for a in range(factors.shape[1])]
    if keys:
        keys[0] = case_when(usable_rows(v, target), keys[0])
    names = grid.key_names()
    part_cols = [col(a) for a in partition.aliases()] if partition is not None else []
    part_cols += [col(f"q{i}") for i in range(len(extra_keys))]
    summed = [col(n) for n in v]
    if grid.sums_scaled:
        u = [internal(f"u{j}") for j in range(d)]
        summed = [exp.alias_(exp.Mul(this=col(n), expression=num(float(s))), un, quoted=True) for n, s, un in zip(v, grid.inv_scale, u)]
        v = u
    stage2 = exp.select(
        *[c.copy() for c in part_cols], *[exp.alias_(k, n, quoted=True) for k, n in zip(keys, names)], *summed
    ).from_(subquery(stage1, internal("a")))
    part_text = [exp.alias_(partition.key(), "part", quoted=True)] if partition is not None else []
    part_text += [col(f"q{i}") for i in range(len(extra_keys))]
    group = [*part_cols, *[col(n) for n in names]]
    return exp.select(*part_text, *[col(n) for n in names], *_sums(v, target)).from_(subquery(stage2, internal("b"))).group_by(
        *[c.copy() for c in group]
    )


def fingerprint_statement(
    source: Source, columns: Sequence[str], partition: Partitioning, target: TargetLike, where: exp.Expression | None = None
) -> exp.Select:
    """Per partition: its text, its values, row count and an order-independent hash aggregate.

    Grouped on the raw partition values; the fingerprint is the sum over the
    partition's rows of a 64-bit hash of the chosen columns (``row_hash``),
    summed exactly and returned as text so no digits are lost on the way to
    Python.  Fingerprints are compared only with earlier ones from the same
    engine, never across engines.
    """
    text = exp.cast(exp.Sum(this=row_hash(columns, target)), exp.DataType.build("VARCHAR"))
    inner = (
        exp.select(
            *partition.projected(),
            exp.alias_(exp.Count(this=exp.Star()), "rows", quoted=True),
            exp.alias_(text, "fingerprint", quoted=True),
        )
        .from_(source.relation())
        .group_by(*[e.copy() for e in partition.expressions])
    )
    if where is not None:  # only some partitions (a refresh of named partitions)
        inner = inner.where(where)
    return exp.select(
        exp.alias_(partition.key(), "part", quoted=True), *partition.value_columns(), col("rows"), col("fingerprint")
    ).from_(subquery(inner, internal("f")))


#: Dialects whose 64-bit row hash ``row_hash`` builds.
FINGERPRINT_DIALECTS = tuple(t.name for t in TARGETS if t.hashes_rows)

#: Row text (``row_text``): the NULL marker and the column separator.  Neither
#: can be the text of a number, which is all the store hashes (it checks its columns).
ROW_TEXT_NULL = "~"
ROW_TEXT_SEPARATOR = "|"


def row_hash(columns: Sequence[str], target: TargetLike) -> exp.Expression:
    """A 64-bit hash of a row's columns that tells NULL from values and keeps column boundaries.

    Built so that SUM over it is exact in the dialect (no 64-bit overflow); each
    target's ``row_hash`` says how (DuckDB hash, PostgreSQL hashtextextended of
    the row text, Spark xxhash64 with NULL flags, ...).  NotImplementedError,
    naming the dialects that have one, where the target has none.
    """
    return target_for(target).row_hash([col(c) for c in columns], row_text(columns))


def row_text(columns: Sequence[str]) -> exp.Expression:
    """c0 | c1 | ... as text, a NULL column reading ``~``: distinct rows of numbers give distinct texts.

    Numbers print as digits, sign, point, exponent, NaN or Infinity, never as
    ``~`` and never holding ``|``, so the text tells NULL from a value and
    where each column ends.  PostgreSQL prints a double with the shortest
    digits that read back exactly (extra_float_digits = 1, its default).
    """
    pieces = [
        exp.Coalesce(this=exp.cast(col(c), exp.DataType.build("VARCHAR")), expressions=[exp.Literal.string(ROW_TEXT_NULL)])
        for c in columns
    ]
    separated = [e for i, piece in enumerate(pieces) for e in ([exp.Literal.string(ROW_TEXT_SEPARATOR)] if i else []) + [piece]]
    return joined_text(separated)


def distinct_count_statement(source: Source, columns: Sequence[str], limit: int) -> exp.Select:
    """How many distinct combinations of ``columns`` the source holds, counting no further than ``limit``."""
    distinct = exp.select(*[col(c) for c in columns]).from_(source.relation()).distinct().limit(num(int(limit)))
    return exp.select(exp.alias_(exp.Count(this=exp.Star()), "partitions", quoted=True)).from_(subquery(distinct, internal("d")))


#: Expression kinds a partition predicate (``refresh --where``) may hold: comparisons, logic,
#: literals, casts and the partition columns.  No function calls, no subqueries.
PREDICATE_KINDS = (
    exp.Column, exp.Identifier, exp.Literal, exp.Boolean, exp.Null, exp.Cast, exp.DataType, exp.DataTypeParam,
    exp.And, exp.Or, exp.Not, exp.Paren, exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE, exp.In, exp.Between,
    exp.Is, exp.Like, exp.ILike, exp.Tuple, exp.Neg, exp.Add, exp.Sub, exp.Mul, exp.Div, exp.Interval, exp.Var,
)


def partition_predicate(text: str, partition_columns: Sequence[str], target: TargetLike) -> exp.Expression:
    """Parse a user's predicate on the partition columns into a tree of ours, or raise ValueError.

    Only comparisons, AND/OR/NOT, IN, BETWEEN, IS [NOT] NULL, LIKE, casts and
    literals are accepted, naming only ``partition_columns`` (matched without
    regard to case and re-quoted exactly): no other column, no function call
    (none can have a side effect), no subquery.
    """
    import sqlglot
    from sqlglot.errors import ParseError

    dialect = target_for(target).name
    try:
        tree = sqlglot.parse_one(text, read=dialect)
    except ParseError as err:
        raise ValueError(f"cannot parse it{_parse_error_place(err)}") from None
    if not isinstance(tree, (exp.Predicate, exp.Connector, exp.Not, exp.Paren)):
        raise ValueError("it is not a predicate")
    by_lower = {c.lower(): c for c in partition_columns}
    for node in tree.walk():
        if isinstance(node, exp.Column):
            if node.table or node.name.lower() not in by_lower:
                raise ValueError(f"it names {node.sql(dialect=dialect)}, which is not a partition column ({', '.join(partition_columns)})")
        elif not isinstance(node, PREDICATE_KINDS):
            if isinstance(node, (exp.Query, exp.Subquery)):
                kind = "a subquery"
            elif isinstance(node, exp.Func):
                kind = f"a function call ({node.sql(dialect=dialect)})"
            else:
                kind = node.key.upper()
            raise ValueError(f"it holds {kind}; only comparisons, AND/OR/NOT, IN, BETWEEN, IS NULL, LIKE, casts and literals are allowed")
    tree = tree.copy()
    for node in list(tree.find_all(exp.Column)):
        node.replace(col(by_lower[node.name.lower()]))
    return tree


def merged_cells_statement(cells_table: str, key_names: Sequence[str], d: int, nan_for_null: bool = False) -> exp.Select:
    """The store's cells summed over partitions: one CF per grid cell (NULL key = skipped rows).

    ``nan_for_null`` (every key a grid key, all DOUBLE): NULLs come back as NaN, which only the
    skipped rows' groups hold (a usable row's keys and sums are finite), so no column has a NULL
    and DuckDB need not import numpy.ma to return it.
    """
    keys = [col(k) for k in key_names]
    aggs = [exp.alias_(exp.Sum(this=col("n")), "n", quoted=True)]
    aggs += [exp.alias_(exp.Sum(this=col(f"ls{j}")), f"ls{j}", quoted=True) for j in range(d)]
    aggs += [exp.alias_(exp.Sum(this=col(f"ss{j}")), f"ss{j}", quoted=True) for j in range(d)]
    merged = exp.select(*keys, *aggs).from_(table_name(cells_table)).group_by(*[k.copy() for k in keys])
    if not nan_for_null:
        return merged
    nan = exp.cast(exp.Literal.string("NaN"), exp.DataType.build("DOUBLE"))
    floats = [*key_names, *(f"{s}{j}" for s in ("ls", "ss") for j in range(d))]
    out = {name: exp.alias_(exp.Coalesce(this=col(name), expressions=[nan.copy()]), name, quoted=True) for name in floats}
    out["n"] = col("n")
    return exp.select(*[out[n] for n in [*key_names, "n", *floats[len(key_names):]]]).from_(subquery(merged, internal("m")))


def insert_select_statement(table: str, select: exp.Select) -> exp.Insert:
    return exp.Insert(this=table_name(table), expression=select)


def insert_values_statement(table: str, rows: Sequence[Sequence[object]]) -> exp.Insert:
    """INSERT INTO table VALUES (...), built from Python values as literals."""
    return exp.Insert(this=table_name(table), expression=exp.Values(expressions=[exp.Tuple(expressions=[literal(v) for v in r]) for r in rows]))


def literal(value: object) -> exp.Expression:
    """A SQL literal of a Python value (None, bool, int, float, str)."""
    if value is None:
        return exp.Null()
    if isinstance(value, bool):
        return exp.Boolean(this=value)
    if isinstance(value, (int, np.integer, float, np.floating)):
        return num(value)
    return exp.Literal.string(str(value))


def equals_all(pairs: dict[str, object]) -> exp.Expression:
    return all_of([exp.EQ(this=col(k), expression=literal(v)) for k, v in pairs.items()])


def delete_statement(table: str, where: exp.Expression) -> exp.Delete:
    return exp.Delete(this=table_name(table), where=exp.Where(this=where))


def in_list(column: str, values: Sequence[object]) -> exp.Expression:
    return exp.In(this=col(column), expressions=[literal(v) for v in values])


def select_where(table: str, where: exp.Expression | None = None, columns: Sequence[str] | None = None) -> exp.Select:
    sel = exp.select(*([col(c) for c in columns] if columns else [exp.Star()])).from_(table_name(table))
    return sel.where(where) if where is not None else sel


def schema_count_statement(schema: str, fold_case: bool, catalog: str | None = None) -> exp.Select:
    """SELECT count(*) AS n of information_schema.schemata named ``schema`` (in ``catalog``, when given).

    ``fold_case`` (DuckDB): compared case-insensitively, as DuckDB resolves names, and an attached
    database's name counts too (DuckDB reads ``db.name`` as that database's default schema).
    """
    def same(column: str, text: str) -> exp.Expression:
        value: exp.Expression = exp.Literal.string(text)
        if fold_case:
            return exp.EQ(this=exp.Lower(this=exp.column(column)), expression=exp.Lower(this=value))
        return exp.EQ(this=exp.column(column), expression=value)

    if catalog is not None:
        where: exp.Expression = exp.and_(same("catalog_name", catalog), same("schema_name", schema))
    elif not fold_case:
        where = same("schema_name", schema)
    else:
        where = exp.or_(same("schema_name", schema), same("catalog_name", schema))
    return (exp.select(exp.Count(this=exp.Star()).as_("n"))
            .from_(exp.table_("schemata", db="information_schema"))
            .where(where))


def lock_rows_statement(table: str, where: exp.Expression, columns: Sequence[str], target: TargetLike) -> exp.Select:
    """SELECT columns FROM table WHERE ..., locking the rows until the transaction ends where the dialect can.

    PostgreSQL: FOR UPDATE NOWAIT, which fails at once (SQLSTATE 55P03) while
    another transaction holds one of the rows, instead of waiting for it.
    DuckDB has no row locks: there the update that follows conflicts instead.
    """
    return target_for(target).lock_rows(select_where(table, where, columns))


def update_statement(table: str, values: dict[str, object], where: exp.Expression) -> exp.Update:
    return exp.Update(
        this=table_name(table),
        expressions=[exp.EQ(this=col(k), expression=literal(v)) for k, v in values.items()],
        where=exp.Where(this=where),
    )


def create_table_statement(table: str, columns: Sequence[tuple[str, str]], if_not_exists: bool = True) -> exp.Create:
    """CREATE TABLE [IF NOT EXISTS] table (name type, ...)."""
    schema = exp.Schema(
        this=table_name(table),
        expressions=[exp.ColumnDef(this=exp.to_identifier(n, quoted=True), kind=exp.DataType.build(t)) for n, t in columns],
    )
    return exp.Create(this=schema, kind="TABLE", exists=if_not_exists)


@dataclass(frozen=True)
class CellMap:
    """Rows labelled through their grid cell rather than their nearest centroid.

    ``keys`` (per-axis cell keys) map to ``segments`` (ids, -1 for the outlier
    group or noise).  Rows of other cells get the nearest centroid
    (``unmapped="nearest"``) or -1 (``"noise"``).  The keys are computed exactly
    as the cell pass computes them, so a row lands in the cell it was counted in.
    """

    grid: Grid
    keys: tuple[tuple[float, ...], ...]
    segments: tuple[int, ...]
    unmapped: str = "nearest"
    #: A relation already holding ``columns()`` (a temporary table or view the
    #: engine loaded); None: the map goes inline as a VALUES list.
    table: str | None = None

    @cached_property
    def key_array(self) -> np.ndarray:
        """``keys`` as a (cells x axes) array."""
        return np.asarray(self.keys, dtype=np.float64).reshape(len(self.keys), -1)

    def packing(self) -> tuple[np.ndarray, np.ndarray] | None:
        """(low, strides) of the packed cell code, or None when the codes would not be exact doubles.

        code = sum_a strides_a * (clamp(key_a, low_a, high_a + 1) - low_a) with
        low = (smallest mapped key) - 1 and high the largest, so every key outside the mapped range
        clamps onto a border value no mapped cell has: one code per row, one
        join column, and each mapped cell keeps a code of its own.
        """
        keys = self.key_array
        if len(keys) == 0:
            return None
        low = keys.min(axis=0) - 1.0
        span = keys.max(axis=0) - low + 2.0  # low .. high + 1 inclusive
        strides = np.concatenate([[1.0], np.cumprod(span)[:-1]])
        if float(np.prod(span)) >= 2.0**52:
            return None
        return low, strides

    def codes(self) -> np.ndarray:
        """The packed code of each mapped cell (see ``packing``)."""
        low, strides = self.packing()  # type: ignore[misc]
        return (self.key_array - low[None, :]) @ strides

    def column_names(self) -> list[str]:
        """The map's columns: the packed code (or one per axis) and the segment."""
        axes = 1 if self.packing() is not None else self.key_array.shape[1]
        return [internal(f"mk{a}") for a in range(axes)] + [internal("mseg")]

    def columns(self) -> dict[str, np.ndarray]:
        """The map as columns, to load into a temporary relation named ``table``."""
        names = self.column_names()
        keys = self.codes()[:, None] if self.packing() is not None else self.key_array
        out = {n: np.ascontiguousarray(keys[:, a]) for a, n in enumerate(names[:-1])}
        out[names[-1]] = np.asarray(self.segments, dtype=np.int32)
        return out

    def relation(self) -> exp.Expression:
        """The map as a FROM item aliased __tillite_m: the loaded ``table``, or an inline VALUES list."""
        if self.table is not None:
            return exp.alias_(table_name(self.table), internal("m"), quoted=True)
        return self.values_relation()

    def table_select(self) -> exp.Select:
        """The map's rows typed as the joins read them (keys DOUBLE, segment INT), to fill a table once:
        from ``table`` (a temporary relation holding them) or an inline VALUES list."""
        names = self.column_names()
        typed = [exp.cast(col(n), exp.DataType.build(exp.DataType.Type.DOUBLE)) for n in names[:-1]]
        typed.append(exp.cast(col(names[-1]), exp.DataType.build(exp.DataType.Type.INT)))
        return exp.select(*[exp.alias_(e, n, quoted=True) for e, n in zip(typed, names)]).from_(self.relation())

    def values_relation(self) -> exp.Values:
        """The map as an inline VALUES list aliased __tillite_m."""
        alias = internal("m")
        names = self.column_names()
        cols = self.columns()
        rows = [exp.Tuple(expressions=[_whole(v) for v in row]) for row in zip(*(cols[n].tolist() for n in names))]
        table_alias = exp.TableAlias(this=exp.to_identifier(alias, quoted=True), columns=[exp.to_identifier(n, quoted=True) for n in names])
        return exp.Values(expressions=rows, alias=table_alias)

    def axis_coordinates(self, grid_v: Sequence[str]) -> list[exp.Expression]:
        """Each row's per-axis grid coordinates from its centred grid values ``grid_v``: its keys before the floor."""
        factors = self.grid.key_factors()
        return [linear_form(grid_v, factors[:, a]) for a in range(factors.shape[1])]

    def axis_keys(self, grid_v: Sequence[str], target: TargetLike) -> list[exp.Expression]:
        """Each row's per-axis cell keys from its centred grid values ``grid_v``, computed exactly as the cell pass does."""
        return [floor_of(t, target) for t in self.axis_coordinates(grid_v)]

    def row_codes(self, grid_v: Sequence[str], target: TargetLike, far: exp.Expression | None = None) -> list[exp.Expression]:
        """A row's join keys from its centred grid values ``grid_v``: the packed code, NULL unless every
        coordinate lies in the mapped cells' key range and ``far`` holds (so it matches nothing), or the
        per-axis keys themselves (NULL unless ``far``) when they do not pack.

        The range test is on the coordinates before the floor (floor(t) in [lo, hi] exactly when
        lo <= t < hi + 1), and the floors sit inside the CASE: rows that fail the test, or ``far``, pay
        for neither.  ``far`` is ``nearest_bound``'s test; comparisons rather than clamping each key with
        LEAST/GREATEST, which in DuckDB cost more than the floors and the join together
        (benchmarks/bench_cell_map.py)."""
        coords = self.axis_coordinates(grid_v)
        packing = self.packing()
        if packing is None:
            keys = [floor_of(t, target) for t in coords]
            return keys if far is None else [case_when(far.copy(), k) for k in keys]
        low, strides = packing
        keys = self.key_array
        tests = [] if far is None else [far]
        for t, lo, hi in zip(coords, keys.min(axis=0), keys.max(axis=0)):
            tests.append(exp.GTE(this=t.copy(), expression=num(float(lo))))
            # past 2^53 every double is whole, so floor(t) <= hi is t <= hi (hi + 1 would round)
            above = float(hi) + 1.0
            tests.append(exp.LT(this=t.copy(), expression=num(above)) if above - float(hi) == 1.0
                         else exp.LTE(this=t.copy(), expression=num(float(hi))))
        terms: list[exp.Expression] = []
        for a, t in enumerate(coords):
            shifted = exp.Sub(this=floor_of(t, target), expression=num(float(low[a])))
            terms.append(shifted if strides[a] == 1.0 else exp.Mul(this=num(float(strides[a])), expression=paren(shifted)))
        return [case_when(all_of(tests), total_sum(terms))]

    def nearest_bound(self, assign: Assignment) -> np.ndarray:
        """A squared distance below which no row lies in a mapped cell, 0 when none is known.

        The distance is the refine pass's: best + ||u||_w^2, a row's squared weighted, scaled distance
        to its nearest centroid.  A cell is the set where every grid coordinate t_a lies in
        [key_a, key_a + 1]: one slab per axis.  The bound is the least, over mapped cells and
        centroids, of the squared distance from the centroid to the cell, each slab widened by the SQL's
        rounding of t_a, then lowered by the rounding of the row's distance (both far above double
        rounding).  Per axis that distance is the gap of the centroid's t_a to the slab over the slab
        normal's length in the distance's metric; the axes add when the normals are orthogonal in that
        metric (a grid of the columns themselves), else the largest axis is the bound.  Axes over
        columns without weight, and columns the grid does not bin, constrain nothing.
        """
        keys = self.key_array
        if len(keys) == 0 or not assign.centroids:
            return np.zeros(len(assign.centroids))
        return _nearest_bound(self.grid, keys, assign)


def _nearest_bound(grid: Grid, keys: np.ndarray, assign: Assignment) -> np.ndarray:
    """``CellMap.nearest_bound`` on numpy arrays."""
    factors = grid.key_factors()  # (d, p): t_a = sum_j F_ja (x_j - grid centre_j)
    q = assign.norm_coefficients()  # distance = sum_j q_j (v_j - mu_ij)^2, v = x - assignment centre
    s = np.asarray(assign.inv_scale, dtype=np.float64)
    cents = np.asarray(assign.centroids, dtype=np.float64)
    mu = np.divide(cents, s[None, :], out=np.zeros_like(cents), where=s[None, :] != 0)
    shift = np.asarray(assign.center, dtype=np.float64) - np.asarray(grid.center, dtype=np.float64)
    weighted = q > 0
    used = (factors != 0).any(axis=0) & ~((factors != 0) & ~weighted[:, None]).any(axis=0)
    if not used.any():
        return np.zeros(len(cents))
    f = factors[:, used][weighted]  # (d', p'): only weighted columns touch the kept axes
    keys = keys[:, used]
    inv_q = 1.0 / q[weighted]
    gram = f.T @ (f * inv_q[:, None])
    length = np.sqrt(np.diag(gram))
    orthogonal = np.all(np.abs(gram - np.diag(np.diag(gram))) <= 1e-12 * np.outer(length, length))
    at = (mu[:, weighted] + shift[weighted][None, :]) @ f  # (k, p'): each centroid's grid coordinates

    def least(widen: np.ndarray) -> np.ndarray:
        out = np.empty(len(at))
        for i, t in enumerate(at):
            gap = np.maximum(np.maximum(keys - widen - t[None, :], t[None, :] - (keys + 1.0 + widen)), 0.0) / length
            sq = gap * gap
            out[i] = (sq.sum(axis=1) if orthogonal else sq.max(axis=1)).min()
        return out

    plain = least(np.zeros(len(length)))
    if not (plain > 0.0).any():
        return np.zeros(len(at))
    # a row that could be skipped lies within sqrt(plain_i) of a centroid, so each |x_j - grid centre_j| is at
    # most reach_j, and its t_a is rounded by far less than 1e-9 * (1 + sum_j |F_ja| reach_j)
    reach = np.abs(mu[:, weighted] + shift[weighted][None, :]).max(axis=0) + np.sqrt(1.01 * plain.max() * inv_q)
    widened = least(1e-9 * (1.0 + np.abs(f).T @ reach))
    # a row's distance sums terms up to (|c|_w + |u|_w)^2 <= (2 max|c|_w + sqrt(d))^2 in size
    _, b = assign.score_coefficients()
    size = (2.0 * float(np.sqrt(np.max(b))) + np.sqrt(widened)) ** 2
    return np.maximum(widened - 1e-9 * size, 0.0)


def _whole(value: float | int) -> exp.Expression:
    """A literal of an integer-valued number (a cell code, key or segment id), built cheaply."""
    whole = int(value)
    if whole < 0:
        return exp.Paren(this=exp.Neg(this=exp.Literal(this=str(-whole), is_string=False)))
    return exp.Literal(this=str(whole), is_string=False)


#: Up to this many centroids the nearest one is chosen by pairwise comparisons
#: (``_first_least_pairwise``); above it by LEAST and equality tests, which
#: grow linearly rather than quadratically (benchmarks/bench_assignment.py).
PAIRWISE_MAX_K = 8


def fresh_select(*expressions: exp.Expression) -> exp.Select:
    """SELECT of expressions built for this statement alone: taken as they are, not copied (copying each
    layer's projections was most of the time spent building an assignment statement)."""
    return exp.select(*expressions, copy=False)


def fresh_alias(e: exp.Expression, name: str, quoted: bool = True) -> exp.Alias:
    """e AS name, e taken as it is (see ``fresh_select``)."""
    return exp.alias_(e, name, quoted=quoted, copy=False)


def nearest_layers(
    scored: exp.Select, score: Sequence[str], ids: Sequence[int], best: str, nearest: str, target: TargetLike, fence: bool
) -> exp.Select:
    """scored's rows plus ``best``, their least score, and ``nearest``, the id of the first segment with that score.

    Ties go to the lowest position in ``score`` in both forms, so they pick the
    same segment on every row.  ``fence``: each layer is computed once per row
    on engines that would inline it (``scan_fence``).
    """
    if pairwise_pays(len(score), target, fence):
        return _first_least_pairwise(scored, score, ids, best, nearest, target, fence)
    return _first_least_by_least(scored, score, ids, best, nearest, target, fence)


def pairwise_pays(k: int, target: TargetLike, fence: bool) -> bool:
    """Whether the pairwise CASE (rather than LEAST) picks the nearest of k centroids.

    Only where it was measured to pay: DuckDB, and PostgreSQL when the layers are
    fenced.  An unfenced PostgreSQL label view inlines the id into the score's
    CASE and the segment's, each with every score written out: reading it took
    1.4x as long as with LEAST (1M rows, k = 5 and 8).  Spark was not measured.
    """
    return k <= PAIRWISE_MAX_K and target_for(target).pairwise_nearest(fence)


def _first_least_pairwise(
    scored: exp.Select, score: Sequence[str], ids: Sequence[int], best: str, nearest: str, target: TargetLike, fence: bool
) -> exp.Select:
    """nearest = the first i whose score is <= every later one (one CASE); best = that score (a CASE on nearest).

    Branch i is reached only when every earlier score exceeds some later one, so
    the first branch that holds is the first position of the least score.  In
    DuckDB this costs less than LEAST, which is slow per argument, plus k
    equality tests (0.85-0.92 of that refine pass at k = 3-8 on 5M rows).
    """
    k = len(score)
    if k == 1:
        return fresh_select(
            exp.Star(), fresh_alias(col(score[0]), best, quoted=True), fresh_alias(num(ids[0]), nearest, quoted=True)
        ).from_(subquery(scored, internal("b")), copy=False)
    ifs = [
        exp.If(this=all_of([exp.LTE(this=col(score[i]), expression=col(score[j])) for j in range(i + 1, k)]), true=num(ids[i]))
        for i in range(k - 1)
    ]
    with_id = fresh_select(exp.Star(), fresh_alias(exp.Case(ifs=ifs, default=num(ids[-1])), nearest, quoted=True)).from_(
        subquery(scored, internal("b"))
    )
    if fence:
        with_id = scan_fence(with_id, target)
    its_score = exp.Case(
        this=col(nearest), ifs=[exp.If(this=num(sid), true=col(s)) for s, sid in zip(score[:-1], ids)], default=col(score[-1])
    )
    return fresh_select(exp.Star(), fresh_alias(its_score, best, quoted=True)).from_(subquery(with_id, internal("c")), copy=False)


def _first_least_by_least(
    scored: exp.Select, score: Sequence[str], ids: Sequence[int], best: str, nearest: str, target: TargetLike, fence: bool
) -> exp.Select:
    """best = LEAST(scores); nearest = the first i with s_i = best (a CASE)."""
    least = least_of([col(n) for n in score])
    with_best = fresh_select(exp.Star(), fresh_alias(least, best, quoted=True)).from_(subquery(scored, internal("b")), copy=False)
    if fence:
        with_best = scan_fence(with_best, target)
    first = exp.Case(ifs=[exp.If(this=exp.EQ(this=col(score[i]), expression=col(best)), true=num(sid)) for i, sid in enumerate(ids)])
    return fresh_select(exp.Star(), fresh_alias(first, nearest, quoted=True)).from_(subquery(with_best, internal("c")), copy=False)


@dataclass
class _Scored:
    """The assignment layers' select and the names of what it carries (``_scored_rows``)."""

    select: exp.Select
    v: list[str]  # centred values
    score: list[str]  # score_i = squared distance to centroid i less ||u||_w^2
    grid_v: list[str]  # the grid's centred values (with a cell map)
    codes: list[str]  # category codes (lookups)
    norm: exp.Expression  # ||u||_w^2: a column with a cell map, else an expression of v
    pick: exp.Expression  # the nearest centroid's id, NULL for unusable rows


def _scored_rows(
    source: Source,
    columns: Sequence[str],
    assign: Assignment,
    target: Target,
    keep_source: bool,
    cell_map: CellMap | None,
    fence: bool,
    lookups: Sequence["CodeLookup"],
) -> _Scored:
    """Each row's scores, its least score (best) and the nearest centroid's id (nearest)."""
    d, k = len(columns), len(assign.centroids)
    v = [internal(f"v{j}") for j in range(d)]
    score = [internal(f"s{i}") for i in range(k)]
    src_cols = [exp.Star()] if keep_source else []
    grid_v = [internal(f"g{j}") for j in range(d)] if cell_map is not None else []
    codes = [internal(f"q{g}") for g in range(len(lookups))]
    stage1 = fresh_select(
        *src_cols,
        *[fresh_alias(col(lk.code), q, quoted=True) for lk, q in zip(lookups, codes)],
        *[fresh_alias(e, n, quoted=True) for e, n in zip(centered(columns, assign.center), v)],
        *([fresh_alias(e, n, quoted=True) for e, n in zip(centered(columns, cell_map.grid.center), grid_v)] if cell_map else []),
    ).from_(source.relation())
    a, b = assign.score_coefficients()
    passthrough = [exp.Star()] if keep_source else [col(n) for n in codes + v + grid_v]

    def scored(i: int) -> exp.Expression:
        form = linear_form(v, a[i], b[i])
        for lk, q in zip(lookups, codes):
            form = exp.Add(this=form, expression=lk.entry(i, col(q), target))
        return form

    # with a map the row's ||u||_w^2 is computed before the join too: DuckDB's arithmetic on a join's
    # output (sliced vectors) cost several times as much as on the scan's (benchmarks/bench_cell_map.py)
    nrm = internal("nrm")
    norm = col(nrm) if cell_map is not None else _squared_norm(v, assign)
    stage2 = fresh_select(
        *passthrough,
        fresh_alias(usable_rows(v, target), internal("ok"), quoted=True),
        *[fresh_alias(scored(i), score[i], quoted=True) for i in range(k)],
        *([fresh_alias(_squared_norm(v, assign), nrm, quoted=True)] if cell_map is not None else []),
    ).from_(subquery(stage1, internal("a")), copy=False)
    if fence:
        stage2 = scan_fence(stage2, target)
    stage3 = nearest_layers(stage2, score, assign.segment_ids(), internal("best"), internal("nearest"), target, fence)
    pick = case_when(col(internal("ok")), col(internal("nearest")))
    return _Scored(stage3, v, score, grid_v, codes, norm, pick)


def _keyed_rows(scored: _Scored, cell_map: CellMap, assign: Assignment, target: Target, carried: Sequence[str] | None,
                skip_near: bool) -> exp.Select:
    """``scored``'s rows (the columns ``carried``, or all) plus their cell's join keys c0, c1, ...

    ``skip_near``: a row nearer some centroid than that centroid's bound (``CellMap.nearest_bound``) lies
    in no mapped cell, so its keys are NULL and never computed.  The tests go largest bound first
    (about two per row on the demo).  Only where the scores are computed anyway: a view's count(*)
    would otherwise compute them, which it now skips.  Not with category lookups: their scores hold
    more than the distance.
    """
    bounds = cell_map.nearest_bound(assign) if skip_near else np.zeros(len(scored.score))
    nrm = col(internal("nrm"))
    far = [exp.GTE(this=exp.Add(this=col(scored.score[i]), expression=nrm.copy()), expression=num(float(bounds[i])))
           for i in np.argsort(-bounds, kind="stable") if bounds[i] > 0.0]
    keys = cell_map.row_codes(scored.grid_v, target, all_of(far) if far else None)
    names = [internal(f"c{a}") for a in range(len(keys))]
    return fresh_select(
        *([col(n) for n in carried] if carried else [exp.Star()]),
        *[fresh_alias(e, n, quoted=True) for e, n in zip(keys, names)],
    ).from_(subquery(scored.select, internal("n")), copy=False)


def _assignment_layers(
    source: Source,
    columns: Sequence[str],
    assign: Assignment,
    target: TargetLike,
    keep_source: bool,
    cell_map: CellMap | None = None,
    fence: bool | None = None,
    lookups: Sequence["CodeLookup"] = (),
) -> tuple[exp.Select, str, str, list[str], exp.Expression]:
    """A query with the segment of each row (NULL for unusable rows).

    The squared distance to centroid i is ||u||_w^2 + score_i with
    score_i = b_i + sum_j a_ij v_j (v = x - center, u = v * inv_scale); the
    argmin needs only the scores, which cost one multiply-add per column.  With
    ``cell_map`` rows of mapped cells take their cell's segment instead.
    Returns (select, segment column, the assigned segment's score column,
    centred value columns, the row's ||u||_w^2 (a column, or an expression of
    the centred values)); when keep_source the select also carries every
    source column.  ``fence`` (default: when not keeping the source) computes
    the scores once per row on engines that would inline them (``scan_fence``).
    ``lookups``: each adds to score i its table's entry for the row's code
    (categorical columns; the codes are carried on as q0, q1, ...).
    """
    target = target_for(target)
    fence = (not keep_source) if fence is None else fence
    scored = _scored_rows(source, columns, assign, target, keep_source, cell_map, fence, lookups)
    best, seg = internal("best"), internal("segment")
    if cell_map is None:
        stage4 = fresh_select(exp.Star(), fresh_alias(scored.pick, seg, quoted=True)).from_(subquery(scored.select, internal("n")), copy=False)
        return stage4, seg, best, scored.v, scored.norm
    # rows take their cell's segment when the cell is in the map: one hash join
    # on the packed cell code (or on the per-axis keys) against a small relation;
    # the join carries what the pass needs, not the grid's own centred values
    carried = None if keep_source else [*scored.codes, *scored.v, internal("ok"), *scored.score, best, internal("nearest"),
                                        internal("nrm")]
    keyed = _keyed_rows(scored, cell_map, assign, target, carried, skip_near=fence and not lookups)
    map_names = cell_map.column_names()
    on = all_of([exp.EQ(this=col(internal(f"c{a}"), internal("k")), expression=col(mn, internal("m")))
                 for a, mn in enumerate(map_names[:-1])])
    fallback = scored.pick if cell_map.unmapped == "nearest" else case_when(col(internal("ok")), num(-1))
    mapped = case_when(col(internal("ok")), exp.Coalesce(this=col(internal("mseg")), expressions=[fallback]))
    ids = assign.segment_ids()
    chosen = exp.Case(
        ifs=[exp.If(this=exp.EQ(this=col(seg), expression=num(sid)), true=col(scored.score[i])) for i, sid in enumerate(ids)]
    )
    joined = (
        fresh_select(exp.Star(), fresh_alias(mapped, seg, quoted=True))
        .from_(subquery(keyed, internal("k")), copy=False)
        .join(cell_map.relation(), on=on, join_type="LEFT", copy=False)
    )
    stage5 = fresh_select(exp.Star(), fresh_alias(chosen, internal("chosen"), quoted=True)).from_(subquery(joined, internal("j")), copy=False)
    return stage5, seg, internal("chosen"), scored.v, scored.norm


def _squared_norm(v_names: Sequence[str], assign: Assignment) -> exp.Expression:
    """||u||_w^2 = sum_j (w_j s_j v_j)^2 of a row.

    The factor is applied before squaring: (w s)^2 alone overflows when s is
    near 1e300 (values near 1e-300), and v^2 underflows there.
    """
    factor = np.abs(np.asarray(assign.weights, dtype=np.float64) * np.asarray(assign.inv_scale, dtype=np.float64))
    return total_sum([square(exp.Mul(this=num(float(c)), expression=col(n))) for n, c in zip(v_names, factor) if c != 0.0])


def refine_statement(
    source: Source, columns: Sequence[str], assign: Assignment, target: TargetLike, cell_map: CellMap | None = None,
    lookups: Sequence["CodeLookup"] = (),
) -> exp.Select:
    """A refine pass: nearest centroid per row, GROUP BY segment.

    Returns segment, n, ls0..ls{d-1} (sums of the standardised values u = v * inv_scale,
    v = x - center: sums of v overflow for spreads near 1e305 over many rows) and dist, the sum of squared (weighted, scaled) distances of the rows to the
    centroid they were assigned to: with n and LS that is the segment's exact CF
    in the published scalar form, shifted to the old centroid, so the exact SSE
    before and after moving the centroid both follow.  The segment NULL group
    counts skipped rows.  With ``lookups`` the groups are (segment, q0, q1, ...):
    per segment and category code (see ``CodeLookup``).
    """
    target = target_for(target)
    inner, seg, best, v, norm = _assignment_layers(source, columns, assign, target, keep_source=False, cell_map=cell_map,
                                             lookups=lookups)
    codes = [internal(f"q{g}") for g in range(len(lookups))]
    aggs = [*[fresh_alias(col(q), f"q{g}", quoted=True) for g, q in enumerate(codes)],
            fresh_alias(exp.Count(this=exp.Star()), "n", quoted=True)]
    aggs += [fresh_alias(float_sum(exp.Mul(this=col(n), expression=num(float(s))), target), f"ls{j}", quoted=True)
             for j, (n, s) in enumerate(zip(v, assign.inv_scale))]
    dist = exp.Add(this=col(best), expression=paren(norm))
    aggs.append(fresh_alias(float_sum(dist, target), "dist", quoted=True))
    return (
        fresh_select(fresh_alias(col(seg), "segment", quoted=True), *aggs)
        .from_(subquery(inner, internal("d")), copy=False)
        .group_by(col(seg), *[col(q) for q in codes], copy=False)  # no deep copy of an inline cell map
    )


def label_select(
    source: Source,
    columns: Sequence[str],
    source_columns: Sequence[str],
    assign: Assignment,
    target: TargetLike,
    segment_name: str = "segment",
    distance_name: str = "distance",
    cell_map: CellMap | None = None,
    materialize: bool = False,
    lookups: Sequence["CodeLookup"] = (),
) -> exp.Select:
    """Every source column plus the segment id and the distance to its centroid.

    ``materialize``: the select fills a table once, so the scores are fenced
    (computed once per row); a view is left unfenced so filters on it reach
    the source.

    distance = sqrt(max(score + ||u||_w^2, 0)) for the segment's centroid; NULL
    for skipped rows and for the outlier group / noise (segment -1).
    """
    inner, seg, best, v, sq_norm = _assignment_layers(
        source, columns, assign, target, keep_source=True, cell_map=cell_map, fence=materialize, lookups=lookups
    )
    distance = case_when(
        exp.GTE(this=col(seg), expression=num(0)),
        exp.Sqrt(this=greatest_of([exp.Add(this=col(best), expression=sq_norm), num(0.0)])),
    )
    return fresh_select(
        *[col(c) for c in source_columns],
        fresh_alias(exp.cast(col(seg), exp.DataType.build(exp.DataType.Type.INT)), segment_name, quoted=True),
        fresh_alias(distance, distance_name, quoted=True),
    ).from_(subquery(inner, internal("d")), copy=False)


def table_name(name: str) -> exp.Table:
    """A (possibly schema- and catalog-qualified, dotted) name as a table reference, its parts read as
    ``split_table_name`` reads them (a part in double quotes may hold a dot)."""
    return table_of(split_table_name(name))


def table_of(name_parts: Sequence[str]) -> exp.Table:
    """[catalog, [schema,]] table as a quoted table reference."""
    parts = [exp.to_identifier(p, quoted=True) for p in name_parts]
    kwargs = {"this": parts[-1]}
    if len(parts) >= 2:
        kwargs["db"] = parts[-2]
    if len(parts) >= 3:
        kwargs["catalog"] = parts[-3]
    return exp.Table(**kwargs)


def create_relation_statement(name: str, select: exp.Select, materialize: bool) -> exp.Create:
    """CREATE OR REPLACE VIEW name AS select, or CREATE TABLE name AS select.

    Only views say OR REPLACE: PostgreSQL and Spark have no CREATE OR REPLACE
    TABLE, so an existing table is dropped first, in the same transaction.
    """
    return exp.Create(this=table_name(name), kind="TABLE" if materialize else "VIEW", replace=not materialize, expression=select)


def drop_statement(name: str, kind: str) -> exp.Drop:
    """DROP VIEW / DROP TABLE IF EXISTS name."""
    return exp.Drop(tables=[table_name(name)], kind="VIEW" if kind == "view" else "TABLE", exists=True)


def copy_statement(select: exp.Select, path: str, file_format: str) -> exp.Copy:
    """COPY (select) TO 'path' (FORMAT ...): labels of file sources go to a file."""
    return exp.Copy(
        this=exp.Subquery(this=select),
        kind=False,
        files=[exp.Literal.string(path)],
        params=[exp.CopyParameter(this=exp.var("FORMAT"), expression=exp.var(file_format.upper()))],
    )


# --------------------------------------------------------------------------- dialects
#
# The same statement for other engines.  Where engines differ, the builders
# above ask the statement's target (targets.py: one class per engine or
# dialect); ``render`` applies ``Target.prepare`` to what only shows at the end
# (file relations).  Engines never write SQL of their own.

#: sqlglot dialect names that speak Spark SQL.
SPARK_DIALECTS = tuple(t.name for t in TARGETS if isinstance(t, SparkFamily))


def floor_of(e: exp.Expression, target: TargetLike) -> exp.Expression:
    """floor(e) as a DOUBLE, exact for every double (Spark: ``targets.SparkFamily.floor``)."""
    return target_for(target).floor(e)


#: Dialects whose TABLESAMPLE takes REPEATABLE (seed) and repeats the sample with it.
REPEATABLE_SAMPLE_DIALECTS = tuple(t.name for t in TARGETS if t.repeatable_sample)


def sample_repeats(target: TargetLike) -> str:
    """What a seeded profile sample guarantees on this target (stated in the model's params)."""
    return target_for(target).sample_repeats


def table_sample(percent: float, method: str, target: TargetLike, seed: int | None = None) -> exp.TableSample:
    """TABLESAMPLE METHOD (percent) in the target's own form.

    Spark SQL has a single row-sampling form, ``TABLESAMPLE (p PERCENT)``, whose
    percentage must be a plain decimal (it refuses exponent literals); BigQuery
    has SYSTEM only.  PostgreSQL, Trino and Snowflake take SYSTEM and BERNOULLI.
    ``seed`` adds ``REPEATABLE (seed)`` where the dialect has it (DuckDB, PostgreSQL).
    """
    plain = exp.Literal.number(np.format_float_positional(percent, trim="-", precision=12, fractional=True))
    seed_literal = num(int(seed)) if seed is not None else None
    return target_for(target).table_sample(num(float(percent)), plain, method, seed_literal)


def for_dialect(statement: exp.Expression, target: TargetLike) -> exp.Expression:
    """The tree as the target needs it; the same tree when nothing differs."""
    return target_for(target).prepare(statement)


def temporary_view(create: exp.Create) -> exp.Create:
    """The same CREATE VIEW as a session-scoped TEMPORARY VIEW (Spark: a view over a temporary view)."""
    out = create.copy()
    props = out.args.get("properties") or exp.Properties(expressions=[])
    if not any(isinstance(p, exp.TemporaryProperty) for p in props.expressions):
        props.append("expressions", exp.TemporaryProperty())
    out.set("properties", props)
    return out


def current_schema_statement() -> exp.Select:
    """The schema unqualified names resolve to (PostgreSQL: the first of search_path that exists)."""
    return exp.select(exp.alias_(exp.CurrentSchema(), "schema", quoted=True))


def sample_by_filter(statement: exp.Expression) -> exp.Expression:
    """The statement with each TABLESAMPLE replaced by a per-row ``random() < p / 100`` filter.

    For relations that cannot be sampled by blocks: PostgreSQL allows
    TABLESAMPLE on tables and materialized views only, not on views.  The filter
    keeps each row with probability p%, as BERNOULLI does.
    """
    out = statement.copy()
    for select in list(out.find_all(exp.Select)):
        source = select.args.get("from_") or select.args.get("from")
        table = source.this if source is not None else None
        sample = table.args.get("sample") if isinstance(table, exp.Table) else None
        if sample is None:
            continue
        table.set("sample", None)
        keep = exp.LT(this=exp.Rand(), expression=exp.Div(this=sample.args["percent"].copy(), expression=num(100.0)))
        select.where(keep)
    return out


def scan_fence(select: exp.Select, target: TargetLike) -> exp.Select:
    """The subquery computed once per row where the planner would inline it.

    PostgreSQL pulls simple subqueries up into their parent and has no common
    subexpression elimination, so the refine pass's k scores and their LEAST
    would be recomputed in every CASE branch (about 6x slower at k = 6).
    ``OFFSET 0`` keeps the subquery a separate step.  Used for the refine pass
    only: on a labels view it would also stop filters reaching the source.
    """
    return target_for(target).scan_fence(select)


# --------------------------------------------------------------------------- ownership marks

#: Start of the comment tillite writes on every view, table and macro it creates: its mark of ownership.
OWNED_MARK = "made by tillite"


def mark_statement(name: str, kind: str, text: str, target: TargetLike) -> exp.Expression:
    """Write ``text`` as the comment of a view or table: tillite's mark on what it created.

    DuckDB and PostgreSQL: COMMENT ON VIEW|TABLE.  Spark has COMMENT ON TABLE for
    tables only; a catalog view takes its comment as the table property 'comment'.
    """
    return target_for(target).mark(table_name(name), kind, text)


def _parse_error_place(err: Exception) -> str:
    """Where sqlglot stopped, as ' (line 1, col 8)' (its description names its own classes, so it is left out)."""
    first = (getattr(err, "errors", None) or [{}])[0]
    line, col = first.get("line"), first.get("col")
    return f" (line {line}, col {col})" if line is not None and col is not None else ""


def comment_of_statement(name: str, target: TargetLike) -> exp.Select:
    """SELECT the comment (column ``comment``) of a view or table; no row or NULL when it has none.

    DuckDB: its catalog functions, names compared case-insensitively as DuckDB
    resolves them, an unqualified name in current_schema().  PostgreSQL:
    obj_description of to_regclass, which resolves the (quoted) name as the
    server would and gives NULL for a missing relation.
    """
    return target_for(target).comment_query(table_name(name), split_table_name(name))
# --------------------------------------------------------------------------- report statistics
#
# The report's figures come back as aggregates over the labels: one GROUP BY
# segment for the per-column statistics, one GROUP BY (segment, category) per
# breakdown column.  Output names are our own short aliases (s, n, mean0, ...),
# never user text.

QUARTILES = (0.25, 0.5, 0.75)

def approx_quantile(e: exp.Expression, q: float, target: TargetLike) -> exp.Expression:
    """The engine's own approximate quantile: DuckDB approx_quantile (T-digest),
    PostgreSQL percentile_cont WITHIN GROUP (exact), Spark percentile_approx."""
    fraction = exp.Literal.number(repr(float(q)))  # a plain decimal: DuckDB wants a FLOAT/DECIMAL here, not DOUBLE
    return target_for(target).quantile(e, fraction)


def segment_names_column(select: exp.Select, segment: str, names: dict[int, str], alias: str = "segment_name") -> exp.Select:
    """The label select wrapped to add a text column naming each row's segment (NULL where unnamed).

    Names are string literals made by sqlglot, never pasted text.
    """
    if not names:
        cased: exp.Expression = exp.cast(exp.Null(), exp.DataType.build("VARCHAR"))
    else:
        cased = exp.case(col(segment))
        for sid, name in sorted(names.items()):
            cased = cased.when(num(int(sid)), exp.Literal.string(str(name)))
    return exp.select(exp.Star(), exp.alias_(cased, alias, quoted=True)).from_(subquery(select, internal("n")))


# --------------------------------------------------------------------------- the report in one scan
#
# Assigning a row to its nearest centroid costs far more than reading it, so the
# report assigns each row once: one statement groups the assigned rows by
# (segment, breakdown column) and returns count, mean, population sd, min and
# max per group, which Python pools exactly into per-segment figures.  The
# quartiles come from a second statement over a seeded row sample.

#: Rows the quartile sample aims at (the sample's size sets the rank error; see report.py).
QUARTILE_SAMPLE_ROWS = 100_000
QUARTILE_SAMPLE_SEED = 20261202


def report_rows_select(
    source: Source, columns: Sequence[str], by: Sequence[str], assign: Assignment, target: TargetLike,
    cell_map: CellMap | None = None,
) -> exp.Select:
    """The model's columns, the breakdown columns and each row's segment (internal name); no distance.

    The scores are fenced (computed once per row) where the planner would inline them.
    """
    inner, seg, *_ = _assignment_layers(source, columns, assign, target, keep_source=True, cell_map=cell_map, fence=True)
    keep = list(dict.fromkeys(list(columns) + list(by)))
    return exp.select(
        *[col(c) for c in keep], exp.alias_(exp.cast(col(seg), exp.DataType.build(exp.DataType.Type.INT)), seg, quoted=True)
    ).from_(subquery(inner, internal("d")))


def report_scan_statement(rows: exp.Select, columns: Sequence[str], by: Sequence[str], center: Sequence[float] = (),
                          inv_scale: Sequence[float] = ()) -> exp.Select:
    """Per (segment, breakdown category): n and per column mean{j}, sd{j} (population), min{j}, max{j}.

    With ``center`` and ``inv_scale`` mean{j} and sd{j} are of (x - center) * inv_scale (values near 1e307
    overflow AVG and STDDEV_POP), min{j} and max{j} of x itself.

    One GROUP BY over the assigned rows: by (segment) alone without breakdowns,
    by (segment, c0) with one, by GROUPING SETS ((segment, c0), (segment, c1), ...)
    with more, where g{i} = GROUPING(c_i) is 0 in the set of c_i.  Categories come back as text c{i}.  Rows without a
    segment (skipped for NULL/NaN/Inf) form groups whose s is NULL, for the
    caller to leave out (a filter would be pushed down and assign rows twice).
    """
    seg = col(internal("segment"))
    text = exp.DataType.build("VARCHAR")
    projections: list[exp.Expression] = [exp.alias_(seg, "s")]
    projections += [exp.alias_(exp.cast(col(c), text), f"c{i}") for i, c in enumerate(by)]
    if len(by) > 1:  # one single-column GROUPING per set: the form DuckDB, PostgreSQL and Spark all take
        projections += [exp.alias_(exp.Grouping(expressions=[col(c)]), f"g{i}") for i, c in enumerate(by)]
    projections.append(exp.alias_(exp.Count(this=exp.Star()), "n"))
    for j, name in enumerate(columns):
        x = to_double(col(name))
        u = x if not len(center) else exp.Mul(this=paren(exp.Sub(this=x.copy(), expression=num(float(center[j])))),
                                              expression=num(float(inv_scale[j])))
        projections += [
            exp.alias_(exp.Avg(this=u.copy()), f"mean{j}"),
            exp.alias_(exp.StddevPop(this=u.copy()), f"sd{j}"),
            exp.alias_(exp.Min(this=x.copy()), f"min{j}"),
            exp.alias_(exp.Max(this=x.copy()), f"max{j}"),
        ]
    select = exp.select(*projections).from_(subquery(rows, internal("r")))
    if len(by) <= 1:
        return select.group_by(seg.copy(), *[col(c) for c in by])
    sets = exp.GroupingSets(expressions=[exp.Tuple(expressions=[seg.copy(), col(c)]) for c in by])
    select.set("group", exp.Group(expressions=[sets]))
    return select


def sampled_rows(rows: exp.Select, percent: float, target: TargetLike, seed: int = QUARTILE_SAMPLE_SEED) -> exp.Select:
    """The statement with its source table read through TABLESAMPLE BERNOULLI (percent), seeded where the
    dialect renders a seed (not Spark).  Unchanged at 100% or for sources that are not tables."""
    if percent >= 100.0:
        return rows
    target = target_for(target)
    out = rows.copy()
    for source in out.find_all(exp.From):
        if isinstance(source.this, exp.Table):
            sample = table_sample(float(percent), "BERNOULLI", target)
            if target.seeds_quartile_sample():
                sample.set("seed", num(int(seed)))
            source.this.set("sample", sample)
    return out


def quartile_statement(rows: exp.Select, columns: Sequence[str], target: TargetLike) -> exp.Select:
    """Per segment s: n (sampled rows) and the quartiles q25_{j}, q50_{j}, q75_{j} of each column."""
    target = target_for(target)
    seg = col(internal("segment"))
    projections: list[exp.Expression] = [exp.alias_(seg, "s"), exp.alias_(exp.Count(this=exp.Star()), "n")]
    for j, name in enumerate(columns):
        x = to_double(col(name))
        # one sort per column for all three quartiles where the target has it (DuckDB): q_{j} is a list
        as_list = target.quartiles_as_list(x.copy(), [exp.Literal.number(repr(q)) for q in QUARTILES])
        if as_list is not None:
            projections.append(exp.alias_(as_list, f"q_{j}"))
            continue
        projections += [
            exp.alias_(sample_quantile(x.copy(), q, target), f"q{int(round(q * 100))}_{j}") for q in QUARTILES
        ]
    return exp.select(*projections).from_(subquery(rows, internal("r"))).group_by(seg.copy())


def sample_quantile(e: exp.Expression, q: float, target: TargetLike) -> exp.Expression:
    """A quantile of the sampled rows: exact on PostgreSQL (percentile_cont), Spark's percentile_approx
    (rank error 1/10,000); DuckDB takes quantile_cont over a list of the three (exact on the sample).
    The sample keeps the memory bounded."""
    return approx_quantile(e, q, target)


def labelled_rows_select(labels: Source, columns: Sequence[str], by: Sequence[str], segment: str = "segment") -> exp.Select:
    """report_rows_select's output read from a materialized labels table: its segment column, no assignment."""
    keep = list(dict.fromkeys(list(columns) + list(by)))
    return exp.select(
        *[col(c) for c in keep],
        exp.alias_(exp.cast(col(segment), exp.DataType.build(exp.DataType.Type.INT)), internal("segment"), quoted=True),
    ).from_(labels.relation())


# ----------------------------------------------------------------------------- DuckDB block sample

#: How many times more rows the block stage of ``block_sample_statement`` keeps than the whole sample.
BLOCK_SAMPLE_SPREAD = 8


def block_sample_statement(
    source: Source, columns: Sequence[str], percent: float, seed: int, spread: int = BLOCK_SAMPLE_SPREAD,
    limit: int | None = None,
) -> exp.Select:
    """DuckDB: about ``percent`` % of the rows, drawn in two seeded stages.

    ``TABLESAMPLE SYSTEM (spread * percent PERCENT) REPEATABLE (seed)`` keeps whole
    vectors (2,048 rows) and reads only those from a base table; a
    ``BERNOULLI (100 / spread PERCENT) REPEATABLE (seed)`` over them keeps each of
    their rows with that chance, so the sample comes from some hundreds of
    vectors spread over the table, not from a few dozen.  DuckDB repeats its
    SYSTEM sample only when one thread runs the statement
    (``DuckDBEngine.one_thread``); measured in benchmarks/bench_sample.py.
    Columns and the usable-rows filter are those of ``sample_statement``.
    """
    rel = source.relation()
    rel.set("sample", exp.TableSample(method=exp.var("SYSTEM"), percent=num(float(spread * percent)), seed=num(int(seed))))
    names = [internal(f"x{j}") for j in range(len(columns))]
    blocks = exp.select(*[exp.alias_(to_double(col(c)), n, quoted=True) for c, n in zip(columns, names)]).from_(rel)
    rows = subquery(blocks, internal("s"))
    rows.set("sample", exp.TableSample(method=exp.var("BERNOULLI"), percent=num(100.0 / spread), seed=num(int(seed))))
    outer = exp.select(*[col(n) for n in names]).from_(rows).where(usable_rows(names, "duckdb"))
    if limit is not None:
        outer = outer.limit(num(int(limit)))
    return outer


def threads_statement() -> exp.Select:
    """DuckDB: the connection's thread count, as ``threads``."""
    setting = exp.Anonymous(this="current_setting", expressions=[exp.Literal.string("threads")])
    return exp.select(exp.alias_(exp.cast(setting, "BIGINT"), "threads", quoted=True))


def set_threads_statement(threads: int) -> exp.Set:
    """DuckDB: ``SET threads = n``."""
    return set_number_statement("threads", threads)


def setting_statement(setting: str) -> exp.Select:
    """DuckDB: a setting's current value as text, as ``value``."""
    value = exp.Anonymous(this="current_setting", expressions=[exp.Literal.string(setting)])
    return exp.select(exp.alias_(exp.cast(value, "VARCHAR"), "value", quoted=True))


def set_number_statement(setting: str, value: int) -> exp.Set:
    """DuckDB: ``SET setting = n`` (a setting named by tillite, never by the user)."""
    item = exp.SetItem(this=exp.EQ(this=exp.column(setting), expression=exp.Literal.number(int(value))))
    return exp.Set(expressions=[item])


# --------------------------------------------------------------------------- categorical columns


def category_literal(value: str, type_name: str, target: TargetLike | None = None) -> exp.Expression:
    """A category's text as a literal of the column's type: 'north', or CAST('7' AS INTEGER)."""
    kind = exp.DataType.build(type_name, dialect=target_for(target).name if target is not None else None)
    if kind.is_type(*exp.DataType.TEXT_TYPES):
        return exp.Literal.string(value)
    return exp.cast(exp.Literal.string(value), kind)


def indicator_expressions(
    column: str, type_name: str, values: Sequence[str], target: TargetLike | None = None
) -> list[exp.Expression]:
    """One DOUBLE 0/1 expression per listed category, then "other" (any other non-NULL value, also values
    never seen when the list was made), then NULL:
    CASE WHEN col = literal THEN 1 ELSE 0 END, ..., CASE WHEN col IS NULL THEN 1 ELSE 0 END."""
    one, zero = num(1.0), num(0.0)

    def flag(cond: exp.Expression) -> exp.Expression:
        return exp.Case(ifs=[exp.If(this=cond, true=one.copy())], default=zero.copy())

    literals = [category_literal(v, type_name, target) for v in values]
    listed = [flag(exp.EQ(this=col(column), expression=lit)) for lit in literals]
    is_null = exp.Is(this=col(column), expression=exp.Null())
    if literals:
        known = exp.In(this=col(column), expressions=[lit.copy() for lit in literals])
        other = exp.Case(ifs=[exp.If(this=is_null.copy(), true=zero.copy()), exp.If(this=known, true=zero.copy())], default=one.copy())
    else:
        other = exp.Case(ifs=[exp.If(this=is_null.copy(), true=zero.copy())], default=one.copy())
    return [*listed, other, flag(is_null)]


def category_code_expression(column: str, type_name: str, values: Sequence[str], target: TargetLike) -> exp.Expression:
    """The category's code as an integer: 1, 2, ... for the listed values, len+1 for any other value,
    len+2 for NULL (the position of its indicator, counting from 1).  One array search where the
    target has one (``Target.array_position``), else a comparison per category."""
    target = target_for(target)
    is_null = exp.If(this=exp.Is(this=col(column), expression=exp.Null()), true=num(len(values) + 2))
    literals = [category_literal(v, type_name, target) for v in values]
    found = target.array_position(exp.Array(expressions=literals), col(column)) if literals else None
    if found is not None:
        return exp.Case(ifs=[is_null], default=exp.Coalesce(this=found, expressions=[num(len(values) + 1)]))
    ifs = [is_null] + [exp.If(this=exp.EQ(this=col(column), expression=lit), true=num(i + 1)) for i, lit in enumerate(literals)]
    return exp.Case(ifs=ifs, default=num(len(values) + 1))


@dataclass(frozen=True)
class CodeLookup:
    """A categorical column in the nearest-centroid SQL: per centroid i, ``tables[i][q - 1]`` is the whole
    squared (weighted, scaled) distance its indicators add for a row of category code q; a row's score is
    the numeric columns' score plus that entry (one array lookup instead of a term per indicator)."""

    code: str  # the source's derived code column (1-based)
    tables: tuple[tuple[float, ...], ...]

    def entry(self, i: int, q: exp.Expression, target: TargetLike) -> exp.Expression:
        return target_for(target).array_entry(exp.Array(expressions=[num(float(x)) for x in self.tables[i]]), q)
