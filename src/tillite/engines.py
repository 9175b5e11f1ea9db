"""Engines execute statements that sqlgen built; they never build SQL of their own.

The protocol is small: run a query and get its columns back as numpy arrays, run
statements in one transaction, tell the column names and types of a relation,
and list the tables there are (for error messages).  A driver's errors never leave
an engine: they become ``errors.EngineError`` (``TransactionConflict`` when another
transaction holds or changed the same rows).  Engines are context managers (closed
on leaving), and so is what ``open_source`` returns.
"""

from __future__ import annotations

import glob
import importlib
import os
import re
import shutil
import tempfile
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, ContextManager, Iterator, Mapping, NamedTuple, Protocol, Sequence

import numpy as np
from sqlglot import exp

from . import sqlgen
from .errors import DatabaseLocked, EngineError, MissingExtraError, SourceError, TilliteError, TransactionConflict
from .outputs import has_duckdb_header
from .sqlgen import Source
from .targets import Target, target_for

__all__ = [
    "Engine",
    "DuckDBEngine",
    "PostgresEngine",
    "SparkEngine",
    "TilliteError",
    "SourceError",
    "EngineError",
    "TransactionConflict",
    "DatabaseLocked",
    "MissingExtraError",
    "ENGINES",
    "engine_kind",
    "open_source",
    "OpenedSource",
    "FILE_SUFFIXES",
    "NUMERIC_TYPES",
    "DUCKDB_STORAGE_VERSION",
    "connect_duckdb",
    "duckdb_transaction",
    "duckdb_errors",
    "result_rows",
]


FILE_SUFFIXES = {
    ".parquet": "parquet",
    ".pq": "parquet",
    ".csv": "csv",
    ".tsv": "csv",
    ".csv.gz": "csv",
    ".json": "json",
    ".ndjson": "json",
    ".jsonl": "json",
}

NUMERIC_TYPES = (
    "TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT",
    "UTINYINT", "USMALLINT", "UINTEGER", "UBIGINT", "UHUGEINT",
    "FLOAT", "DOUBLE", "REAL", "DECIMAL", "NUMERIC", "INT",
    # PostgreSQL's own spellings, and Spark's
    "DOUBLE PRECISION", "FLOAT4", "FLOAT8", "INT2", "INT4", "INT8", "LONG", "SHORT", "BYTE",
)


def is_numeric_type(type_name: str) -> bool:
    base = type_name.upper().split("(")[0].strip()
    return base in NUMERIC_TYPES


class Engine(Protocol):
    """What the pipeline needs from a database."""

    dialect: str
    target: Target  # the engine's SQL differences (targets.py), the target of ``dialect``

    def query(self, statement: exp.Expression) -> dict[str, np.ndarray]:
        """Run a query; its columns as numpy arrays.

        A column with NULLs is a numpy masked array (masked where NULL; the data
        under the mask is NaN for floats), as DuckDB's fetchnumpy gives; a NaN in
        the data stays an unmasked NaN.  ``bytes_fetched`` and ``rows_fetched``
        add up what came back to Python.
        """

    def query_rows(self, statement: exp.Expression) -> list[dict[str, Any]]:
        """Run a query with a small result (a registry table's rows); each row as a dict of Python
        values, NULL as None (what ``result_rows`` makes of ``query``'s columns)."""

    def execute(self, statement: exp.Expression) -> None:
        """Run a statement that returns nothing."""

    def run_in_transaction(self, statements: Sequence[exp.Expression]) -> None:
        """Run statements all-or-nothing."""

    def transaction(self) -> ContextManager[None]:
        """A context in which every statement commits together or not at all."""

    def describe(self, source: Source) -> list[tuple[str, str]]:
        """(name, type) of each column of the source."""

    def tables(self) -> list[str]:
        """Tables and views there are, as schema.name."""

    def relation_kind(self, name: str) -> str | None:
        """'table', 'view' or None for a (possibly schema-qualified) relation name."""

    def relation_comment(self, name: str) -> str | None:
        """The comment on a view or table (None when it has none): where tillite marks what it made."""

    def close(self) -> None: ...

    def __enter__(self) -> "Engine":
        """``with engine:`` closes it on leaving, error or not."""

    def __exit__(self, *exc: object) -> None: ...

    # optional (see pipeline.temporary_cell_map): a small relation held by this connection only
    def hold_temporary(self, name: str, columns: Mapping[str, np.ndarray]) -> bool:
        """Offer numpy columns as relation ``name`` for this session; False when the engine cannot."""

    def drop_temporary(self, name: str) -> None:
        """Remove what ``hold_temporary`` made."""


