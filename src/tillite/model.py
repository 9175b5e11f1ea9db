"""The model file: what `segment` writes and `label`, `show` (and later `refresh`) read.

A JSON document with a format name and version of our own.  Centroids are kept
in original units (``centroids``) and in the standardised units the distances
are measured in (``centroids_scaled``), so labelling needs nothing else.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from dataclasses import MISSING, asdict, dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .errors import ModelError, TilliteError
from .figures import column_text, digits_to_tell_apart


def k_list_text(ks: "list[int] | tuple[int, ...]") -> str:
    """Candidate ks for a reader: '1..12' when consecutive, else '2, 4, 8'."""
    ks = list(ks)
    if len(ks) > 2 and ks == list(range(ks[0], ks[-1] + 1)):
        return f"{ks[0]}..{ks[-1]}"
    return ", ".join(map(str, ks))

def whole_percents(parts: "list[float] | tuple[float, ...]") -> list[int]:
    """Each part's share of their sum in whole percents, rounded by largest remainder so they add to 100
    (plain rounding shows 55%, 31%, 15% for 0.545, 0.309, 0.146); all 0 when the sum is not positive."""
    total = float(sum(parts))
    if not total > 0:
        return [0] * len(parts)
    exact = [100.0 * p / total for p in parts]
    whole = [int(e) for e in exact]
    for j in sorted(range(len(exact)), key=lambda j: (-(exact[j] - whole[j]), j))[: 100 - sum(whole)]:
        whole[j] += 1
    return whole


def sizes_text(sizes: "list[int] | tuple[int, ...]") -> str:
    """Segment sizes for a line of text: '91,860 / 55,153 / 22,269' (a comma would read as a thousands separator)."""
    return " / ".join(f"{int(s):,}" for s in sizes)


if TYPE_CHECKING:  # imported where used: `tillite show` needs neither numpy nor sqlglot
    from .sqlgen import Assignment, CellMap

FORMAT_NAME = "tillite-model"
FORMAT_VERSION = 1

__all__ = ["Model", "FORMAT_NAME", "FORMAT_VERSION", "ModelError", "default_model_path", "replaced_model_note",
           "usual_file_mode", "MODEL_SUFFIX", "write_text_atomically"]

#: Ending of the model file name segment gives when --out is not given: <source>.model.json.
MODEL_SUFFIX = ".model.json"


@dataclass
class Model:
    columns: list[str]
    center: list[float]
    scale: list[float]
    weights: list[float]
    scaling: str
    centroids: list[list[float]]
    centroids_scaled: list[list[float]]
    sizes: list[int]
    sse: float
    segment_sse: list[float]
    radius: list[float]
    rows: int
    skipped: int
    source: str
    k: int
    method: str = "kmeans"
    ids: list[int] = field(default_factory=list)  # segment id of each centroid (0..k-1 unless a store keeps ids stable)
    extras: dict[str, Any] = field(default_factory=dict)  # outlier group, Ward merge heights, density noise
    cell_map: dict[str, Any] = field(default_factory=dict)  # cells labelled by their cell: keys, segments, unmapped
    constant_columns: list[str] = field(default_factory=list)
    grid: dict[str, Any] = field(default_factory=dict)
    params: dict[str, Any] = field(default_factory=dict)
    passes: list[dict[str, Any]] = field(default_factory=list)
    timings: dict[str, float] = field(default_factory=dict)
    created: str = ""
    names: dict[str, str] = field(default_factory=dict)  # segment id (as text) -> name given by `tillite name`
    # the report's map drawn at segment time from the cells (report.map_figure): dots on the first two
    # principal axes with row counts and segments, and the variance share; older files lack it
    report_map: dict[str, Any] = field(default_factory=dict)
    # `segment --within COL`: {"column", "type", "groups": [one model per group]}; the top-level segment
    # lists are then empty (k 0) and the top-level centre and scale are the whole table's
    within: dict[str, Any] = field(default_factory=dict)
    # categorical columns (categorical.CategoricalColumn.to_dict): column, type, listed values, indicator
    # column names; their indicators are among `columns` and their centroid values are category shares
    categorical: list[dict[str, Any]] = field(default_factory=list)

    # ------------------------------------------------------------ derived

    @property
    def usable(self) -> int:
        return int(sum(self.sizes))

    def assignment(self) -> Assignment:
        """What the refine and label SQL need to assign rows to segments."""
        from .sqlgen import Assignment

        return Assignment(
            center=tuple(self.center),
            inv_scale=tuple(1.0 / s for s in self.scale),
            weights=tuple(self.weights),
            centroids=tuple(tuple(c) for c in self.centroids_scaled),
            ids=tuple(self.segment_ids()),
        )

    def refuse_within(self, what: str) -> None:
        """One clear error where a command does not take `segment --within` models (yet)."""
        if self.within:
            raise ModelError(f"this model holds segments within each {self.within['column']} (segment --within); "
                             f"{what} does not take such models yet")

    def cell_map_spec(self) -> CellMap | None:
        """Cells whose rows are labelled through their cell (outlier group, density segments)."""
        if not self.cell_map or not self.cell_map.get("keys"):
            return None
        from .sqlgen import CellMap, Grid

        return CellMap(
            grid=Grid.from_dict(self.grid),
            keys=tuple(tuple(map(float, k)) for k in self.cell_map["keys"]),
            segments=tuple(int(s) for s in self.cell_map["segments"]),
            unmapped=self.cell_map.get("unmapped", "nearest"),
            table=self.cell_map.get("table"),  # set only while a label run holds the map as a temporary relation
        )

    def segment_ids(self) -> list[int]:
        """Segment id of each centroid."""
        return list(self.ids) if self.ids else list(range(len(self.centroids_scaled)))

    # ------------------------------------------------------------ files

    def to_dict(self) -> dict[str, Any]:
        body = asdict(self)
        return {"format": FORMAT_NAME, "version": FORMAT_VERSION, **body}

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2, default=_plain)

    def write(self, path: str | os.PathLike) -> None:
        """Write atomically with the process's usual mode (see write_text_atomically)."""
        write_text_atomically(Path(path), self.to_json() + "\n", "model file", ModelError)

    @staticmethod
    def from_dict(data: dict[str, Any], where: str = "model") -> "Model":
        if not isinstance(data, dict):
            raise ModelError(f"{where} is not a tillite model (a JSON {type(data).__name__}, not an object)")
        if data.get("format") != FORMAT_NAME:
            raise ModelError(f"{where} is not a tillite model ({_format_said(data)})")
        version = data.get("version", 0)
        if not isinstance(version, int) or isinstance(version, bool):
            raise ModelError(f"{where} has an unreadable model version {version!r}")
        if version > FORMAT_VERSION:
            raise ModelError(f"{where} has model version {version}; this tillite reads up to {FORMAT_VERSION}")
        body = {k: v for k, v in data.items() if k not in ("format", "version")}
        known = set(Model.__dataclass_fields__)
        required = [
            name for name, f in Model.__dataclass_fields__.items()
            if f.default is MISSING and f.default_factory is MISSING
        ]
        missing = [k for k in required if k not in body]
        if missing:
            raise ModelError(f"{where} lacks {', '.join(missing)}")
        _check_types(body, where)
        _check_shapes(body, where)
        _check_values(body, where)
        _check_groups(body, where)
        return Model(**{k: v for k, v in body.items() if k in known})

    @staticmethod
    def read(path: str | os.PathLike) -> "Model":
        try:
            text = Path(path).read_text()
        except OSError as err:
            raise ModelError(f"cannot read model file {path}: {err.strerror}") from None
        except UnicodeDecodeError:
            raise ModelError(f"model file {path} is not text (is it a database or data file?)") from None
        try:
            data = json.loads(text)
        except json.JSONDecodeError as err:
            raise ModelError(f"model file {path} is not valid JSON: {err}") from None
        return Model.from_dict(data, where=f"model file {path}")

    # ------------------------------------------------------------ summary

    def _method_lines(self) -> list[str]:
        """The second phase's parameters, outlier group and (Ward) how sharp the cut is."""
        out = []
        tree = self.params.get("tree")
        if tree:
            out.append(
                f"CF tree: T={tree['threshold']:.4g} ({tree['criterion']}), B={tree['branching']}, L={tree['leaf_capacity']}, "
                f"budget {tree['budget']:,}, {tree['entries']:,} entries after {tree['rebuilds']} rebuild(s)"
                + (f"; {tree['reason']}" if tree.get("reason") else "")
            )
        outliers = self.extras.get("outliers")
        if outliers:
            out.append(f"outlier group (segment -1): {outliers['rows']:,} rows in {outliers['cells']:,} cells")
        if self.method == "density":
            out.append(
                f"density: dense cells have n >= {self.params.get('min_count', 0):.4g}, adjacency {self.params.get('adjacency')}, "
                f"noise {self.params.get('noise')} ({self.extras.get('noise_rows', 0):,} noise rows)"
            )
        choice = self.params.get("k_choice")
        if choice:
            out.append(f"k chosen among {k_list_text([r['k'] for r in choice['table']])} by {choice['rule'].replace('_', '-')}: {choice['k']}"
                       + (f" ({choice['reason']})" if choice.get("reason") else ""))
            if choice.get("narrowed"):
                out.append(choice["narrowed"])
        heights = self.extras.get("merge_heights")
        if heights:
            k = len(self.sizes)
            shown = ", ".join(f"{h:.4g}" for h in heights[-min(len(heights), 10):])
            out.append(f"Ward merge heights (last {min(len(heights), 10)} of the last 30): {shown}")
            if 2 <= k <= len(heights) and not heights[-k] > 0:
                out.append(f"cut at k={k}: the last merge kept joined identical entries (height 0), so the cut is arbitrary")
            elif 2 <= k <= len(heights):
                made, undone = heights[-k], heights[-(k - 1)]
                out.append(
                    f"cut at k={k}: the next merge would cost height {undone:.4g}, {undone / made:.2f}x the last one kept "
                    f"({made:.4g}); a large ratio means a sharp cut"
                )
        return out

    def summary(self) -> dict[str, Any]:
        """The machine-readable digest printed by --json."""
        if self.within:
            return within_summary(self)
        return {
            "source": self.source,
            "method": self.method,
            "k": self.k,
            "columns": self.columns,
            "rows": self.rows,
            "skipped": self.skipped,
            "sse": self.sse,
            "segments": [
                {
                    "segment": self.segment_ids()[i],
                    "size": self.sizes[i],
                    "centroid": dict(zip(self.columns, self.centroids[i])),
                    **({"categories": self.category_shares(i)} if self.categorical else {}),
                    "radius": self.radius[i],
                    "sse": self.segment_sse[i],
                    "name": self.segment_name(self.segment_ids()[i]),
                    "description": self.segment_description(i),
                }
                for i in range(len(self.sizes))
            ],
            "passes": self.passes,
            "timings": self.timings,
            "params": self.params,
            "extras": self.extras,
        }

    def describe(self) -> str:
        """A plain-text table of segments for people."""
        if self.within:
            return within_describe(self)
        lines = [
            f"source: {self.source}",
            f"method: {self.method}, k={self.k}, scaling={self.scaling}",
            f"rows: {self.rows:,} ({self.skipped:,} skipped for NULL/NaN/Inf), segmented: {self.usable:,}",
            f"SSE ({self.sse_basis()}, {self.units(short=True)}): {self.sse:.6g}",
        ]
        if self.constant_columns:
            lines.append(f"constant columns (no weight): {', '.join(self.constant_columns)}")
        lines.extend(self._method_lines())
        shown = self.numeric_positions()
        head = ["segment", "size", "share", "radius", "SSE"] + [self.columns[j] for j in shown]
        rows = []
        total = max(self.usable, 1)
        # centroids come back as centre + c * scale: round-off of that size is shown as 0
        tiny = [1e-9 * (abs(m) + abs(s)) for m, s in zip(self.center, self.scale)]
        shown_values = [[0.0 if abs(c[j]) <= tiny[j] else c[j] for j in shown] for c in self.centroids]
        digits = [digits_to_tell_apart(col) for col in zip(*shown_values)] if shown_values else []
        for i, size in enumerate(self.sizes):
            rows.append(
                [str(self.segment_ids()[i]), f"{size:,}", f"{100.0 * size / total:.1f}%", f"{self.radius[i]:.3g}", f"{self.segment_sse[i]:.4g}"]
                + [column_text(v, d) for v, d in zip(shown_values[i], digits)]
            )
        widths = [max([len(h)] + [len(r[c]) for r in rows]) for c, h in enumerate(head)]
        lines.append("")
        lines.append("  ".join(h.rjust(w) for h, w in zip(head, widths)))
        lines.extend("  ".join(v.rjust(w) for v, w in zip(r, widths)) for r in rows)
        lines.append("")
        lines.extend(self._category_lines())
        lines.append(f"centroids in original units; radius and SSE in {self.units()}")
        left_out = self._rows_outside_segments()
        if left_out:
            lines.append(f"shares are of the {self.usable:,} rows in segments; {left_out} are not counted in them")
        lines.extend(self._name_lines())
        return "\n".join(lines)

    def sse_basis(self) -> str:
        """What the SSE is: 'row level' when it is the rows' own (a refine pass ran, or one would have
        moved no row as the cells settled every row, or density's labels follow its cells), else a
        'cell-based estimate' (no refine pass: whole cells assigned, as a store does by default)."""
        refined = self.passes or self.method == "density" or int(self.params.get("refine_passes") or 0) > 0
        return "row level" if refined else "cell-based estimate, no refine pass"

    def units(self, short: bool = False) -> str:
        """What distances are measured in: standard deviations or the columns' own units, maybe weighted
        (``short``: 'in standard deviations', to sit inside brackets)."""
        scaled = "in standard deviations" if short else "scaled units (standard deviations)"
        base = scaled if self.scaling == "zscore" else ("in original units" if short else "original units")
        return base + (", weighted" if any(w not in (0, 1) for w in self.weights) else "")

    def _rows_outside_segments(self) -> str:
        """Rows segmented but in no segment: density noise with noise drop, or the outlier group."""
        parts = []
        noise = self.extras.get("noise_rows", 0) if self.params.get("noise") == "drop" else 0
        if noise:
            parts.append(f"{noise:,} noise rows (segment -1)")
        outliers = (self.extras.get("outliers") or {}).get("rows", 0)
        if outliers:
            parts.append(f"{outliers:,} outlier-group rows (segment -1)")
        return " and ".join(parts)

    # ------------------------------------------------------------ names and descriptions

    def segment_name(self, segment_id: int) -> str | None:
        """The name given to a segment id with `tillite name`, or None."""
        return self.names.get(str(int(segment_id)))

    def column_sd(self) -> list[float]:
        """Exact population sd per column (from the cells), or the scale when the model predates it; 0 becomes 1.

        Plain Python: `tillite show` describes segments without importing numpy.
        """
        sd = self.grid.get("sd") if isinstance(self.grid, dict) else None
        values = sd if sd is not None and len(sd) == len(self.columns) else self.scale
        return [float(v) if float(v) > 0 else 1.0 for v in values]

    def segment_description(self, i: int, most: int = 3, floor: float = 0.5) -> str:
        """Segment i in words by its most distinctive columns, e.g. "zero_hours 1.9 sd below average"
        (categorical columns: the largest category share, e.g. "district: 61% north")."""
        numeric = set(self.numeric_positions())
        z = [(float(c) - float(m)) / s if j in numeric else 0.0
             for j, (c, m, s) in enumerate(zip(self.centroids[i], self.center, self.column_sd()))]
        by_size = sorted(range(len(z)), key=lambda j: -abs(z[j]))  # stable: ties keep the model's column order
        order = [j for j in by_size if abs(z[j]) >= floor][:most]
        words = [f"{self.columns[j]} {abs(z[j]):.1f} sd {'above' if z[j] > 0 else 'below'} average" for j in order]
        for column, shares in self.category_shares(i).items():
            label, share = max(shares.items(), key=lambda p: p[1]) if shares else ("", 0.0)
            if share >= 0.5:
                words.append(f"{column}: {100 * share:.0f}% {label}")
        return ", ".join(words) if words else "close to the average on every column"

    # ------------------------------------------------------------ categorical columns (plain Python: `show`)

    def input_columns(self) -> list[str]:
        """The source columns a row needs: the numeric ones, then the categorical ones (not their indicators)."""
        return [self.columns[j] for j in self.numeric_positions()] + [c["column"] for c in self.categorical]

    def numeric_positions(self) -> list[int]:
        """Positions in `columns` that are not category indicators."""
        indicators = {n for c in self.categorical for n in c.get("indicators", [])}
        return [j for j, c in enumerate(self.columns) if c not in indicators]

    def category_shares(self, i: int) -> dict[str, dict[str, float]]:
        """Per categorical column, the share of segment i's rows in each category ("(other)", "(NULL)"
        included), largest first: an indicator's centroid coordinate in original units."""
        where = {c: j for j, c in enumerate(self.columns)}
        out = {}
        for spec in self.categorical:
            values = list(spec["values"])  # a category spelled like a bucket keeps its name; the bucket is renamed
            labels = [*values, "(other)" if "(other)" not in values else "(any other value)",
                      "(NULL)" if "(NULL)" not in values else "(NULL value)"]
            shares = [min(max(float(self.centroids[i][where[n]]), 0.0), 1.0) for n in spec["indicators"]]
            order = sorted(range(len(labels)), key=lambda j: (-shares[j], j))
            out[spec["column"]] = {labels[j]: shares[j] for j in order}
        return out

    def _category_lines(self) -> list[str]:
        """Per segment and categorical column: "district: 61% north, 30% harbour, 9% west"."""
        if not self.categorical:
            return []
        lines = ["category shares per segment (largest first; under 0.5% left out):"]
        for i, sid in enumerate(self.segment_ids()):
            for column, shares in self.category_shares(i).items():
                percents = dict(zip(shares, whole_percents(list(shares.values()))))  # the shown ones add up to 100%
                kept = [(k, v) for k, v in shares.items() if v >= 0.005]
                shown = ", ".join(f"{percents[k]}% {k}" for k, v in kept[:6])
                more = f", and {len(kept) - 6} more" if len(kept) > 6 else ""
                lines.append(f"  {sid} {column}: {shown}{more}")
        lines.append("")
        return lines

    def _name_lines(self) -> list[str]:
        """One line per segment: id, name (if any) and description."""
        lines = ["", "segments in words (a segment is a statistical grouping, not a diagnosis):"]
        for i, sid in enumerate(self.segment_ids()):
            name = self.segment_name(sid)
            label = f"{sid} \"{name}\"" if name is not None else f"{sid}"
            lines.append(f"  {label}: {self.segment_description(i)}")
        return lines


