"""Statements of `segment --within`: segments computed separately per group, all groups in one scan.

The cell pass needs nothing new (``sqlgen.cells_statement`` keyed by (group, cell)
through a ``Partitioning`` on the group column).  What is new here: the profile
sample carries the group, and the refine pass and labels choose each row's
centroid set by its group, through a hash join against a small relation of
(group, group position, centre, norm factors, score coefficients) -- one row per
group -- rather than a CASE per coefficient.

Like sqlgen, this module imports nothing of ours but sqlgen and targets.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import sqlglot.expressions as exp

from . import sqlgen
from .sqlgen import Source, TargetLike, col, internal, num
from .targets import target_for

#: Score given to the missing segments of a group with fewer than the most segments: never the least.
PADDING_SCORE = 1e300

GROUP_TEXT = internal("grp")  # the sampled group's text (NULL for the NULL group)
SOURCE_ALIAS = internal("src")
PARAMS_ALIAS = internal("wp")


@dataclass(frozen=True)
class GroupAssignment:
    """Per group: the standardisation and centroids its rows are assigned with.

    ``values``: each group's value as text (None for the NULL group), cast back
    to ``group_type`` in SQL; ``center``, ``inv_scale``, ``weights`` (groups x d)
    and ``centroids`` (one (k_g x d) array per group, in scaled units).  Segment
    ids are the positions 0..k_g-1 within each group, unless ``ids`` gives each
    group's own (a summary store keeps ids stable per group across refreshes).
    """

    column: str
    group_type: str
    values: tuple[str | None, ...]
    center: np.ndarray
    inv_scale: np.ndarray
    weights: np.ndarray
    centroids: tuple[np.ndarray, ...]
    ids: tuple[tuple[int, ...], ...] = ()

    @property
    def most_segments(self) -> int:
        return max(len(c) for c in self.centroids)

    def coefficients(self, g: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """a (K x d), b (K), f (d) of group g: score_i = b_i + sum_j a_ij v_j, ||u||_w^2 = sum_j (f_j v_j)^2,
        v = x - center_g; segments past the group's own get score PADDING_SCORE."""
        a_g, b_g = sqlgen.Assignment(
            tuple(self.center[g]), tuple(self.inv_scale[g]), tuple(self.weights[g]), tuple(map(tuple, self.centroids[g]))
        ).score_coefficients()
        most, d = self.most_segments, self.center.shape[1]
        a, b = np.zeros((most, d)), np.full(most, PADDING_SCORE)
        a[: len(a_g)], b[: len(b_g)] = a_g, b_g
        return a, b, np.abs(self.weights[g] * self.inv_scale[g])


def _names(d: int, k: int) -> dict[str, list]:
    return {
        "id": [internal(f"wid{i}") for i in range(k)],
        "c": [internal(f"wc{j}") for j in range(d)],
        "f": [internal(f"wf{j}") for j in range(d)],
        "s": [internal(f"ws{j}") for j in range(d)],  # the group's 1/scale: refine sums are of v * s
        "a": [[internal(f"wa{i}_{j}") for j in range(d)] for i in range(k)],
        "b": [internal(f"wb{i}") for i in range(k)],
    }


def group_literal(value: str | None, group_type: str, target: TargetLike) -> exp.Expression:
    """A group's value typed as the column: CAST('text' AS type), or a typed NULL."""
    kind = exp.DataType.build(group_type, dialect=target_for(target).name)
    return exp.cast(exp.Null() if value is None else exp.Literal.string(value), kind)


def params_relation(assign: GroupAssignment, target: TargetLike) -> exp.Expression:
    """The inline VALUES relation, one row per group: value, position, centre, norm factors, a, b."""
    d, k = assign.center.shape[1], assign.most_segments
    names = _names(d, k)
    columns = [internal("wg"), internal("wgid"), *names["c"], *names["f"], *names["s"], *[n for row in names["a"] for n in row],
               *names["b"]]
    columns += names["id"] if assign.ids else []
    rows = []
    for g, value in enumerate(assign.values):
        a, b, f = assign.coefficients(g)
        values = [group_literal(value, assign.group_type, target), num(g), *[num(float(c)) for c in assign.center[g]],
                  *[num(float(x)) for x in f], *[num(float(x)) for x in assign.inv_scale[g]], *[num(float(x)) for x in a.ravel()],
                  *[num(float(x)) for x in b]]
        if assign.ids:  # the group's segment id at each position (padding positions never win)
            values += [num(int(i)) for i in (*assign.ids[g], *range(len(assign.ids[g]), k))]
        rows.append(exp.Tuple(expressions=values))
    alias = exp.TableAlias(this=exp.to_identifier(PARAMS_ALIAS, quoted=True),
                           columns=[exp.to_identifier(n, quoted=True) for n in columns])
    return exp.Values(expressions=rows, alias=alias)