class StatementRunner:
    """What every engine shares: rendering for its dialect, and statements all-or-nothing."""

    dialect: str

    @property
    def target(self) -> Target:
        """The engine's SQL target (targets.py): every way its SQL differs, for the statement builders."""
        return target_for(self.dialect)

    def sql_text(self, statement: exp.Expression) -> str:
        return sqlgen.render(statement, self.target)

    def __enter__(self) -> Any:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()  # type: ignore[attr-defined]

    def query_rows(self, statement: exp.Expression) -> list[dict[str, Any]]:
        """A small result as rows of Python values, NULL as None (see Engine.query_rows)."""
        return result_rows(self.query(statement))  # type: ignore[attr-defined]

    def execute(self, statement: exp.Expression) -> None:
        """Run a statement that returns nothing, the driver's errors as ours (DuckDB, PostgreSQL)."""
        with self._errors():  # type: ignore[attr-defined]
            self.con.execute(self.sql_text(statement))  # type: ignore[attr-defined]

    @contextmanager
    def transaction(self) -> Iterator[None]:
        """All statements inside commit together, or none do (ROLLBACK on any error inside).

        The driver's own transaction (``_driver_transaction``: engines.duckdb_transaction,
        psycopg's ``transaction()``), its errors as ours.
        """
        with self._errors(), self._driver_transaction():  # type: ignore[attr-defined]
            yield

    def run_in_transaction(self, statements: Sequence[exp.Expression]) -> None:
        with self.transaction():
            for st in statements:
                self.execute(st)

    def relation_comment(self, name: str) -> str | None:
        """The comment on a view or table through the catalog (DuckDB, PostgreSQL)."""
        got = self.query(sqlgen.comment_of_statement(name, self.target))  # type: ignore[attr-defined]
        values = [v for v in got.get("comment", []) if v is not None and not np.ma.is_masked(v)]
        return str(values[0]) if values else None


#: Storage format of every DuckDB file tillite creates: DuckDB's 1.0 format, which the DuckDB
#: shells and clients from 1.0 on open (the 2.0 default format only opens in 2.0 and later).
#: DuckDB keeps an existing file in the format it was created with; this only applies to new files.
DUCKDB_STORAGE_VERSION = "v1.0.0"


def connect_duckdb(path: str, read_only: bool = False) -> Any:
    """duckdb.connect, creating any new file in DUCKDB_STORAGE_VERSION (the SQL console promise)."""
    import duckdb

    return duckdb.connect(path, read_only=read_only, config={"storage_compatibility_version": DUCKDB_STORAGE_VERSION})


@contextmanager
def duckdb_errors() -> Iterator[None]:
    """DuckDB's errors as ours (EngineError), a write-write conflict (TransactionException) as TransactionConflict.

    DuckDBEngine runs every statement inside it; so does the demo build, which uses a plain connection.
    """
    import duckdb

    try:
        yield
    except duckdb.TransactionException as err:
        raise TransactionConflict(f"database error: {first_line(err)}") from None
    except duckdb.Error as err:
        raise EngineError(f"database error: {first_line(err)}") from None


@contextmanager
def duckdb_transaction(con: Any) -> Iterator[None]:
    """BEGIN ... COMMIT on a DuckDB connection, ROLLBACK on any error inside.

    The one transaction helper of every DuckDB path: DuckDBEngine.transaction,
    macro install/remove and the demo database build.
    """
    con.begin()
    try:
        yield
    except BaseException:
        con.rollback()
        raise
    con.commit()