# ------------------------------------------------------------ field types, checked from the dataclass's own hints

#: Words for what a field holds, beside its type, where the type alone would not say it.
FIELD_MEANING = {"columns": "column names", "constant_columns": "column names", "source": "the source's name",
                 "names": "segment names keyed by segment id", "ids": "segment ids", "sizes": "row counts",
                 "rows": "a row count", "skipped": "a row count", "k": "the number of segments"}


def _type_words(hint: Any, plural: bool = False) -> str:
    """A type hint in words: list[list[float]] -> 'a list of lists of numbers'."""
    import typing

    origin, args = typing.get_origin(hint), typing.get_args(hint)
    if origin is list:
        return ("lists of " if plural else "a list of ") + _type_words(args[0], True)
    if origin is dict:
        inner = "" if args[1] is Any else " of " + _type_words(args[1], True)
        return ("objects" if plural else "an object") + inner
    single, many = {float: ("a number", "numbers"), int: ("a whole number", "whole numbers"),
                    str: ("text", "texts")}.get(hint, ("any value", "any values"))
    return many if plural else single


def _fits(value: Any, hint: Any) -> bool:
    """Whether a JSON value has the type of a hint (list[...], dict[str, ...], float, int, str, Any); a number
    is an int or float but not true/false, and an int field takes a float only when it is whole."""
    import typing

    origin, args = typing.get_origin(hint), typing.get_args(hint)
    if hint is Any:
        return True
    if origin is list:
        return isinstance(value, list) and all(_fits(v, args[0]) for v in value)
    if origin is dict:
        return isinstance(value, dict) and all(isinstance(k, str) and _fits(v, args[1]) for k, v in value.items())
    if isinstance(value, bool):
        return False
    if hint is float:
        return isinstance(value, (int, float))
    if hint is int:
        return isinstance(value, int)
    return isinstance(value, hint)


