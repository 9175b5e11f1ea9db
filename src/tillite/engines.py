"""Engines execute statements that sqlgen built; they never build SQL of their own.

The protocol is small: run a query and get its columns back as numpy arrays, run
statements in one transaction, tell the column names and types of a relation,
and list the tables there are (for error messages).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol, Sequence

import numpy as np
from sqlglot import exp

from . import sqlgen
from .sqlgen import Source

__all__ = [
    "Engine",
    "DuckDBEngine",
    "TilliteError",
    "SourceError",
    "open_source",
    "FILE_SUFFIXES",
    "NUMERIC_TYPES",
]


class TilliteError(Exception):
    """An error whose message is meant for the user as it is."""


class SourceError(TilliteError):
    """The database, table or column asked for is missing or unusable."""


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
)


def is_numeric_type(type_name: str) -> bool:
    base = type_name.upper().split("(")[0].strip()
    return base in NUMERIC_TYPES


class Engine(Protocol):
    """What the pipeline needs from a database."""

    dialect: str

    def query(self, statement: exp.Expression) -> dict[str, np.ndarray]:
        """Run a query; its columns as numpy arrays (NULL as NaN for floats, masked otherwise)."""

    def execute(self, statement: exp.Expression) -> None:
        """Run a statement that returns nothing."""

    def run_in_transaction(self, statements: Sequence[exp.Expression]) -> None:
        """Run statements all-or-nothing."""

    def describe(self, source: Source) -> list[tuple[str, str]]:
        """(name, type) of each column of the source."""

    def tables(self) -> list[str]:
        """Tables and views there are, as schema.name."""

    def close(self) -> None: ...


@dataclass
class DuckDBEngine:
    """The embedded default: a .duckdb file, or an in-memory database over files."""

    path: str = ":memory:"
    read_only: bool = False
    dialect: str = "duckdb"

    def __post_init__(self) -> None:
        import duckdb

        self._duckdb = duckdb
        try:
            self.con = duckdb.connect(self.path, read_only=self.read_only)
        except duckdb.Error as err:
            raise SourceError(f"cannot open DuckDB database {self.path}: {err}") from None

    def sql_text(self, statement: exp.Expression) -> str:
        return sqlgen.render(statement, self.dialect)

    def query(self, statement: exp.Expression) -> dict[str, np.ndarray]:
        return self.con.execute(self.sql_text(statement)).fetchnumpy()

    def execute(self, statement: exp.Expression) -> None:
        self.con.execute(self.sql_text(statement))

    def run_in_transaction(self, statements: Sequence[exp.Expression]) -> None:
        self.con.execute("BEGIN TRANSACTION")
        try:
            for st in statements:
                self.con.execute(self.sql_text(st))
        except BaseException:
            self.con.execute("ROLLBACK")
            raise
        self.con.execute("COMMIT")

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
        return [f"{s}.{t}" if s not in ("main",) else str(t) for s, t in zip(got["table_schema"], got["table_name"])]

    def _missing_table_message(self, source: Source) -> str:
        existing = self.tables()
        where = f" in {self.path}" if self.path != ":memory:" else ""
        listing = ", ".join(existing) if existing else "(none)"
        return f"table {source.label} not found{where}; tables there: {listing}"

    def close(self) -> None:
        self.con.close()


def file_reader_for(path: str) -> str | None:
    """The DuckDB reader for a data file path or glob, or None for a database file."""
    lower = path.lower()
    for suffix in sorted(FILE_SUFFIXES, key=len, reverse=True):
        if lower.endswith(suffix):
            return FILE_SUFFIXES[suffix]
    return None


def open_source(location: str, table: str | None, writable: bool = False) -> tuple[Engine, Source]:
    """Engine and Source for a command-line SOURCE and --table.

    A Parquet/CSV/JSON path or glob (or a directory of Parquet files) is read in
    place through an in-memory DuckDB; anything else is a DuckDB database file,
    which must exist (DuckDB would otherwise create an empty one) and is opened
    read-only unless the caller must write (labels).
    """
    reader = file_reader_for(location)
    if reader is None and os.path.isdir(location):
        reader = "parquet"
        location = str(Path(location) / "**" / "*.parquet")
    if reader is not None:
        if not any(ch in location for ch in "*?[") and not os.path.exists(location):
            raise SourceError(f"data file {location} does not exist")
        return DuckDBEngine(":memory:"), Source.of_files(location, reader)
    if not os.path.exists(location):
        raise SourceError(f"database {location} does not exist (give a .duckdb file, or a Parquet/CSV path)")
    if not table:
        raise SourceError(f"--table is needed to read the database {location}")
    return DuckDBEngine(location, read_only=not writable), Source.of_table(table)
