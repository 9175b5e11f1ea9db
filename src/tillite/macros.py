"""SQL macros: tillite's stages in a SQL console, with no Python at query time.

Two kinds of macro go into a DuckDB database:

* generic table macros (``tillite_rows``, ``tillite_profile``, ``tillite_cells``,
  ``tillite_segments``) that take a table name and a list of column names as
  values.  Their SQL text lives in ``sql/*.sql`` beside this module as templates;
  the only things filled into a template are identifiers and literals rendered by
  sqlglot (``identifier``, ``literal``, ``expression`` below), never user text.
* scoring macros for one model, ``<name>_segment(x1, ..., xd)`` and
  ``<name>_distance(x1, ..., xd)``: scalar macros whose bodies are sqlglot trees
  built from ``Model.assignment()`` with the arithmetic of the label view.

Every installed macro is recorded in the table ``tillite_macro_registry`` of the
same database and carries tillite's mark as its comment (``COMMENT ON MACRO``).
``install`` refuses to replace a macro of the same name without the mark unless
asked to (``replace``), and ``remove`` drops only registered macros that still
carry it: one a user put in place of ours is left alone, with a warning.
"""

from __future__ import annotations

import os
import re
import stat
import warnings
from dataclasses import dataclass
from importlib import resources
from typing import Callable, Iterable, Mapping, Sequence

import duckdb
from sqlglot import exp

from . import __version__, sqlgen
from .engines import POSTGRES_URL, SPARK_MASTER, connect_duckdb, duckdb_transaction
from .errors import MacroError  # noqa: F401  (re-exported here)
from .model import Model
from .targets import DuckDB

#: The macros are DuckDB macros: every tree here is built and rendered for this target.
TARGET = DuckDB()

__all__ = [
    "MacroError",
    "SqlText",
    "MacroDefinition",
    "InstalledMacro",
    "GENERIC_NAMES",
    "REGISTRY",
    "DEFAULT_WIDTH",
    "DEFAULT_ITERATIONS",
    "MAX_COLUMNS",
    "identifier",
    "identifiers",
    "literal",
    "expression",
    "fill",
    "template",
    "generic_macros",
    "scoring_macros",
    "scoring_bodies",
    "script",
    "open_database",
    "install",
    "remove",
    "installed",
    "existing_macros",
    "install_into",
    "remove_from",
]

#: Names of the generic macros, by template stem.
GENERIC_NAMES: dict[str, str] = {
    "rows": "tillite_rows",
    "profile": "tillite_profile",
    "cells": "tillite_cells",
    "segments": "tillite_segments",
}
#: The table that records what tillite installed.
REGISTRY = "tillite_macro_registry"
#: Default grid width of tillite_cells and tillite_segments (standardised units).
DEFAULT_WIDTH = 0.5
#: Default cap on the Lloyd iterations of tillite_segments.
DEFAULT_ITERATIONS = 100
#: Most columns tillite_cells and tillite_segments take (their per-column sums are written out).
MAX_COLUMNS = 32
#: Column types the generic macros accept (DuckDB type names, matched in full).
NUMERIC_TYPES_PATTERN = (
    r"(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT|UTINYINT|USMALLINT|UINTEGER|UBIGINT|UHUGEINT"
    r"|FLOAT|DOUBLE|DECIMAL\(\d+,\d+\))"
)
#: A column whose sd is at most this times max(|mean|, 1) is constant (as in pipeline.segment).
CONSTANT_SD = 1e-12

_PLACEHOLDER = re.compile(r"\{\{([a-z_]+)\}\}")
_LAMBDA_LIST = sqlgen.internal("s")
_LAMBDA_BEST = sqlgen.internal("best")


# --------------------------------------------------------------------------- rendering


@dataclass(frozen=True)
class SqlText:
    """SQL text rendered by sqlglot: the only values a template accepts."""

    text: str


def identifier(name: str) -> SqlText:
    """A quoted DuckDB identifier."""
    return SqlText(exp.to_identifier(name, quoted=True).sql(dialect=TARGET.name))


def identifiers(names: Sequence[str]) -> SqlText:
    """Quoted identifiers separated by commas (a macro's parameter list)."""
    return SqlText(", ".join(identifier(n).text for n in names))


