"""Drawing the segment report: one self-contained HTML page with inline SVG, or Markdown.

Plain Python writes the SVG (no plotting package): nothing is imported beyond the
standard library, nothing is fetched, and the page needs no script.  Every text a
user or the data supplied (names, column names, categories, the source) goes
through ``html.escape``.  Every chart has its numbers in a table beside it.
"""

from __future__ import annotations

import html
import math
from typing import Any, Sequence

from .figures import column_text, digits_to_tell_apart, fmt
from .outputs import REPORT_MARKER

__all__ = ["render_html", "render_markdown", "diverging_colour"]

#: Okabe & Ito's palette first, then a cividis-like ramp, for breakdown categories.
CATEGORY_COLOURS = (
    "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000",
    "#00204D", "#31446B", "#666970", "#958F78", "#CBBA69", "#FFEA46",
    "#7F7F7F", "#3B4F8A", "#A8A07A", "#1D3A6E", "#E4CF5B", "#555C6E",
)
OTHER = "#BBBBBB"
OUTLIER = "#999999"
FONT = "font-family:system-ui,-apple-system,'Segoe UI',Roboto,'DejaVu Sans',sans-serif"


def esc(text: Any) -> str:
    return html.escape("" if text is None else str(text), quote=True)


def column_digits(content: dict[str, Any]) -> list[int]:
    """Per column, the significant digits that tell the segments' means apart (figures.digits_to_tell_apart)."""
    profile = content.get("profile") or []
    return [digits_to_tell_apart(p["mean"][j] for p in profile) for j in range(len(content["header"]["columns"]))]


def pct(v: float) -> str:
    return f"{100 * v:.1f}%"


def segment_label(seg: dict[str, Any]) -> str:
    return f"{seg['segment']} {seg['name']}" if seg.get("name") else f"segment {seg['segment']}"


def _short(text: str, most: int = 28) -> str:
    return text if len(text) <= most else text[: most - 1] + "…"


# --------------------------------------------------------------------------- colour scales


def diverging_colour(z: float | None, limit: float = 3.0) -> str:
    """Blue (below average) - light grey - orange (above), clipped at +-limit sd; readable with
    the common colour-vision deficiencies (no red/green contrast)."""
    if z is None or not math.isfinite(z):
        return "#FFFFFF"
    t = max(-1.0, min(1.0, z / limit))
    lo, mid, hi = (0x21, 0x66, 0xAC), (0xF7, 0xF7, 0xF7), (0xE0, 0x82, 0x14)
    a, b = (mid, lo) if t < 0 else (mid, hi)
    t = abs(t)
    return "#" + "".join(f"{round(x + (y - x) * t):02X}" for x, y in zip(a, b))


def _text_on(fill: str) -> str:
    r, g, b = (int(fill[i : i + 2], 16) / 255 for i in (1, 3, 5))
    return "#000000" if 0.2126 * r + 0.7152 * g + 0.0722 * b > 0.45 else "#FFFFFF"


# --------------------------------------------------------------------------- svg pieces


def _svg(width: float, height: float, title: str, body: list[str], chart: str) -> str:
    return (
        f'<svg xmlns="http://www.w3.org/2000/svg" class="chart-svg" data-chart="{esc(chart)}" role="img" '
        f'width="{width:.0f}" height="{height:.0f}" viewBox="0 0 {width:.0f} {height:.0f}" style="{FONT}">'
        f"<title>{esc(title)}</title>" + "".join(body) + "</svg>"
    )


def _text(x: float, y: float, text: Any, size: int = 12, anchor: str = "start", fill: str = "#222222", weight: str = "normal") -> str:
    return (
        f'<text x="{x:.1f}" y="{y:.1f}" font-size="{size}" text-anchor="{anchor}" fill="{fill}" '
        f'font-weight="{weight}">{esc(text)}</text>'
    )


def _rect(x: float, y: float, w: float, h: float, fill: str, title: str | None = None, stroke: str | None = None) -> str:
    extra = f' stroke="{stroke}" stroke-width="1"' if stroke else ""
    tip = f"<title>{esc(title)}</title>" if title else ""
    return f'<rect x="{x:.1f}" y="{y:.1f}" width="{max(w, 0):.1f}" height="{max(h, 0):.1f}" fill="{fill}"{extra}>{tip}</rect>'


def _line(x1: float, y1: float, x2: float, y2: float, stroke: str = "#444444", width: float = 1.0) -> str:
    return f'<line x1="{x1:.1f}" y1="{y1:.1f}" x2="{x2:.1f}" y2="{y2:.1f}" stroke="{stroke}" stroke-width="{width}"/>'