@dataclass
class DuckDBEngine(StatementRunner):
    """The embedded default: a .duckdb file, or an in-memory database over files."""

    path: str = ":memory:"
    read_only: bool = False
    dialect: str = "duckdb"
    bytes_fetched: int = 0
    rows_fetched: int = 0
    #: max_vacuum_tasks before defer_vacuum set it to 0 (None: not deferred)
    _vacuum_tasks: int | None = field(default=None, init=False, repr=False)

    def __post_init__(self) -> None:
        import duckdb

        self._duckdb = duckdb
        try:
            self.con = connect_duckdb(self.path, read_only=self.read_only)
        except duckdb.Error as err:
            if "could not set lock" in str(err).lower():
                raise DatabaseLocked(f"DuckDB database {self.path} is in use by another process, which holds its write lock") from None
            raise SourceError(f"cannot open DuckDB database {self.path}: {err}") from None

    def _errors(self) -> ContextManager[None]:
        return duckdb_errors()

    def query(self, statement: exp.Expression) -> dict[str, np.ndarray]:
        with self._errors():
            got = self.con.execute(self.sql_text(statement)).fetchnumpy()
        _count_fetched(self, got)
        return got

    def query_rows(self, statement: exp.Expression) -> list[dict[str, Any]]:
        """Fetched as tuples rather than numpy columns: a result with a NULL would come back as a masked
        array, and DuckDB imports numpy.ma (25-60 ms of a command's start-up) to make one.  The registry's
        columns (text, integers, doubles, booleans) read as the same Python values either way."""
        with self._errors():
            cur = self.con.execute(self.sql_text(statement))
            rows = cur.fetchall()
            names = [d[0] for d in cur.description or ()]
        self.rows_fetched += len(rows)
        self.bytes_fetched += sum(len(v) if isinstance(v, str) else 8 for r in rows for v in r)
        return [dict(zip(names, r)) for r in rows]

    def _driver_transaction(self) -> ContextManager[None]:
        return duckdb_transaction(self.con)

    def snapshot_transaction(self) -> ContextManager[None]:
        """A transaction whose reads all see one snapshot: every DuckDB transaction does."""
        return self.transaction()

    @contextmanager
    def one_thread(self) -> Iterator[None]:
        """Statements inside run on one thread; the connection's thread count is restored after.

        DuckDB's seeded SYSTEM sample repeats only on one thread (``sqlgen.block_sample_statement``).
        """
        before = int(self.query(sqlgen.threads_statement())["threads"][0])
        self.execute(sqlgen.set_threads_statement(1))
        try:
            yield
        finally:
            self.execute(sqlgen.set_threads_statement(before))

    def defer_vacuum(self, defer: bool = True) -> None:
        """Let this connection's checkpoints (DuckDB writes one when the file's last connection closes)
        leave deleted rows where they are, instead of rewriting whole row groups to reclaim them;
        ``defer=False`` vacuums again.

        A refresh that replaces one partition's cells deletes a few thousand rows of the cells table
        and appends as many; reclaiming them rewrites about 120,000 rows of it (0.1-0.2 s, most of
        the refresh of one partition).  A later checkpoint that vacuums reclaims what was left, in
        one rewrite of about the same cost.  A DuckDB without the setting keeps vacuuming.
        """
        if defer == (self._vacuum_tasks is not None):
            return
        try:
            if defer:
                before = int(self.query_rows(sqlgen.setting_statement("max_vacuum_tasks"))[0]["value"])
                self.execute(sqlgen.set_number_statement("max_vacuum_tasks", 0))
                self._vacuum_tasks = before
            else:
                self.execute(sqlgen.set_number_statement("max_vacuum_tasks", self._vacuum_tasks or 0))
                self._vacuum_tasks = None
        except EngineError:
            pass

    def describe(self, source: Source) -> list[tuple[str, str]]:
        try:
            rel = self.con.sql(self.sql_text(sqlgen.describe_statement(source)))
        except self._duckdb.CatalogException:
            raise SourceError(self._missing_table_message(source)) from None
        except self._duckdb.IOException as err:
            raise SourceError(f"cannot read {source.label}: {err}") from None
        except self._duckdb.Error as err:
            raise SourceError(f"cannot read {source.label}: {err}") from None
        return [(name, str(t)) for name, t in zip(rel.columns, rel.types)]

    def tables(self) -> list[str]:
        got = self.query(sqlgen.list_tables_statement())
        names = [(str(s), str(t)) for s, t in zip(got["table_schema"], got["table_name"])]
        return [sqlgen.quote_name_part(t) if s == "main" else f"{sqlgen.quote_name_part(s)}.{sqlgen.quote_name_part(t)}" for s, t in names]

    def relation_kind(self, name: str) -> str | None:
        """Through information_schema, case-insensitively as DuckDB resolves names."""
        return _relation_kind_from_listing(self.query(sqlgen.list_tables_statement()), name, None, case_sensitive=False)

    def _missing_table_message(self, source: Source) -> str:
        existing = self.tables()
        where = f" in {self.path}" if self.path != ":memory:" else ""
        listing = ", ".join(existing) if existing else "(none)"
        dotted = ".".join(source.table)
        if len(source.table) > 1 and sqlgen.quote_name_part(dotted) in existing:
            return (f"table {source.label} not found{where} (read as schema {source.table[0]}); "
                    f"a name holding a dot is written in double quotes: '{sqlgen.quote_name_part(dotted)}'")
        return f"table {source.label} not found{where}; tables there: {listing}"

    def hold_temporary(self, name: str, columns: Mapping[str, np.ndarray]) -> bool:
        """Offer the columns as a relation ``name`` of this connection only (a registered scan of the arrays).

        Needs no write access, so it works on read-only files too; gone with
        ``drop_temporary`` or the connection.
        """
        with self._errors():
            self.con.register(name, dict(columns))
        return True

    def drop_temporary(self, name: str) -> None:
        with self._errors():
            self.con.unregister(name)

    def close(self) -> None:
        self.con.close()


def is_file_source(location: str) -> bool:
    """A Parquet/CSV/JSON path or glob, or a folder of such files, rather than a database."""
    return file_reader_for(location) is not None or os.path.isdir(location)


def file_reader_for(path: str) -> str | None:
    """The DuckDB reader for a data file path or glob, or None for a database file."""
    lower = path.lower()
    for suffix in sorted(FILE_SUFFIXES, key=len, reverse=True):
        if lower.endswith(suffix):
            return FILE_SUFFIXES[suffix]
    return None


def open_database(path: str, writable: bool = False) -> Engine:
    """The database at ``path``: PostgreSQL by its postgresql:// URL, else a DuckDB file, which must
    exist (DuckDB would create an empty one). The one opener of a database without a table."""
    if engine_kind(path) == "postgres":
        return PostgresEngine(path, read_only=not writable)
    if not os.path.exists(path):
        raise SourceError(f"database {path} does not exist")
    return DuckDBEngine(path, read_only=not writable)


class OpenedSource(NamedTuple):
    """What open_source gives: unpack it (``engine, source = open_source(...)``), or use it in a
    with-statement (``with open_source(...) as (engine, source):``), which closes the engine on leaving."""

    engine: Engine
    source: Source

    def __enter__(self) -> "OpenedSource":
        return self

    def __exit__(self, *exc: object) -> None:
        self.engine.close()


def open_source(
    location: str,
    table: str | None,
    writable: bool = False,
    database: str | None = None,
    engine: str | None = None,
    spark_conf: Mapping[str, str] | None = None,
) -> OpenedSource:
    """Engine and Source for a command-line SOURCE and --table (closed on leaving a with-statement).

    ``engine`` (duckdb, postgres, spark; None or "auto" to tell from SOURCE):
    a ``postgresql://`` URL is PostgreSQL, a Spark master (``spark://host:7077``,
    ``local[2]``, ``yarn``, ``k8s://...``) is Spark, anything else is DuckDB.
    See ``_open_postgres``/``_open_spark`` for those two.

    A Parquet/CSV/JSON path or glob (or a directory of Parquet files) is read in
    place through DuckDB (in memory, or the ``database`` file when given, e.g. to
    keep a summary store there); anything else is a DuckDB database file, which
    must exist (DuckDB would otherwise create an empty one) and is opened
    read-only unless the caller must write (labels).
    """
    kind = engine_kind(location, engine)
    if kind == "postgres":
        return OpenedSource(*_open_postgres(location, table, writable))
    if kind == "spark":
        return OpenedSource(*_open_spark(location, table, dict(spark_conf or {})))
    reader = file_reader_for(location)
    if reader is None and os.path.isdir(location):
        reader = "parquet"
        location = str(Path(location) / "**" / "*.parquet")
    if reader is not None:
        if not any(ch in location for ch in "*?[") and not os.path.exists(location):
            raise SourceError(f"data file {location} does not exist")
        if database is not None:
            return OpenedSource(DuckDBEngine(database, read_only=not writable), Source.of_files(location, reader))
        return OpenedSource(DuckDBEngine(":memory:"), Source.of_files(location, reader))
    if not os.path.exists(location):
        raise SourceError(_not_duckdb_source(location))
    if not table:
        raise SourceError(f"--table is needed to read the database {location}")
    return OpenedSource(DuckDBEngine(location, read_only=not writable), Source.of_table(table))


