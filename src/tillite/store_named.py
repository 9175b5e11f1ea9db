"""`refresh --partitions COLUMN=VALUE,...`: the values as `store status` and refresh reports print them.

A partition value is written as it is shown (``store.part_label``): ``NULL`` is SQL
NULL, a double-quoted value is text read as a JSON string (``"NULL"`` is the text
'NULL', ``"a/b"`` a value holding a separator), a single-quoted one is a SQL
string literal (``'NULL'``, quotes doubled inside); anything else is the value as
typed, cast to the column's type by the database.
"""

from __future__ import annotations

import json
from typing import Any, Mapping, Sequence

from . import sqlgen
from .engines import Engine
from .errors import EngineError, ParameterError, SourceError

__all__ = ["NamedValue", "named_values", "value_terms", "unmatched_note"]

#: (the item as given, the partition column, the value: None for SQL NULL)
NamedValue = tuple[str, str, "str | None"]


def partition_value(text: str, item: str) -> str | None:
    """One VALUE of ``--partitions``: NULL, "json text", 'sql text' or the value as typed."""
    if text == "NULL":
        return None
    if len(text) >= 2 and text[0] == text[-1] == '"':
        try:
            value = json.loads(text)
        except ValueError:
            value = None
        if not isinstance(value, str):
            raise ParameterError(f"{{partitions}} {item!r}: a double-quoted value is read as a JSON string "
                                 "(as `store status` prints it); this one is not", "partitions")
        return value
    if len(text) >= 2 and text[0] == text[-1] == "'":
        return text[1:-1].replace("''", "'")
    return text


def named_values(partitions: Sequence[str], names: Sequence[str]) -> list[NamedValue]:
    """Each COLUMN=VALUE item with its partition column (any case) and value."""
    by_lower = {n.lower(): n for n in names}
    out: list[NamedValue] = []
    for item in partitions:
        name, eq, value = item.partition("=")
        if not eq or name.strip().lower() not in by_lower:
            raise ParameterError(f"{{partitions}} {item!r}: give COLUMN=VALUE with a partition column ({', '.join(names)})",
                                 "partitions")
        out.append((item, by_lower[name.strip().lower()], partition_value(value, item)))
    return out


def _typed(value: str, kind: Any) -> Any:
    return sqlgen.exp.cast(sqlgen.exp.Literal.string(value), kind)


def value_terms(engine: Engine, named: Sequence[NamedValue], types: Mapping[str, str]) -> list[Any]:
    """Per column, its values as one condition (IN, OR IS NULL); columns' conditions are all to hold.

    Each value must read as the column's type: checked with one tiny query, no table.
    """
    terms = []
    for name in dict.fromkeys(n for _, n, _ in named):
        if name not in types:  # the store's refresh names the column gone from its source
            raise SourceError(f"partition column {name} not found in the source")
        values = [v for _, n, v in named if n == name]
        kind = sqlgen.exp.DataType.build(types[name], dialect=engine.target.name)
        casts = [_typed(v, kind) for v in values if v is not None]
        if casts:
            try:
                engine.query(sqlgen.exp.select(*[sqlgen.exp.alias_(c.copy(), f"v{i}", quoted=True) for i, c in enumerate(casts)]))
            except EngineError:
                shown = ", ".join(v for v in values if v is not None)
                raise ParameterError(f"{{partitions}}: a value of {name} ({shown}) does not read as {types[name]}",
                                     "partitions") from None
        parts = [sqlgen.exp.In(this=sqlgen.col(name), expressions=casts)] if casts else []
        if None in values:
            parts.append(sqlgen.exp.Is(this=sqlgen.col(name), expression=sqlgen.exp.Null()))
        terms.append(parts[0] if len(parts) == 1 else sqlgen.exp.Or(this=parts[0], expression=parts[1]))
    return terms


def unmatched_note(
    engine: Engine, named: Sequence[NamedValue], types: Mapping[str, str], names: Sequence[str],
    found: Sequence[Sequence[str | None]],
) -> str | None:
    """The warning naming the items that matched no partition (``found``: the partition values, as text,
    of every partition the refresh saw, in the source or in the store), or None."""
    kinds = {n: sqlgen.exp.DataType.build(types[n], dialect=engine.target.name) for _, n, _ in named}
    text = sqlgen.exp.DataType.build("VARCHAR")
    given = [(i, n, v) for i, (_, n, v) in enumerate(named) if v is not None]
    shown: dict[int, str | None] = {i: None for i, (_, _, v) in enumerate(named) if v is None}
    if given:  # each value as the database writes the column's value as text (2026-1-5 -> 2026-01-05)
        got = engine.query(sqlgen.exp.select(*[
            sqlgen.exp.alias_(sqlgen.exp.cast(_typed(v, kinds[n]), text), f"v{i}", quoted=True) for i, n, v in given]))
        shown.update({i: str(got[f"v{i}"][0]) for i, _, _ in given})
    seen = {n: {values[j] for values in found} for j, n in enumerate(names)}
    missing = [named[i][0] for i in range(len(named)) if shown[i] not in seen[named[i][1]]]
    if not missing:
        return None
    return (f"--partitions {', '.join(missing)} matched no partition, in the source or in the store "
            "(write values as `store status --json` lists them: NULL for SQL NULL, \"NULL\" for the text 'NULL')")