def _table(head: Sequence[str], rows: Sequence[Sequence[Any]], numeric_from: int = 1, text_columns: Sequence[int] = ()) -> str:
    th = "".join(f"<th>{esc(h)}</th>" for h in head)
    body = []
    for r in rows:
        cells = "".join(
            f'<td class="num">{esc(v)}</td>' if i >= numeric_from and i not in text_columns else f"<td>{esc(v)}</td>"
            for i, v in enumerate(r)
        )
        body.append(f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{th}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _figure(chart: str, svg: str, caption: str, table: str) -> str:
    return (
        f'<figure class="chart" id="chart-{esc(chart)}">{svg}<figcaption>{esc(caption)}</figcaption>'
        f'<div class="numbers">{table}</div></figure>'
    )


# --------------------------------------------------------------------------- charts


def _frame(values: Sequence[float], weights: Sequence[float], always: Sequence[float]) -> tuple[float, float]:
    """The range holding the middle 99% of the rows (by weight) and every centroid, padded by 5%."""
    pairs = sorted(zip(values, weights))
    total = sum(weights) or 1.0
    lo = hi = None
    run = 0.0
    for v, w in pairs:
        run += w
        if lo is None and run >= 0.005 * total:
            lo = v
        if hi is None and run >= 0.995 * total:
            hi = v
    lo = min([lo if lo is not None else 0.0, *always])
    hi = max([hi if hi is not None else 1.0, *always])
    span = (hi - lo) or 1.0
    return lo - 0.05 * span, hi + 0.05 * span


def sizes_chart(segments: list[dict[str, Any]]) -> str:
    left, bar_w, row = 230, 330, 26
    top = max((s["share"] for s in segments), default=0) or 1.0
    body = []
    for i, s in enumerate(segments):
        y = 8 + i * row
        body.append(_text(left - 8, y + 16, _short(segment_label(s)), anchor="end"))
        w = bar_w * s["share"] / top
        body.append(_rect(left, y + 3, w, row - 8, s["colour"], f"{segment_label(s)}: {pct(s['share'])} of rows", stroke="#333333"))
        body.append(_text(left + w + 6, y + 16, f"{pct(s['share'])} ({fmt(s['rows'])})"))
    svg = _svg(left + bar_w + 150, 16 + row * len(segments), "Share of rows per segment", body, "sizes")
    table = _table(
        ["segment", "name", "rows", "share", "description"],
        [[s["segment"], s.get("name") or "", fmt(s["rows"]), pct(s["share"]), s["description"]] for s in segments],
        numeric_from=2, text_columns=(4,),
    )
    return _figure("sizes", svg, "Share of the segmented rows in each segment.", table)


def profile_chart(content: dict[str, Any]) -> str:
    columns = content["header"]["columns"]
    segments, profile = content["segments"], content["profile"]
    left, cw, ch, top = 190, 118, 40, 34
    body = []
    digits = column_digits(content)
    for j, c in enumerate(columns):
        body.append(_text(left + j * cw + cw / 2, top - 10, _short(c, 18), anchor="middle", weight="bold"))
    for i, (s, p) in enumerate(zip(segments, profile)):
        y = top + i * ch
        body.append(_text(left - 8, y + ch / 2 + 4, _short(segment_label(s), 26), anchor="end"))
        for j, c in enumerate(columns):
            z, mean = p["z"][j], p["mean"][j]
            fill = diverging_colour(z)
            tip = f"{segment_label(s)}, {c}: mean {column_text(mean, digits[j])} ({'' if z is None else f'{z:+.2f} sd'})"
            body.append(_rect(left + j * cw, y, cw - 2, ch - 2, fill, tip))
            ink = _text_on(fill)
            body.append(_text(left + j * cw + cw / 2 - 1, y + 16, column_text(mean, digits[j]), anchor="middle", fill=ink))
            body.append(_text(left + j * cw + cw / 2 - 1, y + 31, "" if z is None else f"{z:+.1f} sd", size=10, anchor="middle", fill=ink))
    # legend: -3 .. +3 sd
    ly = top + len(segments) * ch + 14
    steps = 13
    for t in range(steps):
        z = -3 + 6 * t / (steps - 1)
        body.append(_rect(left + t * 22, ly, 22, 12, diverging_colour(z)))
    body.append(_text(left - 8, ly + 10, "sd from average", size=11, anchor="end"))
    for z in (-3, 0, 3):
        body.append(_text(left + (z + 3) / 6 * (steps - 1) * 22 + 11, ly + 26, f"{z:+d}" if z else "0", size=10, anchor="middle"))
    svg = _svg(left + cw * len(columns) + 10, ly + 34, "Profile: segment x column, in standard deviations from the overall mean", body, "profile")
    table = _table(
        ["segment"] + [f"{c} (mean; sd from average)" for c in columns],
        [[segment_label(s)] + [f"{column_text(m, d)}; {'–' if z is None else f'{z:+.2f}'}"
                               for m, z, d in zip(p["mean"], p["z"], digits)] for s, p in zip(segments, profile)],
    )
    return _figure(
        "profile", svg,
        "Each cell: the segment's mean in original units, coloured by how many standard deviations it lies from "
        "the overall mean (blue below, orange above, clipped at ±3). Columns in the model's order.",
        table,
    )


SPREAD_HEAD = ["segment", "rows", "mean", "sd", "min", "q25", "median", "q75", "max"]


def spread_row(s: dict[str, Any], r: dict[str, Any], digits: int) -> list[str]:
    """One segment's row of a spread table: the column's values to ``digits`` significant digits, its sd to 4."""
    return [segment_label(s), fmt(s["rows"]), column_text(r["mean"], digits), fmt(r["sd"]),
            *[column_text(r[q], digits) for q in ("min", "q25", "q50", "q75", "max")]]


def spread_chart(content: dict[str, Any], column: str, index: int) -> str:
    segments, rows = content["segments"], content["spread"][column]
    left, width, row = 190, 380, 24
    d = column_digits(content)[index]
    lo = min((r["min"] for r in rows if r["min"] is not None), default=0.0)
    hi = max((r["max"] for r in rows if r["max"] is not None), default=1.0)
    span = (hi - lo) or 1.0

    def x(v: float) -> float:
        return left + (v - lo) / span * width

    body = []
    for i, (s, r) in enumerate(zip(segments, rows)):
        y = 6 + i * row + row / 2
        body.append(_text(left - 8, y + 4, _short(segment_label(s), 26), anchor="end"))
        if r["min"] is None:
            continue
        body.append(_line(x(r["min"]), y, x(r["max"]), y, "#555555"))
        for end in (r["min"], r["max"]):
            body.append(_line(x(end), y - 5, x(end), y + 5, "#555555"))
        if r["q25"] is not None and r["q75"] is not None:
            body.append(_rect(x(r["q25"]), y - 7, x(r["q75"]) - x(r["q25"]), 14, s["colour"],
                              f"{segment_label(s)}: quartiles {column_text(r['q25'], d)} – {column_text(r['q75'], d)}",
                              stroke="#222222"))
        if r["q50"] is not None:
            body.append(_line(x(r["q50"]), y - 8, x(r["q50"]), y + 8, "#000000", 2.5))
    ay = 10 + len(segments) * row
    body.append(_line(left, ay, left + width, ay, "#888888"))
    body.append(_text(left, ay + 14, column_text(lo, d), size=10, anchor="start"))
    body.append(_text(left + width, ay + 14, column_text(hi, d), size=10, anchor="end"))
    body.append(_text(left + width / 2, ay + 14, column, size=11, anchor="middle", weight="bold"))
    svg = _svg(left + width + 20, ay + 22, f"Spread of {column} per segment: min, quartiles, median, max", body, f"spread-{index}")
    table = _table(SPREAD_HEAD, [spread_row(s, r, d) for s, r in zip(segments, rows)])
    return _figure(f"spread-{index}", svg, f"{column}: line from min to max, box from the first to the third quartile, "
                   f"thick tick at the median. {quartile_note(content)}", table)


def quartile_note(content: dict[str, Any]) -> str:
    """Where the quartiles come from: min, max, mean and sd are exact over all rows; quartiles are approximate."""
    sampled = content["header"].get("quartile_sample")
    if sampled is None:
        return "Quartiles are the engine's approximate quantiles."
    if content["header"].get("quartile_sample_percent", 0.0) >= 100.0:
        return f"Min, max, mean, sd and the quartiles are computed from all {sampled:,} usable rows (the table is smaller than the quartile sample)."
    return (f"Min, max, mean and sd are exact over all rows; the quartiles are approximate, computed from a seeded "
            f"sample of {sampled:,} rows.")


def map_chart(content: dict[str, Any]) -> str:
    m = content["map"]
    segments = content["segments"]
    colour = {s["segment"]: s["colour"] for s in segments}
    label = {s["segment"]: segment_label(s) for s in segments}
    dots, cents = m["dots"], m["centroids"]
    size, pad = 440, 30
    x0, x1 = _frame(dots["x"], dots["n"], [c["x"] for c in cents])
    y0, y1 = _frame(dots["y"], dots["n"], [c["y"] for c in cents])

    def px(x: float) -> float:
        return pad + (min(max(x, x0), x1) - x0) / (x1 - x0) * (size - 2 * pad)

    def py(y: float) -> float:
        return size - pad - (min(max(y, y0), y1) - y0) / (y1 - y0) * (size - 2 * pad)

    nmax = max(dots["n"], default=1.0) or 1.0
    body = [_rect(0, 0, size, size, "#FFFFFF", stroke="#DDDDDD")]
    order = sorted(range(len(dots["n"])), key=lambda i: -dots["n"][i])
    for i in order:
        r = max(0.8, 9.0 * math.sqrt(dots["n"][i] / nmax))
        fill = colour.get(dots["segment"][i], OUTLIER)
        body.append(
            f'<circle cx="{px(dots["x"][i]):.1f}" cy="{py(dots["y"][i]):.1f}" r="{r:.1f}" fill="{fill}" '
            f'fill-opacity="0.65" stroke="#333333" stroke-opacity="0.25" stroke-width="0.5"/>'
        )
    for c in cents:
        cx, cy = px(c["x"]), py(c["y"])
        body.append(
            f'<path d="M{cx:.1f} {cy - 8:.1f} L{cx + 8:.1f} {cy:.1f} L{cx:.1f} {cy + 8:.1f} L{cx - 8:.1f} {cy:.1f} Z" '
            f'fill="#FFFFFF" stroke="#000000" stroke-width="2"><title>{esc(label.get(c["segment"], c["segment"]))} centroid</title></path>'
        )
        right = cx > size * 0.65
        body.append(_text(cx - 10 if right else cx + 10, cy - 8, _short(label.get(c["segment"], str(c["segment"])), 22), size=11,
                          anchor="end" if right else "start", weight="bold"))
    a1, a2 = m["variance_share"][0], m["variance_share"][1] if len(m["variance_share"]) > 1 else 0.0
    body.append(_text(size / 2, size - 8, f"axis 1 ({pct(a1)} of variance)", size=11, anchor="middle"))
    body.append(f'<text x="12" y="{size / 2:.0f}" font-size="11" text-anchor="middle" transform="rotate(-90 12 {size / 2:.0f})">'
                f"{esc(f'axis 2 ({pct(a2)} of variance)')}</text>")
    legend = [f'<span class="swatch" style="background:{s["colour"]}"></span>{esc(segment_label(s))}' for s in segments]
    svg = _svg(size, size, f"Map of the table's {m['cells']:,} grid cells on the first two principal axes", body, "map")
    columns = content["header"]["columns"]
    table = _table(
        ["", *columns],
        [[f"axis {a + 1} loading"] + [f"{v:+.3f}" for v in m["axes"][a]] for a in range(len(m["axes"]))],
    ) + _table(
        ["segment", "axis 1", "axis 2", "rows"],
        [[label.get(c["segment"], c["segment"]), f"{c['x']:.3f}", f"{c['y']:.3f}",
          fmt(next((s["rows"] for s in segments if s["segment"] == c["segment"]), None))] for c in cents],
    )
    caption = (
        f"Every grid cell of the table drawn from its summary alone (no row exported): a dot per cell, area proportional "
        f"to its rows, coloured by segment; white diamonds mark the centroids. The two axes hold {pct(a1 + a2)} of the "
        f"variance ({pct(a1)} and {pct(a2)}) in the model's scaled units. Cells on the same spot are drawn as one dot; "
        "the frame holds 99% of the rows on each axis (each axis on its own scale), cells beyond it sit on its edge."
        + (" The map was drawn when the segments were made and is kept in the model file." if m.get("from") == "model" else "")
    )
    return f'<p class="legend">{" ".join(legend)}</p>' + _figure("map", svg, caption, table)


def breakdown_chart(content: dict[str, Any], b: dict[str, Any], index: int) -> str:
    segments = content["segments"]
    cats = b["categories"]
    colours = [OTHER if c == "other" else CATEGORY_COLOURS[i % len(CATEGORY_COLOURS)] for i, c in enumerate(cats)]
    left, width, row = 190, 420, 26
    body = []
    for i, s in enumerate(segments):
        counts = b["counts"].get(str(s["segment"]), [0] * len(cats))
        total = sum(counts) or 1
        y = 6 + i * row
        body.append(_text(left - 8, y + 16, _short(segment_label(s), 26), anchor="end"))
        x = left
        for c, n, fill in zip(cats, counts, colours):
            w = width * n / total
            if w > 0:
                body.append(_rect(x, y + 3, w, row - 8, fill, f"{segment_label(s)}, {b['column']} = {c}: {pct(n / total)} ({fmt(n)})",
                                  stroke="#FFFFFF"))
            x += w
    svg = _svg(left + width + 20, 14 + row * len(segments), f"Share of each {b['column']} category per segment", body,
               f"breakdown-{index}")
    legend = " ".join(f'<span class="swatch" style="background:{fill}"></span>{esc(c)}' for c, fill in zip(cats, colours))
    rows = []
    for s in segments:
        counts = b["counts"].get(str(s["segment"]), [0] * len(cats))
        total = sum(counts) or 1
        rows.append([segment_label(s)] + [f"{fmt(n)} ({pct(n / total)})" for n in counts])
    table = _table(["segment", *cats], rows)
    caption = (f"Rows of each segment by {b['column']}: the 20 categories with the most rows, the rest as \"other\". "
               "Counts and shares in the table.")
    return f'<p class="legend">{legend}</p>' + _figure(f"breakdown-{index}", svg, caption, table)


def history_charts(content: dict[str, Any]) -> str:
    hist = content["history"]
    segments = content["segments"]
    colour = {str(s["segment"]): s["colour"] for s in segments}
    ids = sorted({k for h in hist for k in h["sizes"]}, key=int)
    left, width, height = 70, 420, 200
    steps = max(len(hist) - 1, 1)
    top = max((v for h in hist for v in h["sizes"].values()), default=1) or 1

    def px(i: int) -> float:
        return left + i * width / steps

    def py(v: float, top_value: float) -> float:
        return 10 + height - v / top_value * height

    body = [_line(left, 10 + height, left + width, 10 + height, "#888888"), _line(left, 10, left, 10 + height, "#888888")]
    for sid in ids:
        points = [(px(i), py(h["sizes"][sid], top)) for i, h in enumerate(hist) if sid in h["sizes"]]
        fill = colour.get(sid, OUTLIER)
        if len(points) > 1:
            body.append(f'<polyline fill="none" stroke="{fill}" stroke-width="2.5" points="{" ".join(f"{x:.1f},{y:.1f}" for x, y in points)}"/>')
        body += [f'<circle cx="{x:.1f}" cy="{y:.1f}" r="3.5" fill="{fill}" stroke="#222222"/>' for x, y in points]
    body.append(_text(left - 6, 16, fmt(top), size=10, anchor="end"))
    body.append(_text(left - 6, 10 + height, "0", size=10, anchor="end"))
    body.append(_text(left + width / 2, height + 30, "build / refresh (oldest left)", size=11, anchor="middle"))
    sizes_svg = _svg(left + width + 20, height + 40, "Rows per segment over the store's refreshes", body, "history-sizes")

    shifts = [h["largest_shift"] or 0.0 for h in hist]
    stop = max(shifts, default=0.0) or 1.0
    bw = width / max(len(hist), 1)
    body = [_line(left, 10 + height, left + width, 10 + height, "#888888")]
    for i, v in enumerate(shifts):
        body.append(_rect(left + i * bw + 2, py(v, stop), bw - 4, height + 10 - py(v, stop), "#0072B2", f"{hist[i]['at']}: {v:.3f} sd"))
    body.append(_text(left - 6, 16, f"{stop:.3g} sd", size=10, anchor="end"))
    body.append(_text(left + width / 2, height + 30, "largest centroid move per refresh (sd)", size=11, anchor="middle"))
    drift_svg = _svg(left + width + 20, height + 40, "Largest centroid move per refresh, in standard deviations", body, "history-drift")
    table = _table(
        ["when", "event", "new", "changed", "vanished", "rows", "largest move (sd)"] + [f"rows in {i}" for i in ids],
        [[h["at"][:19], h["event"], h["new"], h["changed"], h["vanished"], fmt(h["rows"]),
          "–" if h["largest_shift"] is None else f"{h['largest_shift']:.3f}"] + [fmt(h["sizes"].get(i)) for i in ids] for h in hist],
        numeric_from=2,
    )
    legend = " ".join(f'<span class="swatch" style="background:{colour.get(i, OUTLIER)}"></span>{esc(i)}' for i in ids)
    return (f'<p class="legend">segments: {legend}</p>'
            + _figure("history-sizes", sizes_svg, "Rows per segment at each build and refresh of the store.", "")
            + _figure("history-drift", drift_svg, "How far the most-moved centroid travelled at each refresh.", table))


# --------------------------------------------------------------------------- pages

_STYLE = """
body{%s;margin:2em auto;max-width:1100px;padding:0 1em;color:#1a1a1a;background:#fff}
h1{font-size:1.6em}h2{margin-top:2em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;margin:.6em 0;font-size:.85em}
th,td{border:1px solid #ccc;padding:.2em .5em;text-align:left;vertical-align:top}
td.num{text-align:right;font-variant-numeric:tabular-nums}
figure.chart{margin:1em 0}figcaption{font-size:.9em;color:#333;max-width:60em}
.caution{background:#fff6e0;border-left:4px solid #E69F00;padding:.6em 1em}
.swatch{display:inline-block;width:.9em;height:.9em;margin:0 .3em 0 .8em;border:1px solid #333;vertical-align:middle}
dl.header{display:grid;grid-template-columns:max-content auto;gap:.2em 1em}dl.header dt{font-weight:bold}
""" % FONT


def _header_items(h: dict[str, Any]) -> list[tuple[str, str]]:
    items = [("source", h["source"])]
    if h.get("store"):
        items.append(("summary store", h["store"]))
    items += [
        ("rows", fmt(h["rows"])),
        ("skipped rows (NULL/NaN/Inf)", fmt(h["skipped"])),
        ("segmented rows", fmt(h["segmented"])),
        ("columns", ", ".join(h["columns"])),
        ("method", h["method"]),
        ("k", str(h["k"])),
        ("model built", h["built"] or "–"),
        (f"SSE ({h.get('sse_basis', 'row level')}, scaled units)", fmt(h["sse"])),
        ("Calinski-Harabasz (exact, from the segments' CFs)", fmt(h["calinski_harabasz"])),
    ]
    return items


def render_html(content: dict[str, Any]) -> str:
    """One self-contained page: inline CSS and SVG, no script, no external resource."""
    if content.get("groups") is not None:
        return render_within_html(content)
    h = content["header"]
    parts = _page_head(str(h["source"]))
    parts += [
        '<dl class="header">' + "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in _header_items(h)) + "</dl>",
        f'<p class="caution">{esc(h["caution"])}</p>',
    ]
    parts += _html_sections(content, "h2")
    return _page_end(parts)


#: Extra style of a --within report's group sections.
_GROUP_STYLE = "details.group>summary{cursor:pointer}details.group>summary h2{display:inline-block;margin-top:1em}"


def _page_head(source: str, style: str = _STYLE) -> list[str]:
    return [
        "<!DOCTYPE html>",
        REPORT_MARKER,
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; style-src \'unsafe-inline\'; img-src data:">',
        f"<title>{esc('Segments of ' + source)}</title><style>{style}</style></head><body>",
        f"<h1>{esc('Segments of ' + source)}</h1>",
    ]


def _page_end(parts: list[str]) -> str:
    parts.append("<p><small>Written by tillite. Every figure was computed in the database as an aggregate; "
                 "no row left it.</small></p></body></html>")
    return "\n".join(parts) + "\n"


def _html_sections(content: dict[str, Any], hx: str) -> list[str]:
    """Sizes, profile, spread, map, breakdowns and history of one model, headed by ``hx`` elements."""
    h = content["header"]
    parts = [f"<{hx}>Sizes</{hx}>", sizes_chart(content["segments"]), f"<{hx}>Profile</{hx}>", profile_chart(content),
             f"<{hx}>Spread</{hx}>"]
    parts += [spread_chart(content, c, j) for j, c in enumerate(h["columns"])]
    if content.get("map"):
        parts += [f"<{hx}>Map</{hx}>", map_chart(content)]
    for i, b in enumerate(content.get("breakdowns") or []):
        parts += [f"<{hx}>{esc('Breakdown by ' + b['column'])}</{hx}>", breakdown_chart(content, b, i)]
    if content.get("history"):
        parts += [f"<{hx}>Refresh history</{hx}>", history_charts(content)]
    return parts


def _within_header_items(h: dict[str, Any]) -> list[tuple[str, str]]:
    return [
        ("source", h["source"]), ("segments within each", h["within"]),
        ("groups", fmt(h["groups"])), ("segments in all", fmt(h["segments"])),
        ("rows", fmt(h["rows"])), ("skipped rows (NULL/NaN/Inf)", fmt(h["skipped"])),
        ("columns", ", ".join(h["columns"])), ("method", h["method"]), ("model built", h["built"] or "–"),
        (f"SSE ({h.get('sse_basis', 'row level')}, summed over the groups)", fmt(h["sse"])),
    ]


def _group_items(g: dict[str, Any]) -> list[tuple[str, str]]:
    """The figures heading one group's section."""
    h = g["report"]["header"]
    items = [("rows", fmt(h["rows"])), ("segmented rows", fmt(h["segmented"])), ("k", str(h["k"])),
             (f"SSE ({h.get('sse_basis', 'row level')}, {h.get('units', 'in scaled units')})", fmt(h["sse"])),
             ("Calinski-Harabasz (exact, from the segments' CFs)", fmt(h["calinski_harabasz"]))]
    return items + ([("notes", "; ".join(g["notes"]))] if g.get("notes") else [])


def render_within_html(content: dict[str, Any]) -> str:
    """A --within model's report: the groups' table, then one section per group that opens and closes by a click
    (``<details>``: no script), the first one open, each drawn as a single model's report is; figure ids carry the
    group's position, so they stay unique."""
    h = content["header"]
    parts = _page_head(str(h["source"]), _STYLE + _GROUP_STYLE)
    parts += [
        '<dl class="header">' + "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in _within_header_items(h)) + "</dl>",
        f'<p class="caution">{esc(h["caution"])}</p>',
        f"<h2>{esc('Groups of ' + h['within'])}</h2>",
        "<p>Each group was segmented on its own; click a group's name below to open or close its section.</p>",
        '<table class="groups"><thead><tr><th>group</th><th>rows</th><th>segments</th><th>sizes</th><th>SSE</th></tr>'
        "</thead><tbody>",
    ]
    for i, g in enumerate(content["groups"]):
        r = g["report"]
        sizes = ", ".join(fmt(s["rows"]) for s in r["segments"])
        parts.append(f'<tr><td>{esc(g["group"])}</td><td class="num">{esc(fmt(r["header"]["rows"]))}</td>'
                     f'<td class="num">{esc(r["header"]["k"])}</td><td class="num">{esc(sizes)}</td>'
                     f'<td class="num">{esc(fmt(r["header"]["sse"]))}</td></tr>')
    parts.append("</tbody></table>")
    for i, g in enumerate(content["groups"]):
        r = g["report"]
        parts.append(f'<details class="group" id="group-{i}"{" open" if i == 0 else ""}>'
                     f'<summary><h2>{esc(h["within"] + " = " + g["group"])}</h2></summary>')
        parts.append('<dl class="header">' + "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in _group_items(g)) + "</dl>")
        sections = "\n".join(_html_sections(r, "h3")).replace('id="chart-', f'id="group-{i}-chart-')
        parts += [sections, "</details>"]
    if content.get("history"):
        head, rows = _within_history(content["history"])
        parts += ["<h2>Refresh history</h2>", "<p>Segments and the largest centroid move are over all groups "
                  "(each group's move in its own standard deviations).</p>", _table(head, rows, numeric_from=2)]
    return _page_end(parts)


def _within_history(hist: list[dict[str, Any]]) -> tuple[list[str], list[list[Any]]]:
    """A --within store's refresh history as one table: its segments are per group, so no per-segment columns."""
    head = ["when", "event", "new", "changed", "vanished", "rows", "segments", "largest move (sd)"]
    return head, [[h["at"][:19], h["event"], h["new"], h["changed"], h["vanished"], fmt(h["rows"]), fmt(h.get("k")),
                   "–" if h["largest_shift"] is None else f"{h['largest_shift']:.3f}"] for h in hist]


def _md_escape(text: Any) -> str:
    return str("" if text is None else text).replace("\\", "\\\\").replace("|", "\\|").replace("\n", " ").replace("<", "&lt;").replace(">", "&gt;")


def _md_table(head: Sequence[Any], rows: Sequence[Sequence[Any]]) -> list[str]:
    out = ["| " + " | ".join(_md_escape(x) for x in head) + " |", "|" + "---|" * len(head)]
    out += ["| " + " | ".join(_md_escape(x) for x in r) + " |" for r in rows]
    return out + [""]


def render_markdown(content: dict[str, Any]) -> str:
    """The same content as text: the header, then every chart's numbers as a table."""
    if content.get("groups") is not None:
        return render_within_markdown(content)
    h = content["header"]
    lines = [f"# Segments of {_md_escape(h['source'])}", ""]
    lines += [f"- **{_md_escape(k)}**: {_md_escape(v)}" for k, v in _header_items(h)] + ["", f"> {_md_escape(h['caution'])}", ""]
    return "\n".join(lines + _md_sections(content, "##") + [REPORT_MARKER, ""])


def render_within_markdown(content: dict[str, Any]) -> str:
    """A --within model's report as text: the groups' table, then each group's sections."""
    h = content["header"]
    lines = [f"# Segments of {_md_escape(h['source'])}", ""]
    lines += [f"- **{_md_escape(k)}**: {_md_escape(v)}" for k, v in _within_header_items(h)] + ["", f"> {_md_escape(h['caution'])}", ""]
    lines += [f"## Groups of {_md_escape(h['within'])}", ""] + _md_table(
        ["group", "rows", "segments", "sizes", "SSE"],
        [[g["group"], fmt(g["report"]["header"]["rows"]), g["report"]["header"]["k"],
          ", ".join(fmt(s["rows"]) for s in g["report"]["segments"]), fmt(g["report"]["header"]["sse"])] for g in content["groups"]],
    )
    for g in content["groups"]:
        lines += [f"## {_md_escape(h['within'] + ' = ' + g['group'])}", ""]
        lines += [f"- **{_md_escape(k)}**: {_md_escape(v)}" for k, v in _group_items(g)] + [""]
        lines += _md_sections(g["report"], "###")
    if content.get("history"):
        lines += ["## Refresh history", ""] + _md_table(*_within_history(content["history"]))
    return "\n".join(lines + [REPORT_MARKER, ""])


def _md_sections(content: dict[str, Any], hx: str) -> list[str]:
    """Every chart's numbers of one model as tables, headed by ``hx`` (## or ###)."""
    h = content["header"]
    segments = content["segments"]
    sub = hx + "#"
    digits = column_digits(content)
    lines = [f"{hx} Sizes", ""] + _md_table(
        ["segment", "name", "rows", "share", "description"],
        [[s["segment"], s.get("name") or "", fmt(s["rows"]), pct(s["share"]), s["description"]] for s in segments],
    )
    lines += [f"{hx} Profile (segment mean; sd from the overall mean)", ""] + _md_table(
        ["segment", *h["columns"]],
        [[segment_label(s)] + [f"{column_text(m, d)}; {'–' if z is None else f'{z:+.2f}'}"
                               for m, z, d in zip(p["mean"], p["z"], digits)] for s, p in zip(segments, content["profile"])],
    )
    lines += [f"{hx} Spread", "", quartile_note(content), ""]
    for c, d in zip(h["columns"], digits):
        lines += [f"{sub} {_md_escape(c)}", ""] + _md_table(
            SPREAD_HEAD, [spread_row(s, r, d) for s, r in zip(segments, content["spread"][c])])
    m = content.get("map")
    if m:
        share = m["variance_share"]
        lines += [f"{hx} Map", "", f"{m['cells']:,} grid cells on the first two principal axes, which hold "
                  f"{pct(sum(share[:2]))} of the variance ({', '.join(pct(v) for v in share[:2])}).", ""]
        lines += _md_table(["", *h["columns"]], [[f"axis {a + 1} loading"] + [f"{v:+.3f}" for v in m["axes"][a]] for a in range(len(m["axes"]))])
        lines += _md_table(["segment", "axis 1", "axis 2"], [[c["segment"], f"{c['x']:.3f}", f"{c['y']:.3f}"] for c in m["centroids"]])
    for b in content.get("breakdowns") or []:
        lines += [f"{hx} Breakdown by {_md_escape(b['column'])}", ""]
        rows = []
        for s in segments:
            counts = b["counts"].get(str(s["segment"]), [0] * len(b["categories"]))
            total = sum(counts) or 1
            rows.append([segment_label(s)] + [f"{fmt(n)} ({pct(n / total)})" for n in counts])
        lines += _md_table(["segment", *b["categories"]], rows)
    hist = content.get("history")
    if hist:
        ids = sorted({k for x in hist for k in x["sizes"]}, key=int)
        lines += [f"{hx} Refresh history", ""] + _md_table(
            ["when", "event", "new", "changed", "vanished", "rows", "largest move (sd)"] + [f"rows in {i}" for i in ids],
            [[x["at"][:19], x["event"], x["new"], x["changed"], x["vanished"], fmt(x["rows"]),
              "–" if x["largest_shift"] is None else f"{x['largest_shift']:.3f}"] + [fmt(x["sizes"].get(i)) for i in ids] for x in hist],
        )
    return lines