def group_predicate(column: str, value: str | None, group_type: str, target: TargetLike) -> exp.Expression:
    """Rows of one group: column = CAST('text' AS type), or column IS NULL (comparisons the engine can skip blocks on)."""
    if value is None:
        return exp.Is(this=col(column), expression=exp.Null())
    return exp.EQ(this=col(column), expression=group_literal(value, group_type, target))


def _aliased_source(source: Source) -> exp.Expression:
    rel = source.relation()
    rel.set("alias", exp.TableAlias(this=exp.to_identifier(SOURCE_ALIAS, quoted=True)))
    return rel


def _same_group(column: str) -> exp.Expression:
    """The join condition: the row's group equals the relation's, NULL matching NULL."""
    return exp.NullSafeEQ(this=col(column, SOURCE_ALIAS), expression=col(internal("wg"), PARAMS_ALIAS))


def assignment_layers(
    source: Source, columns: Sequence[str], assign: GroupAssignment, target: TargetLike, keep_source: bool, fence: bool | None = None,
    only_listed: bool = False,
) -> tuple[exp.Select, str, str, str, list[str]]:
    """Each row's group position and segment within its group (NULL for unusable rows and unknown groups).

    ``only_listed``: rows of groups not in ``assign`` are left out (an inner join) rather than kept with NULL.

    Returns (select, group position column, segment column, the segment's score
    column, centred value columns).  The squared distance is score + sum_j (f_j v_j)^2.
    """
    fence = (not keep_source) if fence is None else fence
    d, k = len(columns), assign.most_segments
    names = _names(d, k)
    v = [internal(f"v{j}") for j in range(d)]
    gid = internal("gid")
    src_cols = [exp.Column(this=exp.Star(), table=exp.to_identifier(SOURCE_ALIAS, quoted=True))] if keep_source else []
    centered = [exp.Sub(this=sqlgen.to_double(col(c, SOURCE_ALIAS)), expression=col(cn, PARAMS_ALIAS)) for c, cn in zip(columns, names["c"])]
    carried = [*names["f"], *names["s"], *[n for row in names["a"] for n in row], *names["b"], *(names["id"] if assign.ids else [])]
    stage1 = (
        exp.select(*src_cols, exp.alias_(col(internal("wgid"), PARAMS_ALIAS), gid, quoted=True),
                   *[exp.alias_(e, n, quoted=True) for e, n in zip(centered, v)],
                   *[col(n, PARAMS_ALIAS) for n in carried])
        .from_(_aliased_source(source))
        .join(params_relation(assign, target), on=_same_group(assign.column), join_type="INNER" if only_listed else "LEFT")
    )
    score = [internal(f"s{i}") for i in range(k)]

    def score_of(i: int) -> exp.Expression:
        return sqlgen.total_sum([col(names["b"][i])] + [exp.Mul(this=col(a), expression=col(vn)) for a, vn in zip(names["a"][i], v)])

    ok = exp.And(this=sqlgen.usable_rows(v, target), expression=exp.Not(this=exp.Is(this=col(gid), expression=exp.Null())))
    stage2 = exp.select(
        exp.Star(), exp.alias_(ok, internal("ok"), quoted=True), *[exp.alias_(score_of(i), score[i], quoted=True) for i in range(k)]
    ).from_(sqlgen.subquery(stage1, internal("a")))
    if fence:
        stage2 = sqlgen.scan_fence(stage2, target)
    best, nearest, seg = internal("best"), internal("nearest"), internal("segment")
    stage3 = sqlgen.nearest_layers(stage2, score, list(range(k)), best, nearest, target, fence)
    chosen: exp.Expression = col(nearest)
    if assign.ids:  # the position's id in the row's group
        chosen = exp.Case(this=col(nearest), ifs=[exp.If(this=num(i), true=col(n)) for i, n in enumerate(names["id"])])
    pick = sqlgen.case_when(col(internal("ok")), chosen)
    stage4 = exp.select(exp.Star(), exp.alias_(pick, seg, quoted=True)).from_(sqlgen.subquery(stage3, internal("n")))
    return stage4, gid, seg, best, v


