"""Small printed reports over labelled data (run in SQL; only counts come back)."""

from __future__ import annotations

import numpy as np
from sqlglot import exp

from .engines import Engine
from .sqlgen import col, table_name

__all__ = ["crosstab_statement", "crosstab"]


def crosstab_statement(labels: str, lookup: str, key: str, category: str, segment: str = "segment") -> exp.Select:
    """Rows per (category, segment): labels joined to a lookup table on key."""
    lab, look = "l", "m"
    return (
        exp.select(
            exp.alias_(col(category, look), "category", quoted=True),
            exp.alias_(col(segment, lab), "segment", quoted=True),
            exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True),
        )
        .from_(exp.alias_(table_name(labels), lab, table=True))
        .join(exp.alias_(table_name(lookup), look, table=True), on=exp.EQ(this=col(key, lab), expression=col(key, look)))
        .group_by(col(category, look), col(segment, lab))
    )


def crosstab(engine: Engine, labels: str, lookup: str, key: str, category: str) -> str:
    """A text table of row counts: one line per category, one column per segment."""
    got = engine.query(crosstab_statement(labels, lookup, key, category))
    cats = sorted({str(c) for c in got["category"]})
    seg_values = got["segment"]
    null = np.ma.getmaskarray(seg_values) if np.ma.isMaskedArray(seg_values) else np.zeros(len(seg_values), bool)
    segs = sorted({int(s) for s, m in zip(np.ma.getdata(seg_values), null) if not m})
    heads = [str(s) for s in segs] + (["skipped"] if null.any() else [])
    table = {c: [0] * len(heads) for c in cats}
    for c, s, m, n in zip(got["category"], np.ma.getdata(seg_values), null, got["n"]):
        table[str(c)][len(segs) if m else segs.index(int(s))] += int(n)
    if not cats:
        return f"rows by {category} (rows) and segment (columns): no rows matched {lookup} on {key}"
    first = max([len(category)] + [len(c) for c in cats])
    widths = [max([len(h)] + [len(f"{table[c][i]:,}") for c in cats]) for i, h in enumerate(heads)]
    lines = [f"rows by {category} (rows) and segment (columns):", "  ".join([category.ljust(first)] + [h.rjust(w) for h, w in zip(heads, widths)])]
    for c in cats:
        lines.append("  ".join([c.ljust(first)] + [f"{v:,}".rjust(w) for v, w in zip(table[c], widths)]))
    return "\n".join(lines)
