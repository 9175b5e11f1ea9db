"""Refresh history of a summary store: one row per build, regrid and refresh, in our own table.

Rows are written inside the build's or refresh's transaction (a rolled-back
refresh leaves no history row).  Each row keeps what a person wants to see
later: when, how many partitions changed, the segment sizes and how far each
segment's centroid moved (standard deviations).
"""

from __future__ import annotations

import json
from datetime import datetime, timezone
from typing import Any

import numpy as np

from . import sqlgen
from .engines import Engine
from .model import Model

__all__ = ["HISTORY", "HISTORY_COLUMNS", "record", "history", "describe", "forget"]

HISTORY = "tillite_store_history"
HISTORY_COLUMNS = [
    ("store", "VARCHAR"),
    ("at", "VARCHAR"),
    ("event", "VARCHAR"),
    ("new_parts", "INTEGER"),
    ("changed_parts", "INTEGER"),
    ("vanished_parts", "INTEGER"),
    ("rows", "BIGINT"),
    ("k", "INTEGER"),
    ("sizes", "VARCHAR"),
    ("shifts", "VARCHAR"),
]


def record(engine: Engine, store: str, event: str, model: Model, report: Any = None) -> None:
    """Add one history row (call inside the transaction that changes the store).

    ``report`` is the refresh's RefreshReport (partitions and drift); a build
    starts the history afresh.
    """
    engine.execute(sqlgen.create_table_statement(HISTORY, HISTORY_COLUMNS))
    if event == "build":
        engine.execute(sqlgen.delete_statement(HISTORY, sqlgen.equals_all({"store": store})))
    sizes, k = _sizes(model)
    shifts = {}
    if report is not None:  # a --within store's drift rows name their group: keyed "group:segment", none overwritten
        shifts = {_key(d.get("group"), d["segment"]): d["shift_sd"] for d in report.drift if d.get("shift_sd") is not None}
    row = (
        store,
        datetime.now(timezone.utc).isoformat(timespec="microseconds"),
        event,
        len(report.new) if report is not None else 0,
        len(report.changed) if report is not None else 0,
        len(report.vanished) if report is not None else 0,
        int(model.rows),
        k,
        json.dumps(sizes),
        json.dumps(shifts),
    )
    engine.execute(sqlgen.insert_values_statement(HISTORY, [row]))


def _key(group: str | None, segment: Any) -> str:
    """A segment's key in a history row: its id, or "group:id" for a --within store's segment."""
    return str(segment) if group is None else f"{group}:{segment}"


def _sizes(model: Model) -> tuple[dict[str, int], int]:
    """Rows per segment and the number of segments; a --within store's are over all its groups."""
    if not model.within:
        return {str(sid): int(n) for sid, n in zip(model.segment_ids(), model.sizes)}, int(model.k)
    from .model import group_models

    sizes = {_key(g["name"], sid): int(n) for g, one in group_models(model) for sid, n in zip(one.segment_ids(), one.sizes)}
    return sizes, len(sizes)


def _id(key: str) -> int | str:
    """A stored key back: an int id, or a --within store's "group:id" as it is."""
    try:
        return int(key)
    except ValueError:
        return key


def forget(engine: Engine, store: str, drop_table: bool) -> None:
    """Remove a dropped store's history rows (call inside the drop's transaction); the table too with the last store."""
    engine.execute(sqlgen.create_table_statement(HISTORY, HISTORY_COLUMNS))
    engine.execute(sqlgen.delete_statement(HISTORY, sqlgen.equals_all({"store": store})))
    if drop_table:
        engine.execute(sqlgen.drop_statement(HISTORY, "table"))


def history(engine: Engine, store: str, last: int | None = None) -> list[dict[str, Any]]:
    """The store's history rows, oldest first (only the ``last`` ones when given); [] before any."""
    if engine.relation_kind(HISTORY) is None:
        return []
    got = engine.query(sqlgen.select_where(HISTORY, sqlgen.equals_all({"store": store})))
    rows = []
    for i in range(len(got["store"])):
        rows.append({
            "at": str(got["at"][i]),
            "event": str(got["event"][i]),
            "new": int(got["new_parts"][i]),
            "changed": int(got["changed_parts"][i]),
            "vanished": int(got["vanished_parts"][i]),
            "rows": int(got["rows"][i]),
            "k": int(got["k"][i]),
            "sizes": {_id(k): int(v) for k, v in json.loads(str(got["sizes"][i])).items()},
            "shifts": {_id(k): float(v) for k, v in json.loads(str(got["shifts"][i])).items()},
        })
    rows.sort(key=lambda r: r["at"])
    return rows[-last:] if last else rows


def describe(rows: list[dict[str, Any]]) -> list[str]:
    """Text lines for `store status`: one per history row."""
    out = []
    for r in rows:
        largest = max(r["shifts"].values(), default=None)
        moved = "-" if largest is None or not np.isfinite(largest) else f"{largest:.3f} sd"
        grouped = {str(key).rpartition(":")[0] for key in r["sizes"] if isinstance(key, str)}
        k = f"{r['k']} segments in {len(grouped)} groups" if grouped else f"k={r['k']}"
        out.append(
            f"  {r['at'][:19]}  {r['event']:<7}  {r['new']} new, {r['changed']} changed, {r['vanished']} vanished; "
            f"{r['rows']:,} rows, {k}; largest centroid move {moved}"
        )
    return out