def _squared_norm(v: Sequence[str], d: int) -> exp.Expression:
    """sum_j (f_j v_j)^2, the factor applied before squaring (see sqlgen._squared_norm)."""
    f = _names(d, 0)["f"]
    return sqlgen.total_sum([sqlgen.square(exp.Mul(this=col(fn), expression=col(vn))) for fn, vn in zip(f, v)])


def refine_statement(source: Source, columns: Sequence[str], assign: GroupAssignment, target: TargetLike) -> exp.Select:
    """One refine pass over the groups in ``assign`` (rows of other groups are left out): GROUP BY (group
    position, segment).

    Returns gid, segment, n, ls0.. (sums of u = (x - center_g) * inv_scale_g, scaled in the SQL) and dist (summed
    squared distances to the centroid used), as ``sqlgen.refine_statement`` does
    for one model.  Groups with segment NULL count skipped rows.
    """
    inner, gid, seg, best, v = assignment_layers(source, columns, assign, target, keep_source=False, only_listed=True)
    aggs = [exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True)]
    scales = _names(len(columns), 0)["s"]
    aggs += [exp.alias_(sqlgen.float_sum(exp.Mul(this=col(n), expression=col(s)), target), f"ls{j}", quoted=True)
             for j, (n, s) in enumerate(zip(v, scales))]
    dist = exp.Add(this=col(best), expression=sqlgen.paren(_squared_norm(v, len(columns))))
    aggs.append(exp.alias_(sqlgen.float_sum(dist, target), "dist", quoted=True))
    return (
        exp.select(exp.alias_(col(gid), "gid", quoted=True), exp.alias_(col(seg), "segment", quoted=True), *aggs)
        .from_(sqlgen.subquery(inner, internal("d")))
        .group_by(col(gid), col(seg))
    )


def label_select(
    source: Source, columns: Sequence[str], source_columns: Sequence[str], assign: GroupAssignment, target: TargetLike,
    materialize: bool = False, segment_name: str = "segment", distance_name: str = "distance",
) -> exp.Select:
    """Every source column (the group column among them) plus the segment within the group and the distance."""
    inner, _gid, seg, best, v = assignment_layers(source, columns, assign, target, keep_source=True, fence=materialize)
    distance = sqlgen.case_when(
        exp.GTE(this=col(seg), expression=num(0)),
        exp.Sqrt(this=sqlgen.greatest_of([exp.Add(this=col(best), expression=_squared_norm(v, len(columns))), num(0.0)])),
    )
    return exp.select(
        *[col(c) for c in source_columns],
        exp.alias_(exp.cast(col(seg), exp.DataType.build("INT")), segment_name, quoted=True),
        exp.alias_(distance, distance_name, quoted=True),
    ).from_(sqlgen.subquery(inner, internal("d")))


def report_rows_select(source: Source, columns: Sequence[str], by: Sequence[str], assign: GroupAssignment, target: TargetLike,
                       stride: int) -> exp.Select:
    """``sqlgen.report_rows_select`` for every group at once: the model's and the breakdown columns, and as the
    segment (internal name) group position * ``stride`` + segment within the group, so one GROUP BY gives every
    group's segments (NULL for skipped rows and groups the model does not know)."""
    inner, gid, seg, _, _ = assignment_layers(source, columns, assign, target, keep_source=True, fence=True)
    keep = list(dict.fromkeys(list(columns) + list(by)))
    combined = exp.Add(this=exp.Mul(this=col(gid), expression=num(int(stride))), expression=col(seg))
    return exp.select(
        *[col(c) for c in keep], exp.alias_(exp.cast(combined, exp.DataType.build("INT")), seg, quoted=True)
    ).from_(sqlgen.subquery(inner, internal("d")))


