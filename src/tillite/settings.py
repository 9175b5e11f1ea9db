"""What a `segment` run can be told, declared once.

Each field of ``Settings`` is one row of the parameter table: type (the
annotation), default, range or choices, help text and command-line option.
The rows drive ``Settings.check`` (one message per parameter), the click
options of `tillite segment` (``tillite.cli.shared.settings_options``), the
option names in error messages (``OPTION_NAMES``) and the model's ``params``.
Adding a parameter is adding one field here (and using it in the pipeline).

Light on purpose: the command line imports this module to build its options,
so it must not import numpy, sqlglot or a database driver at module level.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from numbers import Real
from typing import Any, Iterable, Sequence

from .errors import ParameterError

__all__ = [
    "Parameter",
    "Settings",
    "PARAMETERS",
    "REFRESH_PARAMETERS",
    "SETTING_CHOICES",
    "SETTING_RANGES",
    "OPTION_NAMES",
    "MAX_WEIGHT",
    "MAX_SEED",
    "METHODS",
    "STORE_METHODS",
    "check_range",
    "check_refresh_options",
]

#: Largest column weight: squared weights go into the SQL and must stay far from overflow.
MAX_WEIGHT = 1e6

#: Seeds are passed to every engine's sampler: keep them in a 32-bit signed range.
MAX_SEED = 2**31 - 1

#: The second-phase methods, and those a summary store takes (density's cell map would miss rows in new cells).
METHODS = ("kmeans", "ward", "density")
STORE_METHODS = ("kmeans", "ward")
#: Shorthands for the parameter table's ``methods`` column.
CENTROID_METHODS = ("kmeans", "ward")
DENSITY = ("density",)


@dataclass(frozen=True)
class Parameter:
    """One row of the parameter table.

    ``low``/``bound``: the lowest value, inclusive ("min") or exclusive ("above");
    ``high``: the highest (inclusive). ``option``: the command-line option
    (None: the parameter has no option of its own); ``model_key``: the name
    under which the model file's ``params`` records it (None: not recorded).
    ``methods``: the second-phase methods that use it (empty: every method);
    given with another method it is refused, not ignored. ``needs``: (parameter,
    value) it is used with, e.g. --radius only with --adjacency distance.
    """

    help: str
    name: str = ""
    kind: str = ""  # "int", "float", "str", "bool"; "parsed" (or a dict's "") for text the CLI parses itself
    default: Any = None
    choices: tuple[str, ...] = ()
    low: float | None = None
    bound: str = "min"
    high: float | None = None
    option: str | None = "--"  # "--": the name with dashes
    short: str | None = None
    model_key: str | None = None
    methods: tuple[str, ...] = ()
    needs: tuple[str, str] | None = None

    @property
    def option_name(self) -> str | None:
        """``--cell-budget`` for ``cell_budget``, or the option given in the table."""
        if self.option == "--":
            return "--" + self.name.replace("_", "-")
        return self.option

    def check(self, value: Any) -> None:
        """Refuse a value outside the row's choices or range (None passes: not given)."""
        if self.choices:
            if value not in self.choices:
                raise ParameterError(f"{{{self.name}}} must be one of {', '.join(self.choices)}, got {value!r}", self.name)
        elif self.low is not None:
            check_range(self.name, value, self.low, self.bound, self.high)


def setting(default: Any, help: str, **row: Any) -> Any:
    """A Settings field whose row of the table is ``row`` (see Parameter)."""
    meta = {"parameter": Parameter(help=help, default=default, **row)}
    if isinstance(default, (dict, list)):
        return field(default_factory=lambda: type(default)(default), metadata=meta)
    return field(default=default, metadata=meta)