def literal(value: float | int | str) -> SqlText:
    """A number (exact, read as DOUBLE when a float) or a string literal."""
    if isinstance(value, str):
        return SqlText(exp.Literal.string(value).sql(dialect=TARGET.name))
    return SqlText(sqlgen.num(value).sql(dialect=TARGET.name))


def expression(tree: exp.Expression, pretty: bool = False) -> SqlText:
    """Any sqlglot tree, rendered for DuckDB (over several lines when pretty)."""
    return SqlText(tree.sql(dialect=TARGET.name, pretty=pretty))


def template(stem: str) -> str:
    """The text of sql/<stem>.sql, shipped with the package."""
    return resources.files("tillite").joinpath("sql", f"{stem}.sql").read_text(encoding="utf-8")


def fill(text: str, values: Mapping[str, SqlText]) -> str:
    """Replace every {{key}} of a template; each value must be sqlglot-rendered SqlText."""
    wanted = set(_PLACEHOLDER.findall(text))
    missing = sorted(wanted - set(values))
    if missing:
        raise MacroError(f"template placeholders without a value: {', '.join(missing)}")
    bad = [k for k in wanted if not isinstance(values[k], SqlText)]
    if bad:
        raise MacroError(f"template values must be rendered SQL (SqlText): {', '.join(sorted(bad))}")
    return _PLACEHOLDER.sub(lambda m: values[m.group(1)].text, text)


# --------------------------------------------------------------------------- definitions


@dataclass(frozen=True)
class MacroDefinition:
    """One CREATE OR REPLACE MACRO statement and what it creates."""

    name: str
    kind: str  # "table" or "scalar"
    sql: str
    model: str | None = None


def _generic_values() -> dict[str, SqlText]:
    values: dict[str, SqlText] = {}
    for stem, name in GENERIC_NAMES.items():
        values[stem] = identifier(name)
        values[f"{stem}_text"] = literal(name)
    values.update(
        numeric_types=literal(NUMERIC_TYPES_PATTERN),
        default_width=literal(float(DEFAULT_WIDTH)),
        default_iterations=literal(int(DEFAULT_ITERATIONS)),
        constant_sd=literal(CONSTANT_SD),
        max_columns=literal(MAX_COLUMNS),
        column_sums=_column_sums(MAX_COLUMNS),
        linear_sums=_sum_list("ls", MAX_COLUMNS),
        square_sums=_sum_list("ss", MAX_COLUMNS),
        one=literal(1.0),
        zero=literal(0.0),
    )
    return values


def _column_sums(width: int) -> SqlText:
    """sum(u[j]) AS ls<j>, sum(u[j] * u[j]) AS ss<j> for j = 1 .. width (the cells' GROUP BY)."""
    items: list[str] = []
    for j in range(1, width + 1):
        u_j = _call("list_extract", sqlgen.col("u"), exp.Literal.number(j))
        items.append(exp.alias_(exp.Sum(this=u_j), f"ls{j}", quoted=True).sql(dialect=TARGET.name))
        items.append(exp.alias_(exp.Sum(this=exp.Mul(this=u_j.copy(), expression=u_j.copy())), f"ss{j}", quoted=True).sql(dialect=TARGET.name))
    return SqlText(",\n        ".join(items))


def _sum_list(prefix: str, width: int) -> SqlText:
    """[c.ls1, ..., c.ls<width>]: the written-out sums gathered back into a list."""
    return expression(exp.Array(expressions=[sqlgen.col(f"{prefix}{j}", table="c") for j in range(1, width + 1)]))


def generic_macros() -> list[MacroDefinition]:
    """The table macros, in install order (each uses only those before it)."""
    values = _generic_values()
    return [MacroDefinition(name, "table", fill(template(stem), values)) for stem, name in GENERIC_NAMES.items()]


def _check_model_name(name: str) -> str:
    if not isinstance(name, str) or not name.strip() or name != name.strip() or not name.isprintable():
        raise MacroError(f"a model name for macros must be a non-empty printable name without surrounding spaces, got {name!r}")
    return name


def _substitute(tree: exp.Expression, values: Mapping[str, exp.Expression]) -> exp.Expression:
    """Replace the columns named in ``values`` by (copies of) those expressions."""

    def swap(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.Column) and not node.table and node.name in values:
            return values[node.name].copy()
        return node

    return tree.transform(swap)