# ----------------------------------------------------------------------------- shared by the engines


#: The engines there are, and the optional extra that installs each one's driver.
ENGINES = {"duckdb": None, "postgres": "postgres", "spark": "spark"}

#: SOURCE strings that name a Spark master rather than a file or a database.
SPARK_MASTER = re.compile(r"^(spark://|k8s://|mesos://|local(\[[0-9*]+(,[0-9]+)?\])?$|yarn$)")

POSTGRES_URL = re.compile(r"^postgres(ql)?://")


def require_extra(module: str, extra: str) -> Any:
    """Import a driver, or say which extra brings it."""
    try:
        return importlib.import_module(module)
    except ImportError:
        raise MissingExtraError(
            f"the {extra} engine needs the Python package {module.split('.')[0]}: pip install 'tillite[{extra}]'"
        ) from None


def engine_kind(location: str, engine: str | None = None) -> str:
    """Which engine serves SOURCE: the one asked for, else told from the SOURCE string."""
    if engine not in (None, "", "auto"):
        if engine not in ENGINES:
            raise SourceError(f"unknown engine {engine!r}; expected one of {', '.join(ENGINES)}")
        return engine
    if POSTGRES_URL.match(location):
        return "postgres"
    if SPARK_MASTER.match(location):
        return "spark"
    return "duckdb"


def first_line(err: BaseException) -> str:
    text = str(err).strip()
    return text.splitlines()[0] if text else type(err).__name__


def column_array(values: Sequence[Any], kind: str) -> np.ndarray:
    """One result column as numpy, NULLs masked as DuckDB's fetchnumpy does.

    kind is float, int, bool or object.  A None is NULL (masked; NaN under the
    mask for floats, so np.asarray of the column reads NULL as NaN); a float NaN
    from the database stays an unmasked NaN.
    """
    null = np.fromiter((v is None for v in values), dtype=bool, count=len(values))
    if kind == "float":
        data = np.fromiter((np.nan if v is None else float(v) for v in values), dtype=np.float64, count=len(values))
    elif kind == "int":
        data = np.fromiter((0 if v is None else int(v) for v in values), dtype=np.int64, count=len(values))
    elif kind == "bool":
        data = np.fromiter((False if v is None else bool(v) for v in values), dtype=bool, count=len(values))
    else:
        data = np.empty(len(values), dtype=object)
        for i, v in enumerate(values):
            data[i] = v
    return np.ma.MaskedArray(data, mask=null) if null.any() else data


def rows_to_columns(names: Sequence[str], kinds: Sequence[str], rows: Sequence[Sequence[Any]]) -> dict[str, np.ndarray]:
    """Result rows (tuples) as named numpy columns."""
    return {name: column_array([r[i] for r in rows], kind) for i, (name, kind) in enumerate(zip(names, kinds))}


def result_rows(got: Mapping[str, np.ndarray]) -> list[dict[str, Any]]:
    """A query's columns as rows: dicts of Python values (numpy scalars unwrapped), NULL (masked) as None."""
    names = list(got)
    count = len(got[names[0]]) if names else 0
    # a masked array's mask; np.ma is only asked when there is one (reading np.ma imports numpy.ma)
    masks = {n: np.ma.getmaskarray(got[n]) for n in names if hasattr(got[n], "mask") and hasattr(got[n], "filled")}
    out = []
    for i in range(count):
        row = {}
        for n in names:
            v = got[n][i]
            row[n] = None if n in masks and masks[n][i] else (v.item() if hasattr(v, "item") else v)
        out.append(row)
    return out


def _mask_bytes(a: np.ndarray) -> int:
    """The bytes of a masked array's NULL mask, 0 for a plain array.

    Read as an attribute: asking ``np.ma`` imports numpy.ma (25-60 ms of a
    command's start-up) even when no result had a NULL.
    """
    mask = getattr(a, "mask", None)
    return int(mask.nbytes) if isinstance(mask, np.ndarray) else 0


def _count_fetched(engine: Any, got: Mapping[str, np.ndarray]) -> None:
    """Add a result's size to the engine's tally of what came back to Python."""
    arrays = list(got.values())
    engine.bytes_fetched += int(sum(a.nbytes + _mask_bytes(a) for a in arrays))
    engine.rows_fetched += len(arrays[0]) if arrays else 0


