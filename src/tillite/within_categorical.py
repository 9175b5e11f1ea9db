"""`segment --within G --categorical C`: categorical columns segmented within each group.

The categorical columns' indicators ride along in the per-(group, cell) summaries
exactly as they do in a run without groups (``stages.run_cell_pass_with_codes``):
the one cell pass groups by (group, numeric grid cell, category codes), and each
cell's indicator sums follow from its count.  The categories are listed once,
from the whole table's profile sample (so every group has the same indicators;
a category a group lacks is an indicator that is 0 on all its rows, which adds
nothing to any distance); each group then gets its own indicator scale
(``categorical.group_scale`` of its own shares), as a run on that group alone
would.  Refine passes and labels read the indicators as derived columns of the
source, through the same per-group join as numeric columns (``within_sql``).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from . import categorical as cat
from . import sqlgen, within_sql
from .engines import Engine
from .settings import Settings
from .sqlgen import Grid, Partitioning, Source
from .stages import (
    CODE_SPACING, Profile, canonical_sample, category_specs, cells_statement_with_codes, cells_with_codes, center_and_scale,
    checked_categorical_source, choose_width, grid_with_category_codes, indicator_weights, numeric_grid, profile_with_codes,
    sampled_texts, seeded_sample,
)
from .within import GroupedProfile, WithinInputs, sampled_groups

__all__ = ["CategoricalInputs", "categorical_inputs"]


@dataclass
class CategoricalInputs(WithinInputs):
    """The numeric columns followed by every categorical column's indicators (``source`` reads them)."""

    numeric: list[str] = field(default_factory=list)
    specs: list[cat.CategoricalColumn] = field(default_factory=list)
    profile: GroupedProfile | None = None  # the grouped sample taken while listing the categories

    @property
    def indicator_groups(self) -> list[np.ndarray]:
        return cat.indicator_positions(self.columns, self.specs)

    def model_categorical(self) -> list[dict[str, Any]]:
        return [s.to_dict() for s in self.specs]

    def profile_and_grid(self, engine: Engine, within: str, settings: Settings) -> tuple[GroupedProfile, Grid]:
        assert self.profile is not None
        gp = self.profile
        grid = grid_with_category_codes(gp.profile, settings, self.weights, self.indicator_groups)
        if settings.width or len(gp.profile.sample) == 0 or not (self.weights[: len(self.numeric)] > 0).any():
            return gp, grid
        return gp, _grouped_width(gp, grid, len(self.numeric), settings)

    def sample_grid(self, sample: np.ndarray, rows: int, settings: Settings) -> Grid:
        p = len(self.numeric)
        center, scale = center_and_scale(sample[:, :p], settings.scaling)
        prof = Profile(rows=rows, sample=sample, center=np.concatenate([center, np.zeros(len(self.specs))]),
                       scale=np.concatenate([scale, np.ones(len(self.specs))]), seconds=0.0)
        return grid_with_category_codes(prof, settings, self.weights, self.indicator_groups)

    def cells_statement(self, grid: Grid, target: Any, partition: Partitioning | None = None, where: Any = None) -> Any:
        statement, _, _ = cells_statement_with_codes(self.source, self.columns, grid, self.indicator_groups,
                                                     cat.code_names(self.specs), target, partition=partition, where=where)
        return statement

    def cells_of(self, got: dict[str, np.ndarray], grid: Grid) -> tuple[Any, np.ndarray, int]:
        sub, num_idx = numeric_grid(grid, len(self.columns), self.indicator_groups)
        cp = cells_with_codes(got, grid, sub, num_idx, self.indicator_groups, len(self.columns))
        return cp.cells, cp.keys, cp.skipped


def _grouped_width(gp: GroupedProfile, grid: Grid, p: int, settings: Settings) -> Grid:
    """``within.grouped_grid``'s width search with category codes: the (group, numeric cell, codes) triples
    that fit the cell budget, each group's coordinates moved beyond the data's span."""
    from dataclasses import replace

    sample = gp.profile.sample
    u = (sample[:, :p] - gp.profile.center[None, :p]) / gp.profile.scale[None, :p]
    num_axes = np.asarray(grid.axes)[:p]
    coords = np.hstack([u @ num_axes, sample[:, p:] * CODE_SPACING])
    span = float(np.ptp(coords[:, 0])) + 200.0  # > the data's span plus the widest width searched (50)
    coords[:, 0] += gp.groups * span
    return replace(grid, width=float(choose_width(coords, gp.profile.rows, settings.cell_budget)))


def categorical_inputs(engine: Engine, source: Source, columns: Sequence[str], within: str, settings: Settings) -> CategoricalInputs:
    """Check the numeric and categorical columns; one seeded profile sample carrying each row's group and its
    categories as text; the categories listed from it (top ``max_categories`` of the whole table); the source
    read with their indicators."""
    t0 = time.perf_counter()
    described, rows = checked_categorical_source(engine, source, columns, settings)
    p, texts = len(columns), list(settings.categorical)

    def fetch(limit: int | None = None, **kw: Any) -> dict[str, Any]:  # no LIMIT: every sampled row keeps its group
        return engine.query(within_sql.grouped_sample_statement(source, columns, within, engine.target, text_columns=texts, **kw))

    got = seeded_sample(engine, rows, settings, fetch, lambda g: len(g[within_sql.GROUP_TEXT]))
    groups, values = sampled_groups(got, within)
    x = (np.column_stack([np.asarray(got[sqlgen.internal(f"x{j}")], dtype=np.float64) for j in range(p)])
         if p and len(groups) else np.zeros((len(groups), p)))
    specs, codes = category_specs(texts, sampled_texts(got, len(texts)), described, settings)
    both = canonical_sample(np.hstack([groups[:, None], x, codes]), settings.sample_rows, settings.seed)
    sample, sample_groups = both[:, 1:], both[:, 0].astype(np.int64)
    prof = profile_with_codes(engine, sample, p, rows, settings, t0, columns)
    all_columns = list(columns) + [n for s in specs for n in s.names]
    weights = indicator_weights(settings, all_columns, specs)
    return CategoricalInputs(
        source=cat.with_indicators(source, specs, engine.target), columns=all_columns, weights=weights,
        numeric=list(columns), specs=specs, profile=GroupedProfile(prof, sample_groups, values),
    )