def _call(name: str, *args: exp.Expression) -> exp.Expression:
    return exp.Anonymous(this=name, expressions=list(args))


def _bind(value: exp.Expression, variable: str, body: exp.Expression) -> exp.Expression:
    """list_extract(list_transform([value], LAMBDA variable : body), 1): evaluate value once."""
    lam = exp.Lambda(this=body, expressions=[exp.to_identifier(variable, quoted=True)])
    return _call("list_extract", _call("list_transform", exp.Array(expressions=[value]), lam), exp.Literal.number(1))


def scoring_bodies(model: Model) -> tuple[exp.Expression, exp.Expression]:
    """The bodies of <name>_segment and <name>_distance, parameters named after the model's columns.

    Same arithmetic as the label view (sqlgen.label_select): v_j = CAST(x_j AS DOUBLE) -
    center_j; scores s_i = b_i + sum_j a_ij v_j (Assignment.score_coefficients); best =
    LEAST(s); segment = the first i with s_i = best (a CASE); distance = sqrt(GREATEST(best +
    sum_j norm_j v_j^2, 0)).  NULL when isfinite(v_1 + ... + v_d) is not true (NULL/NaN/Inf).
    The scores are computed once per call by binding them to a lambda variable.
    """
    assign = model.assignment()
    a, b = assign.score_coefficients()
    norm = assign.norm_coefficients()
    d, k = len(model.columns), len(model.centroids)
    v_names = [sqlgen.internal(f"v{j}") for j in range(d)]
    v_exprs = {n: sqlgen.paren(e) for n, e in zip(v_names, sqlgen.centered(model.columns, model.center))}
    v_exprs.update(_indicator_values(model, v_names))
    scores = [_substitute(sqlgen.linear_form(v_names, a[i], b[i]), v_exprs) for i in range(k)]
    usable = _substitute(sqlgen.usable_rows(v_names, TARGET), v_exprs)
    sq_norm = _substitute(
        sqlgen.total_sum(
            [exp.Mul(this=sqlgen.num(float(c)), expression=sqlgen.square(sqlgen.col(n))) for n, c in zip(v_names, norm) if c != 0.0]
        ),
        v_exprs,
    )

    s = sqlgen.col(_LAMBDA_LIST)
    s_i = [_call("list_extract", s.copy(), exp.Literal.number(i + 1)) for i in range(k)]
    least = s_i[0] if k == 1 else sqlgen.least_of([e.copy() for e in s_i])
    best = sqlgen.col(_LAMBDA_BEST)
    ids = model.segment_ids()  # a store's stable ids, as the label view gives them
    pick = exp.Case(ifs=[exp.If(this=exp.EQ(this=s_i[i].copy(), expression=best.copy()), true=sqlgen.num(ids[i])) for i in range(k)])
    segment_of_scores = _bind(least, _LAMBDA_BEST, pick)
    distance_of_scores = exp.Sqrt(this=sqlgen.greatest_of([exp.Add(this=least.copy(), expression=sq_norm), sqlgen.num(0.0)]))

    score_list = exp.Array(expressions=scores)
    segment = sqlgen.case_when(usable, exp.cast(_bind(score_list, _LAMBDA_LIST, segment_of_scores), exp.DataType.build("INT")))
    distance = sqlgen.case_when(usable.copy(), _bind(score_list.copy(), _LAMBDA_LIST, distance_of_scores))
    return segment, distance


def within_scoring_bodies(model: Model) -> tuple[exp.Expression, exp.Expression]:
    """The scoring bodies of a `segment --within` model: a CASE on the group argument choosing that
    group's own body (``scoring_bodies`` of the group's model); NULL for a group the model does not know."""
    from .categorical import check_sql_type
    from .model import group_models
    from .within_sql import group_literal

    check_sql_type(model.within["type"], f"the --within column {model.within['column']}")
    group = sqlgen.col(model.within["column"])
    branches: list[tuple[exp.Expression, exp.Expression, exp.Expression]] = []
    for entry, one in group_models(model):
        value = entry["value"]
        same = (exp.Is(this=group.copy(), expression=exp.Null()) if value is None
                else exp.EQ(this=group.copy(), expression=group_literal(value, model.within["type"], TARGET)))
        segment, distance = scoring_bodies(one)
        branches.append((same, segment, distance))
    segment = exp.Case(ifs=[exp.If(this=c, true=s) for c, s, _ in branches])
    distance = exp.Case(ifs=[exp.If(this=c.copy(), true=d) for c, _, d in branches])
    return segment, distance