def _relation_kind_from_listing(
    got: Mapping[str, np.ndarray], name: str, default_schema: str | None, case_sensitive: bool
) -> str | None:
    """'table'/'view'/None from information_schema.tables rows (table_schema, table_name, table_type).

    An unqualified name matches in ``default_schema`` when given, else in any schema.
    """
    fold = (lambda t: t) if case_sensitive else (lambda t: t.lower())
    parts = [fold(p) for p in sqlgen.split_table_name(name)]
    schema = parts[-2] if len(parts) >= 2 else (fold(default_schema) if default_schema else None)
    for s, t, kind in zip(got["table_schema"], got["table_name"], got["table_type"]):
        if fold(str(t)) == parts[-1] and (schema is None or fold(str(s)) == schema):
            return "view" if "VIEW" in str(kind).upper() else "table"
    return None


# ----------------------------------------------------------------------------- PostgreSQL

#: SQLSTATEs of losing a race for rows: lock_not_available, serialization_failure, deadlock_detected.
CONFLICT_STATES = ("55P03", "40001", "40P01")

#: Result kinds by PostgreSQL type OID (bool, int2/4/8, float4/8, numeric); the rest are objects.
PG_KINDS = {16: "bool", 20: "int", 21: "int", 23: "int", 700: "float", 701: "float", 1700: "float"}

#: Type names for describe(), as PostgreSQL's documentation spells them.
PG_TYPE_NAMES = {
    16: "BOOLEAN", 20: "BIGINT", 21: "SMALLINT", 23: "INTEGER", 700: "REAL", 701: "DOUBLE PRECISION",
    1700: "NUMERIC", 25: "TEXT", 1043: "VARCHAR", 1082: "DATE", 1114: "TIMESTAMP", 1184: "TIMESTAMPTZ",
}

#: Schemas of the server's own catalog, left out of table listings.
PG_SYSTEM_SCHEMAS = ("pg_catalog", "information_schema", "pg_toast")


@dataclass
class PostgresEngine(StatementRunner):
    """PostgreSQL through psycopg 3: the same trees rendered in the postgres dialect.

    ``conninfo`` is a ``postgresql://`` URL or a ``key=value`` string.  Opened
    read-only (default_transaction_read_only) unless the caller must write, so
    segmenting cannot change the database.  Statements run in autocommit mode;
    ``transaction()`` groups them (PostgreSQL's DDL is transactional).
    """

    conninfo: str
    read_only: bool = False
    dialect: str = "postgres"
    bytes_fetched: int = 0
    rows_fetched: int = 0

    def __post_init__(self) -> None:
        psycopg = require_extra("psycopg", "postgres")
        self._psycopg = psycopg
        try:
            self.con = psycopg.connect(self._connect_string(), autocommit=True)
        except psycopg.Error as err:
            raise SourceError(f"cannot connect to PostgreSQL at {self.where}: {first_line(err)}") from None

    def _connect_string(self) -> str:
        from psycopg.conninfo import conninfo_to_dict, make_conninfo

        try:
            params = conninfo_to_dict(self.conninfo)
        except self._psycopg.ProgrammingError as err:
            raise SourceError(f"not a PostgreSQL connection string: {first_line(err)}") from None
        if self.read_only:
            params["options"] = f"{params.get('options') or ''} -c default_transaction_read_only=on".strip()
        params.setdefault("application_name", "tillite")
        return make_conninfo("", **params)

    @property
    def where(self) -> str:
        """The server and database, for messages (never the password)."""
        from psycopg.conninfo import conninfo_to_dict

        try:
            p = conninfo_to_dict(self.conninfo)
        except Exception:
            return "(unreadable connection string)"
        return f"{p.get('user', '')}@{p.get('host', 'localhost')}:{p.get('port', '5432')}/{p.get('dbname', '')}"

    @contextmanager
    def _errors(self) -> Iterator[None]:
        """psycopg's errors as ours: losing a race for rows (by SQLSTATE) is a TransactionConflict."""
        try:
            yield
        except self._psycopg.Error as err:
            state = getattr(err, "sqlstate", None)
            kind = TransactionConflict if state in CONFLICT_STATES else EngineError
            raise kind(f"database error: {first_line(err)}", state) from None

    def query(self, statement: exp.Expression) -> dict[str, np.ndarray]:
        with self._errors():
            try:
                cur = self.con.execute(self.sql_text(statement))
            except (self._psycopg.errors.FeatureNotSupported, self._psycopg.errors.WrongObjectType) as err:
                if statement.find(exp.TableSample) is None or "TABLESAMPLE" not in str(err):
                    raise
                # a view: PostgreSQL samples only tables and materialized views by blocks
                cur = self.con.execute(self.sql_text(sqlgen.sample_by_filter(statement)))
            rows = cur.fetchall()
            desc = cur.description or []
        got = rows_to_columns([c.name for c in desc], [PG_KINDS.get(c.type_code, "object") for c in desc], rows)
        _count_fetched(self, got)
        return got

    def _driver_transaction(self) -> ContextManager[None]:
        return self.con.transaction()

    @contextmanager
    def snapshot_transaction(self) -> Iterator[None]:
        """A REPEATABLE READ transaction: every read inside sees the snapshot of its first statement.

        A store refresh fingerprints partitions and summarises them inside one
        such transaction, so a writer committing in between cannot make the
        fingerprints vouch for cells computed from other rows.
        """
        previous = self.con.isolation_level
        self.con.isolation_level = self._psycopg.IsolationLevel.REPEATABLE_READ
        try:
            with self.transaction():
                yield
        finally:
            self.con.isolation_level = previous

    def describe(self, source: Source) -> list[tuple[str, str]]:
        errors = self._psycopg.errors
        try:
            cur = self.con.execute(self.sql_text(sqlgen.describe_statement(source)))
        except (errors.UndefinedTable, errors.InvalidSchemaName):
            raise SourceError(self._missing_table_message(source)) from None
        except self._psycopg.Error as err:
            raise SourceError(f"cannot read {source.label}: {first_line(err)}") from None
        return [(c.name, self._type_name(c.type_code)) for c in cur.description or []]

    def _type_name(self, oid: int) -> str:
        if oid in PG_TYPE_NAMES:
            return PG_TYPE_NAMES[oid]
        info = self._psycopg.postgres.types.get(oid)
        return info.name.upper() if info is not None else f"OID {oid}"

    def _listing(self) -> dict[str, np.ndarray]:
        return self.query(sqlgen.list_tables_statement())

    def tables(self) -> list[str]:
        got = self._listing()
        out = []
        for s, t in zip(got["table_schema"], got["table_name"]):
            if str(s) not in PG_SYSTEM_SCHEMAS:
                out.append(str(t) if s == "public" else f"{s}.{t}")
        return out

    def relation_kind(self, name: str) -> str | None:
        """Through information_schema; an unqualified name is looked up in current_schema(), case as written."""
        schema = str(self.query(sqlgen.current_schema_statement())["schema"][0])
        return _relation_kind_from_listing(self._listing(), name, schema, case_sensitive=True)

    def _missing_table_message(self, source: Source) -> str:
        listing = ", ".join(self.tables()) or "(none)"
        return f"table {source.label} not found in PostgreSQL database {self.where}; tables there: {listing}"

    def hold_temporary(self, name: str, columns: Mapping[str, np.ndarray]) -> bool:
        """Not offered: a read-only session (how segmenting connects) may not create temporary tables.

        Callers then put the rows inline in the statement.
        """
        return False

    def drop_temporary(self, name: str) -> None:
        return None

    def close(self) -> None:
        self.con.close()


