"""The model file: what `segment` writes and `label`, `show` (and later `refresh`) read.

A JSON document with a format name and version of our own.  Centroids are kept
in original units (``centroids``) and in the standardised units the distances
are measured in (``centroids_scaled``), so labelling needs nothing else.
"""

from __future__ import annotations

import json
import os
import tempfile
from dataclasses import MISSING, asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .engines import TilliteError
from .sqlgen import Assignment, CellMap, Grid

FORMAT_NAME = "tillite-model"
FORMAT_VERSION = 1

__all__ = ["Model", "FORMAT_NAME", "FORMAT_VERSION", "ModelError"]


class ModelError(TilliteError):
    """The model file is missing, unreadable or not one of ours."""


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

    # ------------------------------------------------------------ derived

    @property
    def usable(self) -> int:
        return int(sum(self.sizes))

    def assignment(self) -> Assignment:
        """What the refine and label SQL need to assign rows to segments."""
        return Assignment(
            center=tuple(self.center),
            inv_scale=tuple(1.0 / s for s in self.scale),
            weights=tuple(self.weights),
            centroids=tuple(tuple(c) for c in self.centroids_scaled),
            ids=tuple(self.segment_ids()),
        )

    def cell_map_spec(self) -> CellMap | None:
        """Cells whose rows are labelled through their cell (outlier group, density segments)."""
        if not self.cell_map or not self.cell_map.get("keys"):
            return None
        return CellMap(
            grid=Grid.from_dict(self.grid),
            keys=tuple(tuple(map(float, k)) for k in self.cell_map["keys"]),
            segments=tuple(int(s) for s in self.cell_map["segments"]),
            unmapped=self.cell_map.get("unmapped", "nearest"),
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
        """Write atomically: a failed write leaves any existing file as it was."""
        path = Path(path)
        text = self.to_json()
        try:
            fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent if str(path.parent) else ".")
        except OSError as err:
            raise ModelError(f"cannot write model file {path}: {err.strerror}") from None
        try:
            with os.fdopen(fd, "w") as fh:
                fh.write(text)
                fh.write("\n")
            os.replace(tmp, path)
        except BaseException as err:
            if os.path.exists(tmp):
                os.unlink(tmp)
            if isinstance(err, OSError):
                raise ModelError(f"cannot write model file {path}: {err.strerror}") from None
            raise

    @staticmethod
    def from_dict(data: dict[str, Any], where: str = "model") -> "Model":
        if not isinstance(data, dict):
            raise ModelError(f"{where} is not a tillite model (a JSON {type(data).__name__}, not an object)")
        if data.get("format") != FORMAT_NAME:
            raise ModelError(f"{where} is not a tillite model (format {data.get('format')!r})")
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
        _check_shapes(body, where)
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
            out.append(f"k chosen among {[r['k'] for r in choice['table']]} by {choice['rule'].replace('_', '-')}: {choice['k']}"
                       + (f" ({choice['reason']})" if choice.get("reason") else ""))
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
                    "radius": self.radius[i],
                    "sse": self.segment_sse[i],
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
        lines = [
            f"source: {self.source}",
            f"method: {self.method}, k={self.k}, scaling={self.scaling}",
            f"rows: {self.rows:,} ({self.skipped:,} skipped for NULL/NaN/Inf), segmented: {self.usable:,}",
            f"SSE (row level, scaled units): {self.sse:.6g}",
        ]
        if self.constant_columns:
            lines.append(f"constant columns (no weight): {', '.join(self.constant_columns)}")
        lines.extend(self._method_lines())
        head = ["segment", "size", "share", "radius", "SSE"] + list(self.columns)
        rows = []
        total = max(self.usable, 1)
        # centroids come back as centre + c * scale: round-off of that size is shown as 0
        tiny = [1e-9 * (abs(m) + abs(s)) for m, s in zip(self.center, self.scale)]
        for i, size in enumerate(self.sizes):
            rows.append(
                [str(self.segment_ids()[i]), f"{size:,}", f"{100.0 * size / total:.1f}%", f"{self.radius[i]:.3g}", f"{self.segment_sse[i]:.4g}"]
                + [_fmt(0.0 if abs(v) <= t else v) for v, t in zip(self.centroids[i], tiny)]
            )
        widths = [max([len(h)] + [len(r[c]) for r in rows]) for c, h in enumerate(head)]
        lines.append("")
        lines.append("  ".join(h.rjust(w) for h, w in zip(head, widths)))
        lines.extend("  ".join(v.rjust(w) for v, w in zip(r, widths)) for r in rows)
        lines.append("")
        lines.append("centroids in original units; radius and SSE in scaled units")
        return "\n".join(lines)


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


def _fmt(v: float) -> str:
    return f"{v:.4g}" if abs(v) < 1e5 else f"{v:.6g}"


def _plain(o: Any) -> Any:
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"cannot write {type(o).__name__} to a model file")