def _shown(value: Any, most: int = 60) -> str:
    """A value as JSON, cut short: what the user would see in the file."""
    text = json.dumps(value)
    return text if len(text) <= most else text[: most - 3] + "..."


def _check_types(body: dict[str, Any], where: str) -> None:
    """Every field the model reads has the type ``Model`` declares for it (its dataclass hints), else one
    line naming the field, what it must be and what it holds.  Fields we do not know are left alone."""
    import typing

    hints = typing.get_type_hints(Model)
    for name, hint in hints.items():
        if name in body and not _fits(body[name], hint):
            meaning = f" ({FIELD_MEANING[name]})" if name in FIELD_MEANING else ""
            raise ModelError(f'{where} is damaged: field "{name}" must be {_type_words(hint)}{meaning}, '
                             f"got {_shown(body[name])}")


def _check_shapes(body: dict[str, Any], where: str) -> None:
    """A model whose lists disagree in length would fail later with an obscure error."""
    lists = ("columns", "center", "scale", "weights", "centroids", "centroids_scaled", "sizes", "segment_sse", "radius")
    bad = [k for k in lists if not isinstance(body[k], list)]
    if bad:
        raise ModelError(f"{where} is damaged: {', '.join(bad)} should be lists")
    d, k = len(body["columns"]), len(body["sizes"])
    problems = [f"{name} has {len(body[name])} values for {d} columns" for name in ("center", "scale", "weights") if len(body[name]) != d]
    problems += [f"{name} has {len(body[name])} entries for {k} segments" for name in ("centroids", "centroids_scaled", "segment_sse", "radius") if len(body[name]) != k]
    problems += [
        f"{name} row {i} has {len(row) if isinstance(row, list) else '?'} values for {d} columns"
        for name in ("centroids", "centroids_scaled") for i, row in enumerate(body[name]) if not isinstance(row, list) or len(row) != d
    ]
    if problems:
        raise ModelError(f"{where} is damaged: {problems[0]}")