@dataclass
class Settings:
    """Everything a `segment` run can be told; each field is one row of the parameter table."""

    k: int = field(metadata={"parameter": Parameter(
        help="Number of segments, 'auto' (1..12, one segment when no split beats it) or a range like 2..8 "
             "chosen on the CFs (not needed for --method density).", short="-k", low=1, kind="parsed",
        methods=CENTROID_METHODS)})
    method: str = setting("kmeans", "Second phase: k-means++, Ward agglomeration, or density-connected cells "
                                    "(non-convex shapes).", choices=METHODS)
    k_rule: str = setting("calinski_harabasz", "How --k auto/range picks k: largest Calinski-Harabasz, or smallest "
                                               "spherical-Gaussian BIC.", choices=("calinski_harabasz", "bic"),
                           methods=CENTROID_METHODS)
    scaling: str = setting("zscore", "zscore: columns in standard deviations; none: original units (still centred).",
                           choices=("zscore", "none"))
    weights: dict[str, float] = setting({}, "Column multipliers after scaling, e.g. litres=2,zero_hours=0.5.")
    cell_budget: int = setting(20_000, "About how many grid cells to aim for.", low=1, model_key="cell_budget")
    width: float | None = setting(None, "Force the grid width (scaled units) instead of choosing it.", low=0,
                                  bound="above")
    refine_passes: int = setting(3, "Most refine passes over the rows (0 for none).", low=0, model_key="refine_passes")
    tolerance: float = setting(1e-4, "Stop refining when a pass improves SSE by less than this share.", low=0,
                               model_key="tolerance")
    n_init: int = setting(10, "k-means++ restarts on the cells (kmeans; ward uses them to choose --k auto/lo..hi).",
                          low=1, option="--restarts", model_key="restarts", methods=CENTROID_METHODS)
    seed: int = setting(0, "Seed of the profile sample, k-means++ and the CF tree (0 to 2147483647); the same data, "
                           "options and seed give the same model.", low=0, high=MAX_SEED, model_key="seed")
    sample_rows: int = setting(50_000, "Rows the profile sample aims for.", low=2, model_key="sample_rows")
    principal_above: int = setting(6, "Bin principal-axis scores when there are more columns than this.", low=1,
                                   option=None)
    principal_axes: int = setting(4, "How many principal axes to bin (a 20,000-cell budget gives ~12 bins per axis).",
                                  low=1, option=None)
    k_candidates: tuple[int, ...] = setting((), "Choose k among these on the CFs (then k is ignored); "
                                                "the command line's --k auto or lo..hi.", option=None)
    tree_budget: int | None = setting(None, "Condense the cells with a CF tree when there are more than this "
                                            "(default: the cell budget; 0: never).", low=0,
                                  methods=CENTROID_METHODS)
    threshold: float | None = setting(None, "CF tree threshold T (default: chosen from the cells).", low=0,
                                      methods=CENTROID_METHODS)
    branching: int = setting(50, "CF tree branching factor B.", low=2, methods=CENTROID_METHODS)
    leaf_capacity: int = setting(50, "CF tree leaf capacity L.", low=2, methods=CENTROID_METHODS)
    criterion: str = setting("diameter", "What the threshold T bounds.", choices=("diameter", "radius"),
                             methods=CENTROID_METHODS)
    keep_outliers: bool = setting(False, "Keep every cell; no outlier group (segment -1).", methods=CENTROID_METHODS)
    min_count: float | None = setting(None, "density: rows a cell needs to be dense (default from the data).", low=0,
                                      methods=DENSITY)
    adjacency: str = setting("face", "density: join cells sharing a grid face, or with centroids within --radius.",
                             choices=("face", "distance"), methods=DENSITY)
    radius: float | None = setting(None, "density: joining distance for --adjacency distance.", low=0, bound="above",
                                   methods=DENSITY, needs=("adjacency", "distance"))
    noise: str = setting("attach", "density: sparse cells join the nearest segment, or stay noise (segment -1).",
                         choices=("attach", "drop"), methods=DENSITY)
    within: str | None = setting(None, "Segment each group of this column separately (k per group; NULL is a group of "
                                       "its own), all groups from the same scans; at most 1,000 groups.", kind="str",
                                methods=CENTROID_METHODS)
    categorical: tuple[str, ...] = setting((), "Categorical columns, comma-separated (repeatable): each becomes indicators of its "
                                               "top categories, weighing as much as one scaled numeric column "
                                               "(--weights COLUMN=w applies to the whole column).", kind="parsed")
    max_categories: int = setting(20, "Categories kept per --categorical column, 1 to 200 (those with the most rows "
                                      "in the profile sample); the rest count as '(other)', NULL as '(NULL)'.", low=1, high=200)

    def column_weights(self, columns: Sequence[str]) -> Any:
        """The multiplier of each column (1 unless --weights says otherwise), as a numpy array."""
        import numpy as np

        return np.array([float(self.weights.get(c, 1.0)) for c in columns])

    def check(self, columns: Sequence[str]) -> None:
        """Refuse values no run can use, naming the parameter (the CLI names the option)."""
        rows = [p for p in PARAMETERS.values() if p.name not in ("k", "weights")]
        for p in rows:  # choices first, then k, then ranges: the order the checks have always had
            if p.choices:
                p.check(getattr(self, p.name))
        self._check_k()
        for p in rows:
            if not p.choices:
                p.check(getattr(self, p.name))
        self.check_methods()
        self._check_weights(columns)

    def given(self) -> set[str]:
        """The parameters set away from their defaults."""
        return {p.name for p in PARAMETERS.values() if getattr(self, p.name) != p.default}

    def check_methods(self, given: Iterable[str] | None = None) -> None:
        """Refuse a parameter given with a method that does not use it, or without the value it needs.

        ``given``: the parameters the caller set (the command line's options, even at their
        defaults); None: those away from their defaults. k has its own check (_check_k).
        """
        named = self.given() - {"k"} if given is None else set(given)
        for name in (n for n in PARAMETERS if n in named):
            p = PARAMETERS[name]
            if p.methods and self.method not in p.methods:
                raise self._not_used(name)
            if p.needs and getattr(self, p.needs[0]) != p.needs[1]:
                raise ParameterError(f"{{{name}}} is used only with {{{p.needs[0]}}} {p.needs[1]}; add "
                                     f"{{{p.needs[0]}}} {p.needs[1]} or leave {{{name}}} out", name, p.needs[0])
        if "k_rule" in named and self.method != "density" and not self.k_candidates:
            raise ParameterError(f"{{k_rule}} chooses among several k ({{k}} auto or a range like 2..8); with {{k}} "
                                 f"{self.k} there is nothing to choose: leave {{k_rule}} out", "k_rule", "k")

    def _check_k(self) -> None:
        if self.method == "density" and (self.k or self.k_candidates):
            raise self._not_used("k")
        if any(c < 1 for c in self.k_candidates):
            raise ParameterError(f"{{k}} candidates must be at least 1, got {list(self.k_candidates)}", "k")
        if not self.k_candidates and self.method != "density" and self.k < 1:
            raise ParameterError(f"{{k}} must be at least 1, got {self.k}", "k")

    def _not_used(self, name: str) -> ParameterError:
        """The refusal of a parameter that this run's method does not use."""
        if name == "k":
            return ParameterError("{k} is not used by {method} density, which finds the number of segments itself; "
                                  "leave {k} out", "k", "method")
        methods = " or ".join(PARAMETERS[name].methods)
        return ParameterError(f"{{{name}}} applies to {{method}} {methods} only, not {{method}} {self.method}; "
                              f"leave {{{name}}} out", name, "method")

    def _check_weights(self, columns: Sequence[str]) -> None:
        unknown = [c for c in self.weights if c not in columns and c not in self.categorical]
        if unknown:
            raise ParameterError(f"{{weights}} name columns not chosen for segmenting: {', '.join(unknown)}", "weights")
        bad = {c: w for c, w in self.weights.items()
               if not (isinstance(w, Real) and math.isfinite(w) and 0 <= w <= MAX_WEIGHT)}
        if bad:
            shown = ", ".join(f"{c}={w:g}" if isinstance(w, Real) else f"{c}={w!r}" for c, w in bad.items())
            raise ParameterError(f"{{weights}} must be numbers from 0 to {MAX_WEIGHT:g}: {shown}", "weights")
        if columns and not self.categorical and not any(float(self.weights.get(c, 1.0)) > 0 for c in columns):
            raise ParameterError("every {weights} value is 0: at least one column needs a weight above 0", "weights")

    def model_params(self) -> dict[str, Any]:
        """The settings a model file records in ``params`` (the table's ``model_key`` column)."""
        return {p.model_key: getattr(self, p.name) for p in PARAMETERS.values() if p.model_key}