def _indicator_values(model: Model, v_names: Sequence[str]) -> dict[str, exp.Expression]:
    """Categorical columns: each indicator's centred value from the macro's parameter holding the category
    (the label view's indicator expressions; a value never seen at build time counts as "other")."""
    from .categorical import specs_of

    specs_of(model.categorical)  # a damaged type in the model file is one error line, not a sqlglot traceback
    where = {c: j for j, c in enumerate(model.columns)}
    out = {}
    for spec in model.categorical:
        exprs = sqlgen.indicator_expressions(spec["column"], spec["type"], spec["values"], "duckdb")
        for name, e in zip(spec["indicators"], exprs):
            j = where[name]
            out[v_names[j]] = sqlgen.paren(exp.Sub(this=e, expression=sqlgen.num(float(model.center[j]))))
    return out


def scoring_arguments(model: Model) -> list[str]:
    """The source columns a scoring macro takes, in order: a `--within` model's group column first."""
    if model.within:
        return [model.within["column"], *model.input_columns()]
    return model.input_columns()


def scoring_macros(model: Model, name: str) -> list[MacroDefinition]:
    """<name>_segment(x...) and <name>_distance(x...) for one model."""
    name = _check_model_name(name)
    if model.cell_map_spec() is not None:
        raise MacroError(
            f"the model labels some rows through their grid cell ({model.method} segments or an outlier group), "
            "which a scalar macro of the row's values does not reproduce; use `tillite label`, or segment with "
            "--keep-outliers for k-means/Ward"
        )
    segment, distance = within_scoring_bodies(model) if model.within else scoring_bodies(model)
    params = identifiers(scoring_arguments(model))
    out = []
    for suffix, body in (("segment", segment), ("distance", distance)):
        macro = f"{name}_{suffix}"
        values = {"macro": identifier(macro), "params": params, "body": expression(body, pretty=True)}
        out.append(MacroDefinition(macro, "scalar", fill(template("scoring"), values), model=name))
    if model.names and not model.within:  # <name>_segment_name once segments are named (`tillite name`)
        out.append(segment_name_macro(model, name, segment))
    elif model.within and any(g.get("names") for g in model.within["groups"]):  # named per group (`name --group`)
        out.append(within_segment_name_macro(model, name, segment))
    return out


def script(definitions: Iterable[MacroDefinition]) -> str:
    """The statements as one SQL script a user can paste into a console."""
    return "\n\n".join(d.sql.strip() for d in definitions) + "\n"


# --------------------------------------------------------------------------- the database


@dataclass(frozen=True)
class InstalledMacro:
    name: str
    kind: str
    model: str | None
    version: str
    installed_at: str


def _registry_table() -> exp.Table:
    return exp.Table(this=exp.to_identifier(REGISTRY, quoted=True))


def _registry_exists(con: duckdb.DuckDBPyConnection) -> bool:
    return bool(con.execute(sqlgen.render(sqlgen.list_tables_statement(named=REGISTRY), TARGET)).fetchall())


def _current_schema() -> exp.Expression:
    return _call("current_schema")


def installed(con: duckdb.DuckDBPyConnection) -> list[InstalledMacro]:
    """What the registry of this database records (empty when there is none)."""
    if not _registry_exists(con):
        return []
    query = (
        exp.select(*(sqlgen.col(c) for c in ("macro_name", "macro_type", "model_name", "tillite_version")),
                   exp.cast(sqlgen.col("installed_at"), exp.DataType.build("VARCHAR")))
        .from_(_registry_table())
        .order_by(sqlgen.col("macro_name"))
    )
    return [InstalledMacro(*row) for row in con.execute(sqlgen.render(query, TARGET)).fetchall()]


def _drop(definition_kind: str, name: str) -> exp.Drop:
    return exp.Drop(tables=[exp.Table(this=exp.to_identifier(name, quoted=True))], kind=_macro_kind(definition_kind), exists=True)


def _forget(name: str) -> exp.Delete:
    return exp.delete(_registry_table(), where=exp.EQ(this=sqlgen.col("macro_name"), expression=exp.Literal.string(name)))