def _finite_numbers(values: Any) -> bool:
    """True when values (a number or nested lists of them) are all finite numbers."""
    if isinstance(values, list):
        return all(_finite_numbers(v) for v in values)
    return isinstance(values, (int, float)) and not isinstance(values, bool) and math.isfinite(values)


def _check_values(body: dict[str, Any], where: str) -> None:
    """Values that would make labels wrong or a later step fail: NaN, zero scales, ids that merge segments."""
    for name in ("center", "scale", "weights", "centroids", "centroids_scaled", "sizes"):
        if not _finite_numbers(body[name]):
            raise ModelError(f"{where} is damaged: {name} holds a value that is not a finite number")
    if any(v <= 0 for v in body["scale"]):
        raise ModelError(f"{where} is damaged: scale holds {min(body['scale'])}; every scale must be above 0")
    if any(v < 0 for v in body["weights"]):
        raise ModelError(f"{where} is damaged: weights must be 0 or more")
    if any(v < 0 for v in body["sizes"]):
        raise ModelError(f"{where} is damaged: sizes must be 0 or more")
    k = len(body["sizes"])
    if body["k"] != k:
        raise ModelError(f"{where} is damaged: k is {body['k']!r} but it describes {k} segments")
    ids = body.get("ids") or []
    if ids:
        if len(ids) != k or not all(isinstance(i, int) and not isinstance(i, bool) for i in ids):
            raise ModelError(f"{where} is damaged: ids should be {k} whole numbers, one per segment")
        if len(set(ids)) != len(ids):
            dup = sorted({i for i in ids if ids.count(i) > 1})
            raise ModelError(f"{where} is damaged: segment id(s) {dup} appear more than once (their rows would merge)")
    grid = body.get("grid") or {}
    if grid:
        width = grid.get("width")
        if not (_finite_numbers(width) and width > 0) or not _finite_numbers(grid.get("inv_scale", [])) \
                or not _finite_numbers(grid.get("center", [])):
            raise ModelError(f"{where} is damaged: its grid needs a width above 0 and finite centre and scale")
    for spec in body.get("categorical") or []:
        ok = isinstance(spec, dict) and isinstance(spec.get("values"), list) and isinstance(spec.get("indicators"), list)
        if not ok or len(spec["indicators"]) != len(spec["values"]) + 2 or not set(spec["indicators"]) <= set(body["columns"]):
            raise ModelError(f"{where} is damaged: a categorical column's indicators do not match its columns")
    _check_categorical_fields(body.get("categorical") or [], where)
    if body.get("method", "kmeans") not in ("kmeans", "ward", "density") or body.get("scaling") not in ("zscore", "none"):
        raise ModelError(f"{where} is damaged: method {body.get('method')!r} or scaling {body.get('scaling')!r} is not one of ours")


