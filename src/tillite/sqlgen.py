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
]

#: Reserved prefix of the helper columns inside generated queries.
INTERNAL = "__tillite_"

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
    ``axes`` is given (shape d x p).  key_a = floor(coord_a / width).
    """

    center: tuple[float, ...]
    inv_scale: tuple[float, ...]
    width: float
    axes: tuple[tuple[float, ...], ...] | None = None

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
        }

    @staticmethod
    def from_dict(data: dict) -> "Grid":
        axes = data.get("axes")
        return Grid(
            center=tuple(map(float, data["center"])),
            inv_scale=tuple(map(float, data["inv_scale"])),
            width=float(data["width"]),
            axes=tuple(tuple(map(float, r)) for r in axes) if axes else None,
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


def centred(columns: Sequence[str], center: Sequence[float]) -> list[exp.Expression]:
    """CAST(x AS DOUBLE) - center for each column.

    Sums are taken on centred values so nothing cancels (values near 1e9 with a
    spread near 1 keep their digits); scaling is exact afterwards (features.affine).
    """
    return [exp.Sub(this=to_double(col(name)), expression=num(c)) for name, c in zip(columns, center)]


def usable_rows(v_names: Sequence[str], dialect: str) -> exp.Expression:
    """True when every centred value is finite; NULL when any is NULL.

    One finiteness test of their sum: NaN or an infinity in any term makes the
    sum non-finite (centred finite values do not overflow a double).
    """
    return is_finite(paren(total_sum([col(n) for n in v_names])), dialect)


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


def _sums(v_names: Sequence[str]) -> list[exp.Expression]:
    """n, ls_j = sum(v_j), ss_j = sum(v_j * v_j)."""
    aggs = [exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True)]
    aggs += [exp.alias_(exp.Sum(this=col(n)), f"ls{j}", quoted=True) for j, n in enumerate(v_names)]
    aggs += [exp.alias_(exp.Sum(this=square(col(n))), f"ss{j}", quoted=True) for j, n in enumerate(v_names)]
    return aggs


def cells_statement(source: Source, columns: Sequence[str], grid: Grid, dialect: str) -> exp.Select:
    """The cell pass: one GROUP BY over the per-axis grid keys.

    Returns k0..k{p-1} (floor of each binned coordinate, as DOUBLE: no cast, no
    clamp, no aliasing of far outliers), n, ls0..ls{d-1} and ss0..ss{d-1} on the
    centred values v = x - grid.center (scale them with ``Grid.inv_scale``
    afterwards).  Rows with a NULL/NaN/Inf value get k0 NULL: the groups with k0
    NULL count the skipped rows and their sums are meaningless.
    """
    d = len(columns)
    v = [internal(f"v{j}") for j in range(d)]
    stage1 = exp.select(*[exp.alias_(e, n, quoted=True) for e, n in zip(centred(columns, grid.center), v)]).from_(
        source.relation()
    )
    factors = grid.key_factors()
    keys = [exp.Floor(this=linear_form(v, factors[:, a])) for a in range(factors.shape[1])]
    keys[0] = case_when(usable_rows(v, dialect), keys[0])
    names = grid.key_names()
    stage2 = exp.select(*[exp.alias_(k, n, quoted=True) for k, n in zip(keys, names)], *[col(n) for n in v]).from_(
        subquery(stage1, internal("a"))
    )
    key_cols = [col(n) for n in names]
    return exp.select(*key_cols, *_sums(v)).from_(subquery(stage2, internal("b"))).group_by(*[c.copy() for c in key_cols])


def _assignment_layers(
    source: Source, columns: Sequence[str], assign: Assignment, dialect: str, keep_source: bool
) -> tuple[exp.Select, str, str, list[str]]:
    """A query with the nearest centroid per row (NULL for unusable rows).

    The squared distance to centroid i is ||u||_w^2 + score_i with
    score_i = b_i + sum_j a_ij v_j (v = x - center, u = v * inv_scale); the
    argmin needs only the scores, which cost one multiply-add per column.
    Returns (select, segment column, best-score column, centred value columns);
    when keep_source the select also carries every source column.
    """
    d, k = len(columns), len(assign.centroids)
    v = [internal(f"v{j}") for j in range(d)]
    score = [internal(f"s{i}") for i in range(k)]
    best, seg = internal("best"), internal("segment")
    src_cols = [exp.Star()] if keep_source else []
    stage1 = exp.select(*src_cols, *[exp.alias_(e, n, quoted=True) for e, n in zip(centred(columns, assign.center), v)]).from_(
        source.relation()
    )
    a, b = assign.score_coefficients()
    passthrough = [exp.Star()] if keep_source else [col(n) for n in v]
    stage2 = exp.select(
        *passthrough,
        exp.alias_(usable_rows(v, dialect), internal("ok"), quoted=True),
        *[exp.alias_(linear_form(v, a[i], b[i]), score[i], quoted=True) for i in range(k)],
    ).from_(subquery(stage1, internal("a")))
    least = col(score[0]) if k == 1 else least_of([col(n) for n in score])
    stage3 = exp.select(exp.Star(), exp.alias_(least, best, quoted=True)).from_(subquery(stage2, internal("b")))
    pick = exp.Case(
        ifs=[exp.If(this=exp.Not(this=col(internal("ok"))), true=exp.Null())]
        + [exp.If(this=exp.EQ(this=col(score[i]), expression=col(best)), true=num(sid)) for i, sid in enumerate(assign.segment_ids())]
    )
    stage4 = exp.select(exp.Star(), exp.alias_(pick, seg, quoted=True)).from_(subquery(stage3, internal("c")))
    return stage4, seg, best, v


def _squared_norm(v_names: Sequence[str], assign: Assignment) -> exp.Expression:
    """||u||_w^2 = sum_j w_j^2 s_j^2 v_j^2 of a row."""
    norm = assign.norm_coefficients()
    return total_sum([exp.Mul(this=num(float(c)), expression=square(col(n))) for n, c in zip(v_names, norm) if c != 0.0])


def refine_statement(source: Source, columns: Sequence[str], assign: Assignment, dialect: str) -> exp.Select:
    """A refine pass: nearest centroid per row, GROUP BY segment.

    Returns segment, n, ls0..ls{d-1} (sums of the centred values v = x - center)
    and dist, the sum of squared (weighted, scaled) distances of the rows to the
    centroid they were assigned to: with n and LS that is the segment's exact CF
    in the published scalar form, shifted to the old centroid, so the exact SSE
    before and after moving the centroid both follow.  The segment NULL group
    counts skipped rows.
    """
    inner, seg, best, v = _assignment_layers(source, columns, assign, dialect, keep_source=False)
    aggs = [exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True)]
    aggs += [exp.alias_(exp.Sum(this=col(n)), f"ls{j}", quoted=True) for j, n in enumerate(v)]
    dist = exp.Add(this=col(best), expression=paren(_squared_norm(v, assign)))
    aggs.append(exp.alias_(exp.Sum(this=dist), "dist", quoted=True))
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
    """Every source column plus the segment id and the distance to its centroid.

    distance = sqrt(max(best score + ||u||_w^2, 0)), NULL for skipped rows.
    """
    inner, seg, best, v = _assignment_layers(source, columns, assign, dialect, keep_source=True)
    sq_norm = _squared_norm(v, assign)
    distance = case_when(
        exp.Not(this=exp.Is(this=col(seg), expression=exp.Null())),
        exp.Sqrt(this=greatest_of([exp.Add(this=col(best), expression=sq_norm), num(0.0)])),
    )
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