def group_segment_names_column(select: exp.Select, column: str, group_type: str, segment: str,
                               names: Sequence[tuple[str | None, dict[int, str]]], target: TargetLike,
                               alias: str = "segment_name") -> exp.Select:
    """The label select wrapped to add a text column naming each row's segment within its group (``names``: per
    group value, segment id -> name; NULL where unnamed).  Names are string literals made by sqlglot."""
    ifs = []
    for value, given in names:
        same = group_predicate(column, value, group_type, target)
        for sid, name in sorted(given.items()):
            ifs.append(exp.If(this=exp.and_(same.copy(), exp.EQ(this=col(segment), expression=num(int(sid)))),
                              true=exp.Literal.string(str(name))))
    cased = exp.Case(ifs=ifs) if ifs else exp.cast(exp.Null(), exp.DataType.build("VARCHAR"))
    return exp.select(exp.Star(), exp.alias_(cased, alias, quoted=True)).from_(sqlgen.subquery(select, internal("n")))


def unknown_groups_statement(source: Source, assign: GroupAssignment, target: TargetLike,
                             columns: Sequence[str] = ()) -> exp.Select:
    """Rows whose group the model does not know (a value that appeared after the build): count n.
    With ``columns``, only rows whose values there are all finite (the others are skipped in any group)."""
    unknown = exp.Is(this=col(internal("wgid"), PARAMS_ALIAS), expression=exp.Null())
    finite = [sqlgen.is_finite(exp.cast(col(c), exp.DataType.build("DOUBLE")), target) for c in columns]
    return (
        exp.select(exp.alias_(exp.Count(this=exp.Star()), "n", quoted=True))
        .from_(_aliased_source(source))
        .join(params_relation(assign, target), on=_same_group(assign.column), join_type="LEFT")
        .where(sqlgen.all_of([unknown, *finite]))
    )


def grouped_sample_statement(
    source: Source, columns: Sequence[str], group: str, target: TargetLike, percent: float | None = None,
    method: str = "SYSTEM", seed: int | None = None, text_columns: Sequence[str] = (),
) -> exp.Select:
    """``sqlgen.sample_statement``'s usable rows (its sampling forms, per engine; ``text_columns`` as t0, t1, ...)
    plus each row's group as text (GROUP_TEXT, NULL stays NULL)."""
    outer = sqlgen.sample_statement(source, columns, target, percent=percent, method=method, seed=seed, text_columns=text_columns)
    inner = outer.find(exp.Subquery).this  # the sampled rows, before the usable-row filter
    inner.select(exp.alias_(exp.cast(col(group), exp.DataType.build("VARCHAR")), GROUP_TEXT, quoted=True), copy=False)
    return outer.select(col(GROUP_TEXT), copy=False)


#: The group's key column of a summary store's cells table (``Partitioning.key`` of the group column).
GROUP_KEY = "grp"


def store_cells_statement(
    source: Source, columns: Sequence[str], grid: sqlgen.Grid, target: TargetLike, partition: sqlgen.Partitioning,
    within: str, where: exp.Expression | None = None,
) -> exp.Select:
    """A store's cell pass keyed by (partition, group, cell): part, grp, k0.., n, ls0.., ss0.. .

    The cell pass groups on the raw group value (cheaper than a text per row);
    its key text (``Partitioning.key`` of the group column, the form `segment
    --within` splits its cells by: ``~`` for NULL, else ``len:text``) is built
    once per (partition, group, cell).
    """
    inner = sqlgen.cells_statement(source, columns, grid, target, partition, where=where, extra_keys=[within])
    by_group = sqlgen.Partitioning.of_columns([within])
    raw = by_group.aliases()[0]
    named = exp.select(exp.Star(), exp.alias_(col("q0"), raw, quoted=True)).from_(sqlgen.subquery(inner, internal("g")))
    d = len(columns)
    sums = [col("n"), *[col(f"ls{j}") for j in range(d)], *[col(f"ss{j}") for j in range(d)]]
    return exp.select(
        col("part"), exp.alias_(by_group.key(), GROUP_KEY, quoted=True), *[col(k) for k in grid.key_names()], *sums
    ).from_(sqlgen.subquery(named, internal("h")))