def _check_categorical_fields(specs: list, where: str) -> None:
    """Each categorical column has a name, a type and its categories as text; no column or indicator twice."""
    def text(v: Any) -> bool:
        return isinstance(v, str) and v != ""

    for spec in specs:
        name = spec.get("column")
        if not text(name) or not text(spec.get("type")):
            raise ModelError(f"{where} is damaged: a categorical column lacks its name or its SQL type")
        if not all(isinstance(v, str) for v in spec["values"]) or not all(text(v) for v in spec["indicators"]):
            raise ModelError(f"{where} is damaged: categorical column {name} lists a category that is not text")
    names = [spec["column"] for spec in specs]
    indicators = [n for spec in specs for n in spec["indicators"]]
    if len(set(names)) != len(names) or len(set(indicators)) != len(indicators):
        raise ModelError(f"{where} is damaged: a categorical column or indicator is listed twice")


def _plain(o: Any) -> Any:
    import numpy as np

    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"cannot write {type(o).__name__} to a model file")


def write_text_atomically(path: Path, text: str, what: str, error: type[TilliteError] = TilliteError) -> Path:
    """Write ``text`` to ``path`` through a temporary file in the same folder and a rename, so a failed
    write leaves any existing file as it was; the file gets the process's usual mode (0666 less the umask,
    where mkstemp alone makes 0600), so colleagues can read it.  Errors become one ``error`` line naming ``what``."""
    folder = path.parent if str(path.parent) else Path(".")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=folder)
    except OSError as err:
        raise error(f"cannot write {what} {path}: {err.strerror}") from None
    try:
        os.fchmod(fd, usual_file_mode())
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.replace(tmp, path)
    except BaseException as err:
        if os.path.exists(tmp):
            os.unlink(tmp)
        if isinstance(err, OSError):
            raise error(f"cannot write {what} {path}: {err.strerror}") from None
        raise
    return path


