"""tillite's user-facing errors, one family in a module that imports nothing heavy.

The command line catches them before it knows whether any engine will be opened.
Every engine turns its driver's errors into ``EngineError`` (``TransactionConflict``
when another transaction holds or changed the same rows), so no layer above the
engines catches a driver's exception or reads a driver's message; a plain
``ValueError`` reaching the command line is a bug.  The modules that raise these
re-export them (``tillite.engines.SourceError``, ``tillite.store.StoreBusy``, ...),
so the old import paths name the same classes.
"""

from __future__ import annotations

__all__ = [
    "TilliteError",
    "InputError",
    "ParameterError",
    "SourceError",
    "ColumnTypeError",
    "DatabaseLocked",
    "EngineError",
    "TransactionConflict",
    "MissingExtraError",
    "ModelError",
    "StoreError",
    "StoreBusy",
    "StoreExists",
    "MacroError",
    "NamingError",
]


class TilliteError(Exception):
    """An error whose message is meant for the user as it is."""


class InputError(TilliteError):
    """The request cannot be met with this data (empty table, k too large, ...)."""


class ParameterError(InputError):
    """A parameter value no run can use.

    The message is a template: ``{name}`` stands for the parameter, spelled as
    the API names it (``str(err)``) or as the CLI names its option (``err.text(names)``).
    """

    def __init__(self, template: str, *parameters: str, spelled: dict[str, str] | None = None) -> None:
        self.template = template
        self.parameters = parameters
        self.spelled = spelled or {}
        super().__init__(self.text({}))

    def text(self, names: dict[str, str]) -> str:
        """The message with each parameter spelled by ``names`` (else as the API spells it)."""
        def spell(p: str) -> str:
            return names[p] if p in names or hasattr(type(names), "__missing__") else self.spelled.get(p, p)

        out = self.template  # replace, not str.format: values in the message may hold braces
        for p in self.parameters:
            out = out.replace("{" + p + "}", spell(p))
        return out


# ----------------------------------------------------------------------------- sources and engines


class SourceError(TilliteError):
    """The database, table or column asked for is missing or unusable."""


class ColumnTypeError(SourceError, ParameterError):
    """A column chosen to segment on is not a number; its message (a template) names the parameter that takes
    it as categories."""


class DatabaseLocked(SourceError):
    """Another process holds the DuckDB file's write lock (DuckDB lets one process write a file at a time)."""


class EngineError(TilliteError):
    """The database refused or failed a statement; the message is the database's own first line.

    ``sqlstate`` is the SQL standard's error code where the driver gives one
    (PostgreSQL: 55P03 when a NOWAIT lock is held elsewhere).
    """

    def __init__(self, message: str, sqlstate: str | None = None) -> None:
        super().__init__(message)
        self.sqlstate = sqlstate


class TransactionConflict(EngineError):
    """Another transaction holds or changed the rows this one needs (a lock, a write-write conflict).

    The engine that raises it has rolled the statement back; running again later can succeed.
    """


class MissingExtraError(TilliteError):
    """An engine's driver is not installed; the message names the extra to install."""


# ----------------------------------------------------------------------------- files, stores, macros, names


class ModelError(TilliteError):
    """The model file is missing, unreadable or not one of ours."""


class StoreError(TilliteError):
    """The store is missing, damaged, or cannot be changed as asked."""


class StoreBusy(StoreError):
    """Another refresh changed the store first; nothing was changed by this one."""


class StoreExists(ParameterError, StoreError):
    """A store of that name exists and replacing it was not asked for (a ParameterError naming ``replace``)."""


class MacroError(TilliteError):
    """A macro cannot be built, installed or removed as asked."""


class NamingError(TilliteError):
    """A segment id or name given to `tillite name` is not usable."""