def _open_postgres(location: str, table: str | None, writable: bool) -> tuple[Engine, Source]:
    if not table:
        raise SourceError("--table is needed to read a PostgreSQL database (schema.table or table)")
    return PostgresEngine(location, read_only=not writable), Source.of_table(table)


# ----------------------------------------------------------------------------- Spark

#: Result kinds by Spark SQL type name; the rest are objects.
SPARK_KINDS = {
    "double": "float", "float": "float", "decimal": "float",
    "long": "int", "integer": "int", "short": "int", "byte": "int",
    "boolean": "bool",
}

#: Settings for a session tillite starts with a local master (a user's --spark-conf wins).
SPARK_LOCAL_DEFAULTS = {
    "spark.ui.enabled": "false",
    "spark.ui.showConsoleProgress": "false",
    "spark.sql.shuffle.partitions": "8",
    "spark.log.level": "FATAL",  # our errors carry the first line; Spark would add a JSON stack dump
}

#: The driver's log4j settings while a session starts (spark.log.level takes over once it runs):
#: errors only, so a start prints no profile, hostname or native-library lines. Spark's own
#: logger is set too: a level of its own equal to the root's keeps Spark from announcing
#: (to stderr) that it changes the default level for a Python session.
SPARK_STARTUP_LOG4J = """\
rootLogger.level = error
rootLogger.appenderRef.stderr.ref = console
appender.console.type = Console
appender.console.name = console
appender.console.target = SYSTEM_ERR
appender.console.layout.type = PatternLayout
appender.console.layout.pattern = %p %c{1}: %m%n
logger.spark.name = org.apache.spark
logger.spark.level = error
"""