def usual_file_mode() -> int:
    """0666 less the process's umask: the mode open() would give a new file.

    Linux reports the umask in /proc/self/status; elsewhere it is read by setting
    and restoring it (which other threads could see for that instant).
    """
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            mask = next(int(line.split()[1], 8) for line in fh if line.startswith("Umask:"))
    except (OSError, StopIteration, ValueError, IndexError):
        mask = os.umask(0o022)
        os.umask(mask)
    return 0o666 & ~mask


def default_model_path(source: str, table: str | None) -> str:
    """<source>.model.json in the current folder: the table's name, or a data file's (or folder's) name.

    ``meter_days`` -> ``meter_days.model.json``; ``"my.table"`` -> ``my.table.model.json``;
    ``exports/*.parquet`` -> ``exports.model.json``; ``*.parquet`` -> the current folder's name.
    Characters other than letters, digits, ``.``, ``_`` and ``-`` become ``_``.
    """
    if table:
        stem = table.replace('"', "")  # a quoted name's quotes are SQL syntax, not part of the name
    else:
        path = Path(os.path.abspath(source.rstrip("/\\") or source))  # '*.parquet', '.': named after the current folder
        stem = path.stem if path.suffix and not _has_glob(path.name) else path.name
        while _has_glob(stem) or not stem:
            path = path.parent
            if path == path.parent:  # the root has no name
                stem = "source"
                break
            stem = path.name
    safe = "".join(ch if ch.isalnum() or ch in "._-" else "_" for ch in stem).strip(".") or "source"
    return safe + MODEL_SUFFIX


