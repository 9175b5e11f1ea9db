"""Categorical columns as indicator features (``--categorical``).

A categorical column becomes one 0/1 indicator per category among the top N by
rows in the profile sample, one for "other" (every other value, also values
first seen after the build) and one for NULL.  Indicators are derived columns
of the source (``Source.derived``), so the cell, refine and label statements
read them like numeric columns.  Their summaries are exact: a cell's linear sum
of an indicator is the count of that category, its square sum the same count.

Weighting rule: the indicators of one column share one scale, sqrt(1 - sum_c p_c^2)
(p_c the category's share of the usable rows), so the column's scaled indicators
have total variance 1, like one standardised numeric column; equivalently the
expected squared distance between two random rows is 2 from each.  ``--weights
COLUMN=w`` multiplies every indicator of the column by w.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any, Sequence

import numpy as np
from sqlglot import exp
from sqlglot.errors import ParseError

from . import sqlgen
from .errors import InputError, ModelError, ParameterError
from .sqlgen import Source

#: Default and largest --max-categories: each category adds an indicator to every pass.
DEFAULT_MAX_CATEGORIES = 20
MAX_CATEGORIES = 200

#: A column with more distinct values than this in the profile sample is refused: it is an
#: identifier or a measurement, not a category (top N would leave nearly every row "other").
DISTINCT_LIMIT = 10_000

OTHER = "(other)"
NULL = "(NULL)"


@dataclass(frozen=True)
class CategoricalColumn:
    """One categorical column: its type, the listed categories (top N), and its indicator names."""

    column: str
    type: str
    values: tuple[str, ...]  # listed categories as text, most rows first
    names: tuple[str, ...]  # indicator column names: one per value, then other, then NULL

    @property
    def labels(self) -> tuple[str, ...]:
        """What each indicator stands for: the category, "(other)", "(NULL)"."""
        return (*self.values, OTHER, NULL)

    def to_dict(self) -> dict[str, Any]:
        return {"column": self.column, "type": self.type, "values": list(self.values), "indicators": list(self.names)}

    @staticmethod
    def from_dict(data: dict[str, Any]) -> "CategoricalColumn":
        return CategoricalColumn(str(data["column"]), str(data["type"]), tuple(map(str, data["values"])),
                                 tuple(map(str, data["indicators"])))

    def expressions(self, target: Any = "duckdb") -> list:
        return sqlgen.indicator_expressions(self.column, self.type, self.values, target)


def indicator_names(column: str, labels: Sequence[str], taken: set[str]) -> tuple[str, ...]:
    """``column=label`` per indicator, made unique against ``taken`` (source columns, other indicators)."""
    out = []
    for label in labels:
        name, i = f"{column}={label}", 2
        while name in taken:
            name, i = f"{column}={label}#{i}", i + 1
        taken.add(name)
        out.append(name)
    return tuple(out)


def top_categories(values: Sequence[Any], counts: Sequence[int], limit: int) -> tuple[str, ...]:
    """The ``limit`` non-NULL categories with most rows (ties by text), as text."""
    pairs = [(int(n), str(v)) for v, n in zip(values, counts) if v is not None and not (isinstance(v, float) and math.isnan(v))]
    pairs.sort(key=lambda p: (-p[0], p[1]))
    return tuple(v for _, v in pairs[:limit])


def check_categorical(columns: Sequence[str], categorical: Sequence[str], described: dict[str, str], label: str) -> None:
    """Refuse a column both numeric and categorical, repeated, or missing, in one line."""
    dupes = sorted({c for c in categorical if list(categorical).count(c) > 1})
    if dupes:
        raise ParameterError(f"{{categorical}} names column(s) more than once: {', '.join(dupes)}", "categorical")
    both = [c for c in categorical if c in columns]
    if both:
        raise ParameterError(f"column(s) {', '.join(both)} given both as numeric ({{columns}}) and as {{categorical}}; "
                             "choose one", "columns", "categorical")
    missing = [c for c in categorical if c not in described]
    if missing:
        listing = ", ".join(f"{n} ({t})" for n, t in described.items())
        raise InputError(f"categorical column {', '.join(missing)} not found in {label}; columns there: {listing}")


def check_distinct(column: str, distinct: int, sampled: int) -> None:
    if distinct > DISTINCT_LIMIT:
        raise InputError(
            f"categorical column {column} has {distinct:,} distinct values in the profile sample of {sampled:,} rows, "
            f"above the limit of {DISTINCT_LIMIT:,}: it looks like an identifier or a measurement, not a category"
        )


def with_indicators(source: Source, specs: Sequence[CategoricalColumn], target: Any = "duckdb") -> Source:
    """The source read with every indicator of ``specs`` as a derived DOUBLE column, and each column's
    category code (``code_names``; the cell pass groups on it).  Statements read only the derived
    columns they name (the engines drop the others from the projection)."""
    if not specs:
        return source
    derived = tuple((n, e) for s in specs for n, e in zip(s.names, s.expressions(target)))
    codes = tuple((name, sqlgen.category_code_expression(s.column, s.type, s.values, target))
                  for name, s in zip(code_names(specs), specs))
    return replace(source, derived=source.derived + derived + codes)


def code_names(specs: Sequence[CategoricalColumn]) -> list[str]:
    """The derived columns holding each categorical column's code (1-based indicator position)."""
    return [sqlgen.internal(f"code{i}") for i in range(len(specs))]