@dataclass
class SparkEngine(StatementRunner):
    """Spark SQL through pyspark: the same trees rendered in the spark dialect.

    Give ``session`` to use a SparkSession you have (it is left running on
    close), or ``master`` (``local[2]``, ``spark://host:7077``, ``yarn``, ...)
    and ``conf`` to start one.  Results are collected from the query's few rows
    (cells and segments); the rows themselves never reach the driver.

    Labels: a CREATE VIEW becomes a TEMPORARY VIEW when it reads a temporary
    view (Spark refuses a catalog view over one) or when ``temporary_views`` is
    True; a CREATE TABLE ... AS SELECT is written by the DataFrame writer
    (``saveAsTable``, overwrite only when the statement says OR REPLACE); a
    COPY to a file is written by Spark's file writer as one file.  Spark has no
    multi-statement transactions: ``transaction()`` runs statements one by one.
    """

    master: str | None = "local[*]"
    conf: dict[str, str] = field(default_factory=dict)
    session: Any = None
    temporary_views: bool | None = None
    dialect: str = "spark"
    bytes_fetched: int = 0
    rows_fetched: int = 0

    def __post_init__(self) -> None:
        require_extra("pyspark.sql", "spark")
        from pyspark.errors import PySparkException
        from py4j.protocol import Py4JError

        self._errors_caught = (PySparkException, Py4JError)
        self._owns_session = False
        self._scratch: str | None = None
        if self.session is None:
            from pyspark.sql import SparkSession

            # a session already running in this process is shared, and left running on close
            self._owns_session = SparkSession.getActiveSession() is None
            self.session = self._start_session()

    def _start_session(self) -> Any:
        from pyspark.sql import SparkSession

        builder = SparkSession.builder.appName("tillite")
        conf = dict(self.conf)
        master = conf.pop("spark.master", None) or self.master
        if master:
            builder = builder.master(master)
        conf = {**self._session_defaults(local=bool(master and master.startswith("local")), given=conf), **conf}
        for key, value in conf.items():
            builder = builder.config(key, value)
        try:
            return builder.getOrCreate()
        except Exception as err:  # a JVM that cannot start shows as several exception types
            raise SourceError(f"cannot start Spark with master {master}: {first_line(err)}") from None

    def _session_defaults(self, local: bool, given: Mapping[str, str]) -> dict[str, str]:
        """Settings for a session this engine starts, in a scratch folder removed on close.

        The driver logs errors only while it starts (unless --spark-conf sets its Java
        options); a local session keeps its warehouse (tables written by ``label --into
        ... --materialize``, gone with the session's in-memory catalog anyway) in the
        scratch folder rather than ``spark-warehouse/`` in the current folder, unless
        --spark-conf sets ``spark.sql.warehouse.dir``.
        """
        self._scratch = tempfile.mkdtemp(prefix="tillite-spark-")
        log4j = Path(self._scratch) / "log4j2.properties"
        log4j.write_text(SPARK_STARTUP_LOG4J)
        out = dict(SPARK_LOCAL_DEFAULTS) if local else {}
        if "spark.driver.extraJavaOptions" not in given:
            out["spark.driver.extraJavaOptions"] = f"-Dlog4j2.configurationFile={log4j.as_uri()}"
        if local and "spark.sql.warehouse.dir" not in given:
            out["spark.sql.warehouse.dir"] = str(Path(self._scratch) / "warehouse")
        return out

    @property
    def spark(self) -> Any:
        return self.session

    def sql_text(self, statement: exp.Expression) -> str:
        try:
            return sqlgen.render(statement, self.target)
        except ValueError as err:
            raise SourceError(str(err)) from None

    @contextmanager
    def _errors(self) -> Iterator[None]:
        try:
            yield
        except self._errors_caught as err:
            raise EngineError(f"database error: {first_line(err)}") from None

    def _frame(self, statement: exp.Expression) -> Any:
        return self.spark.sql(self.sql_text(statement))

    def query(self, statement: exp.Expression) -> dict[str, np.ndarray]:
        with self._errors():
            frame = self._frame(statement)
            rows = frame.collect()
        fields = frame.schema.fields
        kinds = [SPARK_KINDS.get(f.dataType.typeName(), "object") for f in fields]
        got = rows_to_columns([f.name for f in fields], kinds, rows)
        _count_fetched(self, got)
        return got

    def execute(self, statement: exp.Expression) -> None:
        with self._errors():
            if _is_create(statement, "TABLE") and isinstance(statement.expression, exp.Query):
                self._save_as_table(statement)
            elif isinstance(statement, exp.Copy):
                self._write_file(statement)
            elif _is_create(statement, "VIEW") and self._needs_temporary(statement):
                self.spark.sql(self.sql_text(sqlgen.temporary_view(statement)))
            elif _is_view_mark(statement) and self._is_temporary(statement.this):
                pass  # a temporary view keeps no comment (and lives only as long as this session)
            else:
                self.spark.sql(self.sql_text(statement))

    def _save_as_table(self, create: exp.Create) -> None:
        """CREATE [OR REPLACE] TABLE name AS SELECT, written by Spark's own table writer."""
        mode = "overwrite" if create.args.get("replace") else "errorifexists"
        self._frame(create.expression).write.mode(mode).saveAsTable(sqlgen.render(create.this, self.target))

    def _write_file(self, copy: exp.Copy) -> None:
        """COPY (select) TO 'path' (FORMAT f): Spark writes one part file, which becomes ``path``.

        Local filesystem paths only (local mode, or a path every executor shares).
        """
        path = copy.args["files"][0].name
        fmt = next((p.expression.name.lower() for p in copy.args.get("params") or [] if p.name.upper() == "FORMAT"), "parquet")
        staging = f"{path}.spark-parts"
        writer = self._frame(copy.this.this).coalesce(1).write.mode("overwrite").format(fmt)
        if fmt == "csv":
            writer = writer.option("header", "true")
        writer.save(staging)
        try:
            parts = sorted(glob.glob(os.path.join(staging, "part-*")))
            if len(parts) != 1:
                raise EngineError(f"Spark wrote {len(parts)} part files to {staging}; expected one")
            os.replace(parts[0], path)
        finally:
            shutil.rmtree(staging, ignore_errors=True)

    def _needs_temporary(self, create: exp.Create) -> bool:
        if self.temporary_views is not None:
            return self.temporary_views
        query = create.expression
        return any(self._is_temporary(t) for t in query.find_all(exp.Table)) if query is not None else False

    def _is_temporary(self, table: exp.Table) -> bool:
        if table.args.get("db") is not None:
            return table.db.lower() == "global_temp"
        if not table.name:
            return False
        try:
            return bool(self.spark.catalog.getTable(sqlgen.render(table, self.target)).isTemporary)
        except self._errors_caught:
            return False

    @contextmanager
    def transaction(self) -> Iterator[None]:
        """Spark SQL has no multi-statement transactions: statements inside run one by one."""
        yield

    def describe(self, source: Source) -> list[tuple[str, str]]:
        try:
            frame = self._frame(sqlgen.describe_statement(source))
        except self._errors_caught as err:
            text = str(err)
            if "TABLE_OR_VIEW_NOT_FOUND" in text or "SCHEMA_NOT_FOUND" in text:
                raise SourceError(self._missing_table_message(source)) from None
            if "PATH_NOT_FOUND" in text:
                raise SourceError(f"data file {source.label} does not exist") from None
            raise SourceError(f"cannot read {source.label}: {first_line(err)}") from None
        return [(f.name, f.dataType.simpleString().upper()) for f in frame.schema.fields]

    def tables(self) -> list[str]:
        with self._errors():
            listed = self.spark.catalog.listTables()
        return [".".join([*(t.namespace or []), t.name]) if not t.isTemporary else t.name for t in listed]

    def relation_kind(self, name: str) -> str | None:
        """Through Spark's catalog (Spark SQL has no information_schema)."""
        try:
            found = self.spark.catalog.getTable(sqlgen.render(sqlgen.table_name(name), self.target))
        except self._errors_caught:
            return None
        return "view" if found.isTemporary or str(found.tableType).upper() in ("VIEW", "TEMPORARY") else "table"

    def relation_comment(self, name: str) -> str | None:
        """Through Spark's catalog: a table's comment, a catalog view's 'comment' property (temporary views: None)."""
        try:
            found = self.spark.catalog.getTable(sqlgen.render(sqlgen.table_name(name), self.target))
        except self._errors_caught:
            return None
        return None if found.isTemporary else found.description

    def _missing_table_message(self, source: Source) -> str:
        listing = ", ".join(self.tables()) or "(none)"
        return f"table {source.label} not found in Spark's catalog; tables there: {listing}"

    def hold_temporary(self, name: str, columns: Mapping[str, np.ndarray]) -> bool:
        """Offer the columns as a session-scoped temporary view ``name`` (a small DataFrame)."""
        from pyspark.sql.types import DoubleType, IntegerType, StructField, StructType

        names = list(columns)
        rows = list(zip(*(np.asarray(columns[n]).tolist() for n in names)))
        kinds = [IntegerType() if np.asarray(columns[n]).dtype.kind in "iu" else DoubleType() for n in names]
        schema = StructType([StructField(n, k, nullable=False) for n, k in zip(names, kinds)])
        with self._errors():
            self.spark.createDataFrame(rows, schema=schema).createOrReplaceTempView(name)
        return True

    def drop_temporary(self, name: str) -> None:
        with self._errors():
            self.spark.catalog.dropTempView(name)

    def close(self) -> None:
        if self._owns_session and self.session is not None:
            self.session.stop()
            self.session = None
        if getattr(self, "_scratch", None):
            shutil.rmtree(self._scratch, ignore_errors=True)
            self._scratch = None