def _has_glob(text: str) -> bool:
    return any(ch in text for ch in "*?[")


def replaced_model_note(path: str | os.PathLike, model: "Model") -> str | None:
    """A warning when writing ``model`` to ``path`` replaces a file that is not an earlier model of
    the same source and columns (None when nothing or such a model is there)."""
    path = Path(path)
    if not path.exists():
        return None
    try:
        old = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError):
        old = None
    if not isinstance(old, dict) or old.get("format") != FORMAT_NAME:
        return f"replaced {path}, which was not a tillite model file"
    if old.get("source") != model.source or old.get("columns") != list(model.columns):
        cols = ", ".join(map(str, old.get("columns") or []))
        return f"replaced {path}, the model of another source or column list ({old.get('source')}: {cols})"
    return None


def _format_said(data: dict[str, Any]) -> str:
    """What a JSON object says its format is, in words (no Python None in a user's message)."""
    if "format" not in data:
        return f'no "format" field; a model file says "format": "{FORMAT_NAME}"'
    return f'its format is {json.dumps(data["format"])}, not "{FORMAT_NAME}"'


# ------------------------------------------------------------ `segment --within` models

#: What one group's entry in ``Model.within["groups"]`` holds besides its name and value.
GROUP_FIELDS = ("rows", "skipped", "k", "sizes", "centroids", "centroids_scaled", "center", "scale", "weights",
                "sse", "segment_sse", "radius")


def _check_groups(body: dict[str, Any], where: str) -> None:
    """Each group of a --within model checked as a model of its own would be."""
    within = body.get("within") or {}
    if not within:
        return
    groups = within.get("groups")
    if not isinstance(within.get("column"), str) or not isinstance(within.get("type"), str) or not isinstance(groups, list):
        raise ModelError(f"{where} is damaged: within needs a column, a type and a list of groups")
    if not groups:
        raise ModelError(f"{where} is damaged: within lists no groups")
    for g in groups:
        if not isinstance(g, dict) or any(f not in g for f in GROUP_FIELDS):
            missing = [f for f in GROUP_FIELDS if not isinstance(g, dict) or f not in g]
            raise ModelError(f"{where} is damaged: a group of within lacks {', '.join(missing)}")
        _check_group_value(g, where)
    values = [g["value"] for g in groups]
    if len(set(values)) != len(values):
        raise ModelError(f"{where} is damaged: a group of within is listed twice (its rows would be labelled twice)")
    for g in groups:
        label = f"{where} (group {g.get('name')})"
        part = {**body, **{f: g[f] for f in GROUP_FIELDS}, "ids": g.get("ids") or []}
        _check_types(part, label)
        _check_shapes(part, label)
        _check_values(part, label)