def indicator_cells(n: np.ndarray, codes: np.ndarray, center: np.ndarray, inv_scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Linear and square sums of one categorical column's indicators, u = (ind - center) * inv_scale,
    for cells of ``n`` rows that all hold the category of code ``codes`` (1-based): exact, since every
    row of such a cell has the same indicator values."""
    onehot = (np.asarray(codes, dtype=np.int64)[:, None] == np.arange(1, len(center) + 1)[None, :]).astype(np.float64)
    u = (onehot - np.asarray(center)[None, :]) * np.asarray(inv_scale)[None, :]
    return n[:, None] * u, n[:, None] * u * u


def specs_of(data: Sequence[dict[str, Any]] | None) -> list[CategoricalColumn]:
    specs = [CategoricalColumn.from_dict(d) for d in (data or [])]
    for spec in specs:
        check_type_name(spec)
    return specs


def check_type_name(spec: CategoricalColumn) -> None:
    """A model file's type of a categorical column must read as one SQL type (its literals are cast to it)."""
    check_sql_type(spec.type, f"categorical column {spec.column}")


def check_sql_type(type_name: str, what: str) -> None:
    """A type name read from a model file (``what`` has it) must parse as one SQL type of an engine we run."""
    for reader in (None, "duckdb", "postgres", "spark"):  # the engines a model can come from
        try:
            if isinstance(exp.DataType.build(type_name, dialect=reader), exp.DataType):
                return
        except (ValueError, ParseError):
            continue
    raise ModelError(f"the model file is damaged: {what} has type {type_name!r}, which is not a SQL type")


def type_family(type_name: str) -> str:
    """text, number, time, boolean, or the type itself: a categorical column's values compare with its categories
    (text cast to the model's type) only within one family (DuckDB refuses INTEGER categories against a VARCHAR
    column; INTEGER against BIGINT or DOUBLE compare)."""
    for reader in (None, "duckdb", "postgres", "spark"):  # the engines a type name can come from
        try:
            kind = exp.DataType.build(type_name, dialect=reader).this
        except (ValueError, ParseError):
            continue
        if not isinstance(kind, exp.DataType.Type):
            continue
        if kind in exp.DataType.TEXT_TYPES or kind == exp.DataType.Type.ENUM:
            return "text"
        if kind in exp.DataType.NUMERIC_TYPES:
            return "number"
        if kind in exp.DataType.TEMPORAL_TYPES:
            return "time"
        return kind.value.lower()
    return type_name.strip().lower()


# ----------------------------------------------------------------------------- maths (numpy only)


def indicator_positions(columns: Sequence[str], specs: Sequence[CategoricalColumn]) -> list[np.ndarray]:
    """Per categorical column, the positions of its indicators in ``columns``."""
    where = {c: j for j, c in enumerate(columns)}
    return [np.array([where[n] for n in s.names], dtype=np.int64) for s in specs]


def group_scale(shares: np.ndarray) -> float:
    """sqrt(1 - sum_c p_c^2): dividing the column's indicators by it makes their total variance 1."""
    p = np.clip(np.asarray(shares, dtype=np.float64), 0.0, 1.0)
    gini = 1.0 - float((p * p).sum())
    return math.sqrt(gini) if gini > 1e-12 else 0.0