def _record(definition: MacroDefinition) -> exp.Insert:
    row = exp.Tuple(
        expressions=[
            exp.Literal.string(definition.name),
            exp.Literal.string(definition.kind),
            exp.Literal.string(definition.model) if definition.model is not None else exp.Null(),
            exp.Literal.string(__version__),
            exp.CurrentTimestamp(),
        ]
    )
    return exp.insert(exp.Values(expressions=[row]), _registry_table())


def _in_transaction(con: duckdb.DuckDBPyConnection, statements: Sequence[str]) -> None:
    with duckdb_transaction(con):
        for text in statements:
            con.execute(text)


#: The comment on every macro tillite installs.
MACRO_MARK = f"{sqlgen.OWNED_MARK}: macro"


def _is_ours(comment: str | None) -> bool:
    return comment is not None and comment.startswith(sqlgen.OWNED_MARK)


def _macro_kind(definition_kind: str) -> str:
    return "MACRO TABLE" if definition_kind == "table" else "MACRO"


def _mark(definition: MacroDefinition) -> exp.Comment:
    target = exp.Table(this=exp.to_identifier(definition.name, quoted=True))
    return exp.Comment(this=target, kind=_macro_kind(definition.kind), expression=exp.Literal.string(MACRO_MARK))


def existing_macros(con: duckdb.DuckDBPyConnection, names: Sequence[str]) -> dict[str, str | None]:
    """Macros of these names in the current schema, with their comments (DuckDB's catalog)."""
    if not names:
        return {}
    query = (
        exp.select(sqlgen.col("function_name"), sqlgen.col("comment"))
        .from_(exp.Table(this=_call("duckdb_functions")))
        .where(
            exp.and_(
                exp.In(this=sqlgen.col("function_type"), expressions=[exp.Literal.string("macro"), exp.Literal.string("table_macro")]),
                exp.EQ(this=sqlgen.col("schema_name"), expression=_current_schema()),
                exp.EQ(this=sqlgen.col("database_name"), expression=_call("current_database")),
                exp.In(this=sqlgen.col("function_name"), expressions=[exp.Literal.string(n) for n in names]),
            )
        )
    )
    return {name: comment for name, comment in con.execute(sqlgen.render(query, TARGET)).fetchall()}


def install(con: duckdb.DuckDBPyConnection, definitions: Sequence[MacroDefinition], replace: bool = False) -> list[str]:
    """Create (or replace) the macros, mark and record them, all in one transaction.

    A macro of the same name that tillite did not install is replaced only with ``replace``.
    """
    foreign = [name for name, comment in existing_macros(con, [d.name for d in definitions]).items() if not _is_ours(comment)]
    if foreign and not replace:
        raise MacroError(
            f"macro {', '.join(sorted(foreign))} already exists and was not installed by tillite; --replace overwrites it"
        )
    statements = [fill(template("registry"), {"registry": identifier(REGISTRY)})]
    for d in definitions:
        statements += [d.sql, sqlgen.render(_mark(d), TARGET), sqlgen.render(_forget(d.name), TARGET), sqlgen.render(_record(d), TARGET)]
    _in_transaction(con, statements)
    return [d.name for d in definitions]


def remove(con: duckdb.DuckDBPyConnection, model: str | None = None) -> list[str]:
    """Drop the macros the registry records (only those of one model when given).

    Macros tillite did not install are never touched, whatever their names: a
    recorded macro that no longer carries tillite's mark (someone replaced it)
    is left in place with a warning, and only its registry row goes.  The
    registry table itself goes when nothing is left in it.
    """
    recorded = installed(con)
    chosen = [m for m in recorded if model is None or m.model == model]
    if not chosen:
        return []
    present = existing_macros(con, [m.name for m in chosen])
    statements, dropped = [], []
    for m in chosen:
        if m.name in present and not _is_ours(present[m.name]):
            warnings.warn(f"macro {m.name} was replaced by one tillite did not install; left in place", UserWarning, stacklevel=2)
        else:
            statements.append(sqlgen.render(_drop(m.kind, m.name), TARGET))
            dropped.append(m.name)
        statements.append(sqlgen.render(_forget(m.name), TARGET))
    if len(chosen) == len(recorded):
        statements.append(sqlgen.render(exp.Drop(tables=[_registry_table()], kind="TABLE", exists=True), TARGET))
    _in_transaction(con, statements)
    return dropped