_KINDS = {"int": "int", "int | None": "int", "float": "float", "float | None": "float", "str": "str", "bool": "bool"}


def _rows() -> dict[str, Parameter]:
    out: dict[str, Parameter] = {}
    for f in fields(Settings):
        p: Parameter = f.metadata["parameter"]
        out[f.name] = Parameter(**{**p.__dict__, "name": f.name, "kind": p.kind or _KINDS.get(str(f.type), "")})
    return out


#: The parameter table: Settings' fields, by name.
PARAMETERS: dict[str, Parameter] = _rows()

#: Parameters of a store refresh, regrid or status that are not Settings fields.
REFRESH_PARAMETERS: dict[str, Parameter] = {p.name: p for p in (
    Parameter(name="drift_threshold", kind="float", default=0.5, low=0, option="--drift-warn",
              help="Warn when a segment's centroid moves more than this many standard deviations."),
    Parameter(name="new_segment_shift", kind="float", default=3.0, low=0, bound="above",
              help="A segment farther than this (sd) from every old one gets a new id."),
    Parameter(name="outside_warn", kind="float", default=0.01, low=0,
              help="Warn when more than this share of rows falls outside the grid's built range."),
)}

#: Parameters with a fixed set of values.
SETTING_CHOICES: dict[str, tuple[str, ...]] = {p.name: p.choices for p in PARAMETERS.values() if p.choices}