def _is_create(statement: exp.Expression, kind: str) -> bool:
    return isinstance(statement, exp.Create) and str(statement.args.get("kind") or "").upper() == kind


def _is_view_mark(statement: exp.Expression) -> bool:
    """ALTER VIEW ... SET TBLPROPERTIES: sqlgen.mark_statement on a Spark view."""
    return isinstance(statement, exp.Alter) and str(statement.args.get("kind") or "").upper() == "VIEW"


def _open_spark(location: str, table: str | None, conf: dict[str, str]) -> tuple[Engine, Source]:
    """SOURCE is a Spark master (with --table), or a Parquet/JSON path read in place by Spark.

    For a path the master comes from --spark-conf spark.master=..., else local[*].
    """
    reader = file_reader_for(location)
    is_dir = reader is None and os.path.isdir(location)
    if reader is None and not is_dir:
        if not SPARK_MASTER.match(location):
            raise SourceError(_not_spark_source(location))
        if not table:
            raise SourceError(f"--table is needed to read from Spark at {location}")
        return SparkEngine(master=location, conf=conf), Source.of_table(table)
    reader = reader or "parquet"
    if reader not in ("parquet", "json"):
        raise SourceError(f"Spark SQL reads {reader} files without their header; convert {location} to Parquet or register it as a table")
    local = "://" not in location
    if local and not any(ch in location for ch in "*?[") and not os.path.exists(location):
        raise SourceError(f"data file {location} does not exist")
    return SparkEngine(master=conf.get("spark.master", "local[*]"), conf=conf), Source.of_files(location, reader)


def _not_duckdb_source(location: str) -> str:
    """Why DuckDB cannot open SOURCE: a URL of another engine (given with --engine duckdb), or no such file."""
    other = "postgres" if POSTGRES_URL.match(location) else "spark" if SPARK_MASTER.match(location) else None
    if other:
        what = "a PostgreSQL URL" if other == "postgres" else "a Spark master URL"
        return (f"SOURCE {location} is {what}, which --engine duckdb cannot open (it reads DuckDB files and "
                f"Parquet/CSV paths); leave out --engine or give --engine {other}")
    return f"database {location} does not exist (give a .duckdb file, or a Parquet/CSV path)"


def _not_spark_source(location: str) -> str:
    """Why --engine spark refuses SOURCE, said before a JVM starts (Spark would print its stack trace)."""
    if POSTGRES_URL.match(location):
        what = "a PostgreSQL URL"
    elif _is_duckdb_file(location):
        what = "a DuckDB database file (read it with --engine duckdb)"
    elif os.path.isfile(location):
        what = "a file that is not Parquet or JSON"
    else:
        what = "neither a Spark master URL nor a Parquet/JSON path"
    return (f"SOURCE {location} is {what}; --engine spark reads a master URL (local[*], spark://host:7077, "
            f"yarn, k8s://..., mesos://...) with --table, or Parquet/JSON files")


def _is_duckdb_file(location: str) -> bool:
    """A DuckDB database file: its header holds DUCK at byte 8."""
    try:
        return has_duckdb_header(location)
    except OSError:
        return False