def open_database(path: str | os.PathLike) -> duckdb.DuckDBPyConnection:
    """A writable connection to an existing DuckDB file; never creates one.

    A missing path, a directory, a file without write permission (checked on the
    mode bits too, so it holds for root) or a folder where DuckDB cannot write its
    journal is refused with a message naming the path.
    """
    path = os.fspath(path)
    if POSTGRES_URL.match(path) or SPARK_MASTER.match(path):
        what = "a PostgreSQL URL" if POSTGRES_URL.match(path) else "a Spark master URL"
        raise MacroError(f"{path} is {what}; macros are DuckDB macros and go into DuckDB database files only")
    if not os.path.exists(path):
        raise MacroError(f"database {path} does not exist; macros go into an existing DuckDB file")
    if os.path.isdir(path):
        raise MacroError(f"database {path} is a folder, not a DuckDB file")
    mode = os.stat(path).st_mode
    if not (mode & (stat.S_IWUSR | stat.S_IWGRP | stat.S_IWOTH)) or not os.access(path, os.W_OK):
        raise MacroError(f"database {path} is read-only; macros can only be installed into or removed from a writable file")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.access(folder, os.W_OK):
        raise MacroError(f"database {path} is in a read-only folder ({folder}); DuckDB needs to write its journal there")
    try:
        return connect_duckdb(path)
    except duckdb.Error as err:
        raise MacroError(f"cannot open DuckDB database {path}: {err}") from None


def _on_database(path: str | os.PathLike, action: Callable[[duckdb.DuckDBPyConnection], list[str]], what: str) -> list[str]:
    """Run action on the DuckDB file at path; database errors name the file and what was being done."""
    con = open_database(path)
    try:
        return action(con)
    except duckdb.Error as err:
        raise MacroError(f"cannot {what} {os.fspath(path)}: {err}") from None
    finally:
        con.close()


def install_into(path: str | os.PathLike, definitions: Sequence[MacroDefinition], replace: bool = False) -> list[str]:
    """install() on the DuckDB file at path."""
    return _on_database(path, lambda con: install(con, definitions, replace), "install macros into")


def remove_from(path: str | os.PathLike, model: str | None = None) -> list[str]:
    """remove() on the DuckDB file at path."""
    return _on_database(path, lambda con: remove(con, model), "remove macros from")


def segment_name_macro(model: Model, name: str, segment: exp.Expression) -> MacroDefinition:
    """<name>_segment_name(x...): the name given to the row's segment (NULL where unnamed or unusable).

    Names go in as string literals made by sqlglot.
    """
    case = exp.Case(this=segment.copy(), ifs=[
        exp.If(this=sqlgen.num(sid), true=exp.Literal.string(str(model.segment_name(sid))))
        for sid in model.segment_ids() if model.segment_name(sid) is not None
    ])
    macro = f"{name}_segment_name"
    values = {"macro": identifier(macro), "params": identifiers(model.input_columns()), "body": expression(case, pretty=True)}
    return MacroDefinition(macro, "scalar", fill(template("scoring"), values), model=name)


def within_segment_name_macro(model: Model, name: str, segment: exp.Expression) -> MacroDefinition:
    """<name>_segment_name(group, x...) of a --within model: the name given to the row's segment within its
    group (`tillite name --group`), NULL where unnamed, unusable or in a group the model does not know."""
    from .within_sql import group_predicate

    ifs = []
    for g in model.within["groups"]:
        same = group_predicate(model.within["column"], g["value"], model.within["type"], TARGET)
        for sid, given in sorted((int(k), v) for k, v in (g.get("names") or {}).items()):
            ifs.append(exp.If(this=exp.and_(same.copy(), exp.EQ(this=segment.copy(), expression=sqlgen.num(sid))),
                              true=exp.Literal.string(str(given))))
    macro = f"{name}_segment_name"
    values = {"macro": identifier(macro), "params": identifiers(scoring_arguments(model)),
              "body": expression(exp.Case(ifs=ifs), pretty=True)}
    return MacroDefinition(macro, "scalar", fill(template("scoring"), values), model=name)