#: (parameter, lowest value, "min" (inclusive) or "above" (exclusive)); None values are left alone.
SETTING_RANGES: tuple[tuple[str, float, str], ...] = tuple(
    (p.name, p.low, p.bound) for p in PARAMETERS.values() if p.low is not None and p.name != "k"
)

#: API parameter -> CLI option, where the option is not just the parameter with dashes.
OPTION_NAMES: dict[str, str] = {
    **{p.name: p.option_name for p in (*PARAMETERS.values(), *REFRESH_PARAMETERS.values())
       if p.option_name and p.option_name != "--" + p.name.replace("_", "-")},
    "replace": "--replace", "partition": "--partition-by",
}


def check_range(name: str, value: Any, low: float, bound: str = "min", high: float | None = None) -> None:
    """A finite number at or above ``low`` ("min") or above it ("above"), at most ``high``; None passes."""
    if value is None:
        return
    if high is None and name in PARAMETERS:
        high = PARAMETERS[name].high
    ok = isinstance(value, Real) and not isinstance(value, bool) and math.isfinite(value)
    ok = ok and (value >= low if bound == "min" else value > low) and (high is None or value <= high)
    if not ok:
        if high is not None:
            want = f"a whole number from {_number(low)} to {_number(high)}"
        else:
            want = f"a number {'at least' if bound == 'min' else 'above'} {low:g}"
        raise ParameterError(f"{{{name}}} must be {want}, got {value!r}", name)


def _number(x: float) -> str:
    return str(int(x)) if float(x).is_integer() else f"{x:g}"


def check_refresh_options(k: int | None = None, drift_threshold: float | None = None,
                          new_segment_shift: float | None = None, outside_warn: float | None = None) -> None:
    """The options of a store refresh, regrid or status, checked before any work (None: not given)."""
    check_range("k", k, 1)
    for name, value in (("drift_threshold", drift_threshold), ("new_segment_shift", new_segment_shift),
                        ("outside_warn", outside_warn)):
        REFRESH_PARAMETERS[name].check(value)