def _check_group_value(g: dict[str, Any], where: str) -> None:
    """A group's value is its text (or null for the NULL group), its name is text, and its segment names
    (`tillite name --group`), if any, are text keyed by segment id."""
    if "value" not in g or not (g["value"] is None or isinstance(g["value"], str)) or not isinstance(g.get("name"), str):
        raise ModelError(f"{where} is damaged: a group of within lacks its value (text, or null for the NULL group) "
                         "or its name")
    names = g.get("names", {})
    if not isinstance(names, dict) or not all(isinstance(k, str) and k.lstrip("-").isdigit() and isinstance(v, str)
                                               for k, v in names.items()):
        raise ModelError(f"{where} is damaged: the segment names of group {g['name']} are not text keyed by segment id")


def group_models(model: Model) -> list[tuple[dict[str, Any], Model]]:
    """Each group's entry and a Model of that group alone (for describing it, or labelling one group)."""
    out = []
    for g in model.within.get("groups", []):
        one = Model(
            columns=model.columns, center=g["center"], scale=g["scale"], weights=g["weights"], scaling=model.scaling,
            centroids=g["centroids"], centroids_scaled=g["centroids_scaled"], sizes=g["sizes"], sse=g["sse"],
            segment_sse=g["segment_sse"], radius=g["radius"], rows=g["rows"], skipped=g["skipped"],
            source=f"{model.source} where {model.within['column']} is {g['name']}", k=g["k"], method=model.method,
            ids=g.get("ids") or [], constant_columns=g.get("constant_columns", []), grid={"sd": g.get("sd")},
            params={k: v for k, v in (("k_choice", g.get("k_choice")), ("refine_passes", model.params.get("refine_passes")))
                    if v is not None}, passes=list(g.get("passes") or []), categorical=model.categorical,
            names=dict(g.get("names") or {}),
        )
        out.append((g, one))
    return out


def within_summary(model: Model) -> dict[str, Any]:
    """--json of a --within model: the overall figures, then each group with its sizes and segments."""
    groups = []
    for g, one in group_models(model):
        digest = one.summary()
        groups.append({"group": g["name"], "value": g["value"], "rows": g["rows"], "skipped": g["skipped"], "k": g["k"],
                       "sse": g["sse"], "segments": digest["segments"], "notes": g.get("notes", []),
                       **({"k_choice": g["k_choice"]} if g.get("k_choice") else {})})
    return {
        "source": model.source, "method": model.method, "within": model.within["column"], "columns": model.columns,
        "rows": model.rows, "skipped": model.skipped, "sse": model.sse, "groups": groups,
        "passes": model.passes, "timings": model.timings, "params": model.params,
    }


def within_sse_line(model: Model) -> str:
    """The SSE line of `show` for a --within model: under zscore each group is measured in its own
    standard deviations, which the line says in words rather than in nested brackets."""
    weighted = " (weighted)" if any(w not in (0, 1) for w in model.weights) else ""
    if model.scaling == "zscore":
        return (f"SSE ({model.sse_basis()}, summed over the groups): {model.sse:.6g}; each group's part is in that "
                f"group's own standard deviations{weighted}")
    return f"SSE ({model.sse_basis()}, summed over the groups, in original units{weighted}): {model.sse:.6g}"


def within_describe(model: Model) -> str:
    """`tillite show` of a --within model: one line per group, then each group's segment table."""
    groups = group_models(model)
    segments = sum(g["k"] for g, _ in groups)
    lines = [
        f"source: {model.source}",
        f"method: {model.method}, segments within each {model.within['column']} "
        f"({len(groups)} group{'' if len(groups) == 1 else 's'}, {segments} segment{'' if segments == 1 else 's'} in all), "
        f"scaling={model.scaling}",
        f"rows: {model.rows:,} ({model.skipped:,} skipped for NULL/NaN/Inf)",
        within_sse_line(model),
        "",
        "groups:",
    ]
    width = max([len(g["name"]) for g, _ in groups] + [5])
    for g, _ in groups:
        lines.append(f"  {g['name'].ljust(width)}  {g['rows']:>12,} rows  k={g['k']}  sizes {sizes_text(g['sizes'])}"
                     + (f"  ({'; '.join(g['notes'])})" if g.get("notes") else ""))
    for g, one in groups:
        lines.append("")
        lines.append(f"== {model.within['column']} = {g['name']}")
        lines.append(one.describe())
    return "\n".join(lines)
