"""Second-phase segmentation of clustering features, in memory.

Weighted k-means++ (``kmeans``), Ward agglomeration by the nearest-neighbour
chain (``ward``), density-connected grid cells (``density``) and choosing k from
the CFs alone (``choose_k``).

The inputs are cell CFs (thousands, not millions); the cost minimised is the
exact row-level SSE of the cells' points: putting a whole cell at centre c costs
its scatter plus n ||centroid - c||^2, so weighted k-means on the cell centroids
(weights n) plus the constant within-cell scatter is exactly the row-level SSE
of that cell assignment.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import AbstractContextManager, contextmanager, nullcontext
from dataclasses import dataclass

import numpy as np

from . import features as F
from .distances import nearest_rows, sq_distance_blocks, sq_distances, sq_norms
from .features import CF

#: How many one_blas_thread blocks are open: inner ones do nothing (threadpoolctl takes about 1.5 ms a call).
_ONE_THREAD_DEPTH = [0]


@contextmanager
def _counted(limit: AbstractContextManager) -> Iterator[None]:
    with limit:
        _ONE_THREAD_DEPTH[0] += 1
        try:
            yield
        finally:
            _ONE_THREAD_DEPTH[0] -= 1


def one_blas_thread() -> AbstractContextManager:
    """Run BLAS on one thread inside the block (threadpoolctl, when installed); inside another such block, nothing.

    The second phase's products are thin (cells x k x a few columns); on a busy
    2-core box OpenBLAS threads made them 5 to 15 times slower than one thread.
    """
    if _ONE_THREAD_DEPTH[0]:
        return nullcontext()
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - optional
        return nullcontext()
    return _counted(threadpool_limits(1, user_api="blas"))


__all__ = [
    "DensityResult",
    "KChoice",
    "KMeansResult",
    "WARD_ENTRIES",
    "WardResult",
    "choose_k",
    "components",
    "default_min_count",
    "default_radius",
    "density",
    "format_k_table",
    "kmeans",
    "kmeans_plus_plus",
    "nearest",
    "spherical_bic",
    "ward",
]


@dataclass(frozen=True)
class KMeansResult:
    centroids: np.ndarray  # (k, d) in the CFs' own (unweighted) coordinates
    labels: np.ndarray  # (m,) segment of each CF entry
    sse: float  # exact SSE of the points under this entry assignment (weighted space)
    iterations: int
    restarts: int
    moves: int = 0  # relocation moves kept (see _relocate)


def nearest(x: np.ndarray, c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index of and squared distance to the nearest row of c, for each row of x."""
    d = sq_distances(x, c)
    idx = d.argmin(axis=1)
    return idx, d[np.arange(len(x)), idx]


def kmeans_plus_plus(x: np.ndarray, w: np.ndarray, k: int, rng: np.random.Generator) -> np.ndarray:
    """Greedy weighted k-means++ seeding (Arthur and Vassilvitskii 2007).

    Each new centre is the best of 2 + ln(k) candidates drawn with probability
    proportional to weight * squared distance to the nearest chosen centre; every
    candidate is scored on the whole cell set.
    """
    m = len(x)
    trials = 2 + int(np.log(k))
    xn = sq_norms(x)
    first = rng.choice(m, p=w / w.sum())
    centers = [x[first]]
    closest = np.maximum(xn - 2.0 * x @ x[first] + xn[first], 0.0)
    for _ in range(1, k):
        pot = w * closest
        total = pot.sum()
        if total <= 0.0:
            # every point coincides with a centre: any unused point will do
            cand = rng.choice(m, size=trials)
        else:
            cand = np.searchsorted(np.cumsum(pot), rng.random(trials) * total)
            cand = np.minimum(cand, m - 1)
        dist = x[cand] @ x.T
        dist *= -2.0
        dist += xn[None, :]
        dist += xn[cand][:, None]
        np.maximum(dist, 0.0, out=dist)
        np.minimum(dist, closest[None, :], out=dist)
        costs = dist @ w
        best = int(costs.argmin())
        centers.append(x[cand[best]])
        closest = dist[best]
    return np.array(centers)


# Lloyd iterations with Hamerly's bounds (Hamerly 2010, from memory): each cell keeps an
# upper bound u on the distance to its own centre and a lower bound l on the distance to
# any other centre; a cell whose u is below max(l, half the gap from its centre to the
# nearest other centre) cannot change centre, so only the others get distances computed.
def _two_nearest(x: np.ndarray, c: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Nearest centre, distance to it and distance to the second nearest (inf when k = 1)."""
    d = sq_distances(x, c)
    rows = np.arange(len(x))
    first = d.argmin(axis=1)
    best = d[rows, first]
    if c.shape[0] == 1:
        return first, np.sqrt(best), np.full(len(x), np.inf)
    d[rows, first] = np.inf
    return first, np.sqrt(best), np.sqrt(d.min(axis=1))


def _means(xw: np.ndarray, w: np.ndarray, labels: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Weight and weighted sum of each group (k,), (k, d)."""
    mass = np.bincount(labels, weights=w, minlength=k)
    sums = np.empty((k, xw.shape[1]))
    for j in range(xw.shape[1]):  # loop over columns (at most a few dozen), not cells
        sums[:, j] = np.bincount(labels, weights=xw[:, j], minlength=k)
    return mass, sums


def _cost(x: np.ndarray, w: np.ndarray, centers: np.ndarray, labels: np.ndarray) -> float:
    """Weighted SSE of the cells' centroids around their assigned centres (direct differences)."""
    gap = x - centers[labels]
    return float(w @ np.einsum("ij,ij->i", gap, gap))


def _lloyd(
    x: np.ndarray, w: np.ndarray, centers: np.ndarray, max_iter: int, tol: float
) -> tuple[np.ndarray, np.ndarray, float, int]:
    """Weighted Lloyd iterations from the given centres, with Hamerly's bounds.

    Stops when no cell changes centre, after ``max_iter`` iterations, or when an
    iteration lowers the cost by at most ``tol`` (relative).  Per-segment weight,
    sums and square sums are updated from the cells that moved only, so an
    iteration costs O(moved cells x k) plus a few O(cells) bound updates.
    Returns the centres (means of their cells), labels, cost and iterations.
    """
    k = centers.shape[0]
    xw = x * w[:, None]
    sq = w * sq_norms(x)
    labels, upper, lower = _two_nearest(x, centers)
    mass, sums = _means(xw, w, labels, k)
    s2 = np.bincount(labels, weights=sq, minlength=k)
    cost = np.inf
    it = 0
    for it in range(1, max_iter + 1):
        empty = np.flatnonzero(mass <= 0)
        if empty.size:
            # reseat an empty centre on the cells that cost most, then assign afresh
            new = sums / np.where(mass > 0, mass, 1.0)[:, None]
            new[empty] = x[np.argsort(-(w * upper * upper))[: empty.size]]
            centers = new
            labels, upper, lower = _two_nearest(x, centers)
            mass, sums = _means(xw, w, labels, k)
            s2 = np.bincount(labels, weights=sq, minlength=k)
            cost = np.inf
            continue
        new = sums / mass[:, None]
        # cost of the current labels around their means, from the per-segment sums (a stopping test only)
        new_cost = float((s2 - sq_norms(sums) / mass).sum())
        drift = np.sqrt(sq_norms(new - centers))
        centers = new
        if cost - new_cost <= tol * abs(new_cost):
            break
        cost = new_cost
        upper += drift[labels]
        if k > 1:
            top = np.argpartition(-drift, 1)[:2]
            d1, d2 = drift[top[0]], drift[top[1]]
            if d1 < d2:
                top, d1, d2 = top[::-1], d2, d1
            lower -= np.where(labels == top[0], d2, d1)
            gaps = sq_distances(centers, centers)
            np.fill_diagonal(gaps, np.inf)
            bound = np.maximum(lower, 0.5 * np.sqrt(gaps.min(axis=1))[labels])
        else:
            bound = np.full(len(x), np.inf)
        check = np.flatnonzero(upper > bound)
        if check.size:
            gap = x[check] - centers[labels[check]]
            upper[check] = np.sqrt(np.einsum("ij,ij->i", gap, gap))
            check = check[upper[check] > bound[check]]
        if check.size == 0:
            break
        lab, up, low = _two_nearest(x[check], centers)
        upper[check], lower[check] = up, low
        moved = lab != labels[check]
        if not moved.any():
            break
        idx, src, dst = check[moved], labels[check][moved], lab[moved]
        labels[idx] = dst
        for grp, sign in ((src, -1.0), (dst, 1.0)):
            mass += sign * np.bincount(grp, weights=w[idx], minlength=k)
            s2 += sign * np.bincount(grp, weights=sq[idx], minlength=k)
            for j in range(x.shape[1]):  # loop over columns, not cells
                sums[:, j] += sign * np.bincount(grp, weights=xw[idx, j], minlength=k)
    mass, sums = _means(xw, w, labels, k)
    centers = np.where(mass[:, None] > 0, sums / np.where(mass > 0, mass, 1.0)[:, None], centers)
    return centers, labels, _cost(x, w, centers, labels), it

def _split_all(x: np.ndarray, w: np.ndarray, labels: np.ndarray, k: int, rounds: int = 4
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Split every group of cells in two at once: cut across its principal axis at the mean,
    then a few 2-means rounds inside the group.  Returns the SSE drop (k,) and the two centres
    (k, d) each, in the cells' coordinates; a group of fewer than 2 cells or no scatter gains 0.

    All groups advance together (cells sorted by group, sums per group by one reduceat),
    so a round costs a few passes over the cells whatever k is; a group whose cut leaves
    one side empty stops where it is, as a lone two-means run would.
    """
    d = x.shape[1]
    order = np.argsort(labels, kind="stable")
    count = np.bincount(labels, minlength=k)
    bounds = np.concatenate([[0], np.cumsum(count)])
    filled = np.flatnonzero(count > 0)
    xs, ws = x[order], w[order]

    def per_group(v: np.ndarray) -> np.ndarray:
        out = np.zeros((k, *v.shape[1:]))
        out[filled] = np.add.reduceat(v, bounds[filled], axis=0)
        return out

    def spread(v: np.ndarray) -> np.ndarray:
        return np.repeat(v, count, axis=0)

    mass = per_group(ws)
    xws = xs * ws[:, None]
    sums = per_group(xws)
    mean = sums / np.where(mass > 0, mass, 1.0)[:, None]
    gap = xs - spread(mean)
    before = per_group(ws * sq_norms(gap))
    valid = (count >= 2) & (before > 0.0)
    cov = np.zeros((k, d, d))
    for j in np.flatnonzero(valid):
        g = gap[bounds[j]:bounds[j + 1]]
        cov[j] = (g * ws[bounds[j]:bounds[j + 1], None]).T @ g
    axis = np.linalg.eigh(cov)[1][:, :, -1]
    side = np.einsum("ij,ij->i", gap, spread(axis)) > 0
    ca, cb, after = mean.copy(), mean.copy(), before.copy()
    active = valid.copy()
    for _ in range(rounds):
        na = per_group(side.astype(np.float64))
        active &= (na > 0) & (na < count)
        if not active.any():
            break
        wa = per_group(ws * side)
        sa = per_group(xws * side[:, None])
        ca[active] = sa[active] / wa[active, None]
        cb[active] = (sums[active] - sa[active]) / (mass[active] - wa[active])[:, None]
        da = sq_norms(xs - spread(ca))
        db = sq_norms(xs - spread(cb))
        side = np.where(spread(active), da < db, side)
        after = np.where(active, per_group(ws * np.minimum(da, db)), after)
    gain = np.where(valid, np.maximum(before - after, 0.0), 0.0)
    return gain, ca, cb


def _split_two(x: np.ndarray, w: np.ndarray, rounds: int = 4) -> tuple[float, np.ndarray, np.ndarray]:
    """Split one group of cells in two: cut across its principal axis at the mean, then a
    few 2-means rounds.  Returns (SSE drop, centre a, centre b) in the cells' coordinates."""
    mass = w.sum()
    mean = w @ x / mass
    gap = x - mean
    before = float(w @ np.einsum("ij,ij->i", gap, gap))
    if x.shape[0] < 2 or before <= 0.0:
        return 0.0, mean, mean
    cov = (gap * w[:, None]).T @ gap
    axis = np.linalg.eigh(cov)[1][:, -1]
    side = gap @ axis > 0
    after = before
    c = np.stack([mean, mean])
    for _ in range(rounds):
        wa = w[side].sum()
        if wa <= 0.0 or wa >= mass:
            break
        c = np.stack([w[side] @ x[side] / wa, w[~side] @ x[~side] / (mass - wa)])
        d = sq_distances(x, c)
        side = d[:, 0] < d[:, 1]
        after = float(w @ d.min(axis=1))
    return max(before - after, 0.0), c[0], c[1]


#: Mean cells per segment above which segments are split one by one (their products are long
#: enough to beat the vectorised pass's whole-array steps).  Measured on a loaded box: the
#: pass is 2-5x faster at 60-170 cells per segment, even at 200 (8 columns), 2x slower at 1,700.
SPLIT_ONE_BY_ONE_ABOVE = 400


def _splits(x: np.ndarray, w: np.ndarray, labels: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Two-way split of every segment: SSE drop (k,) and the two centres (k, d) each."""
    if len(x) <= SPLIT_ONE_BY_ONE_ABOVE * k:
        return _split_all(x, w, labels, k)
    order = np.argsort(labels, kind="stable")
    bounds = np.searchsorted(labels[order], np.arange(k + 1))
    got = [_split_two(x[order[bounds[j]:bounds[j + 1]]], w[order[bounds[j]:bounds[j + 1]]]) for j in range(k)]
    return np.array([g[0] for g in got]), np.array([g[1] for g in got]), np.array([g[2] for g in got])


RELOCATE_PAIRS = 3  # cheapest merges tried per move
RELOCATE_SPLITS = 3  # largest splits tried per move
RELOCATE_MOVES = 200  # at most this many accepted moves


def _relocate(
    x: np.ndarray, w: np.ndarray, centers: np.ndarray, labels: np.ndarray, cost: float, max_iter: int,
    tick: Callable[[str], None],
) -> tuple[np.ndarray, np.ndarray, float, int]:
    """Move centres from where they are least needed to where they are most needed.

    One move merges the two segments whose Ward merge cost n_a n_b / (n_a + n_b)
    |c_a - c_b|^2 is smallest (the exact SSE growth of giving both one centre) and
    splits the segment whose two-way split lowers the SSE most, when that split gain
    exceeds the merge cost; Lloyd iterations then settle every centre, and the move is
    kept only when the exact cost drops.  Repeated until no tried move helps.
    Returns centres, labels, cost and the number of accepted moves.
    """
    k = centers.shape[0]
    if k < 3:
        return centers, labels, cost, 0
    accepted = 0
    while accepted < RELOCATE_MOVES:
        mass = np.bincount(labels, weights=w, minlength=k)
        gaps = sq_distances(centers, centers)
        merge = mass[:, None] * mass[None, :] / np.maximum(mass[:, None] + mass[None, :], 1e-300) * gaps
        merge[np.tril_indices(k)] = np.inf
        gain, split_a, split_b = _splits(x, w, labels, k)
        flat = np.argsort(merge, axis=None)[:RELOCATE_PAIRS]
        frees = [(*divmod(int(f), k), merge.flat[f]) for f in flat]
        by_gain = np.argsort(-gain)
        better = False
        for a, b, price in frees:
            tried = 0
            for c in by_gain:
                if c in (a, b):
                    continue
                if gain[c] <= price or tried >= RELOCATE_SPLITS:
                    break
                tried += 1
                trial = centers.copy()
                trial[a] = (mass[a] * centers[a] + mass[b] * centers[b]) / (mass[a] + mass[b])
                trial[b], trial[c] = split_a[c], split_b[c]
                got = _lloyd(x, w, trial, max_iter, 0.0)
                if got[2] < cost * (1.0 - 1e-12):
                    centers, labels, cost = got[0], got[1], got[2]
                    better = True
                    break
            if better:
                break
        if not better:
            break
        accepted += 1
        tick(f"relocation move {accepted}: cell SSE {cost:.6g}")
    return centers, labels, cost, accepted


BRIEF_ITER = 5  # Lloyd iterations given to each restart before the best is finished
BRIEF_TOL = 1e-3  # ... or until an iteration gains less than this share of the cost
PROGRESS_EVERY = 1.0  # seconds between progress lines of a long run
FINISH = 5  # restarts finished (exact Lloyd convergence) ...
RELOCATE_STARTS = 3  # ... of which the cheapest this many get relocation moves;
FINISH_ALL_BELOW = 20_000  # every restart gets both when cells x k is at most this (they are cheap) ...
FINISH_GAP = 0.05  # ... if its brief cost is within 5% of the best one's, and relocation if its finished cost is
RELOCATE_GAP = 0.05  # within 5% of the best finished one's: on the 50 groups of bench_within.py the runs further
#                      off never won, and skipping them took the groups' k-means from 1.0 to 0.55 CPU s


#: Restarts of a small cell set (cells x k x restarts at most this) are seeded and given their brief Lloyd
#: iterations together, as arrays over the restarts: on a few hundred cells (the groups of --within) numpy's
#: per-call cost, not arithmetic, was most of the time (10 restarts on 200 cells: 9.8 -> 1.9 ms).  Twice the
#: restarts are drawn, since together they cost less than the loop's: with n_init only, one bundled real data
#: set (breast cancer, k = 8) ended 0.21% above scikit-learn's KMeans(n_init=10) (the test allows 0.2%).
BATCH_RESTARTS_BELOW = 400_000


def _seeds_together(x: np.ndarray, w: np.ndarray, k: int, r: int, rng: np.random.Generator) -> np.ndarray:
    """``kmeans_plus_plus`` for r restarts at once (r x k x d): the same greedy rule, each restart its own draws."""
    m = len(x)
    trials = 2 + int(np.log(k))
    xn = sq_norms(x)
    rows = np.arange(r)
    first = rng.choice(m, size=r, p=w / w.sum())
    centers = np.empty((r, k, x.shape[1]))
    centers[:, 0] = x[first]
    closest = np.maximum(xn[None, :] - 2.0 * (x[first] @ x.T) + xn[first][:, None], 0.0)  # (r, m)
    for c in range(1, k):
        pot = w[None, :] * closest
        total = pot.sum(axis=1)
        draws = rng.random((r, trials)) * total[:, None]
        cand = np.minimum((np.cumsum(pot, axis=1)[:, None, :] < draws[:, :, None]).sum(axis=2), m - 1)  # searchsorted, per restart
        spent = total <= 0.0  # every point coincides with a centre: any point will do
        if spent.any():
            cand[spent] = rng.integers(0, m, size=(int(spent.sum()), trials))
        xc = x[cand]  # (r, trials, d)
        dist = xn[cand][:, :, None] + xn[None, None, :] - 2.0 * (xc @ x.T)
        np.maximum(dist, 0.0, out=dist)
        np.minimum(dist, closest[:, None, :], out=dist)
        best = (dist @ w).argmin(axis=1)
        centers[:, c] = xc[rows, best]
        closest = dist[rows, best]
    return centers


def _brief_restarts_together(x: np.ndarray, w: np.ndarray, k: int, r: int, rng: np.random.Generator
                             ) -> list[tuple[np.ndarray, np.ndarray, float, int]]:
    """r restarts seeded by k-means++ and given BRIEF_ITER plain Lloyd iterations, as arrays over the restarts.

    Returns what ``_lloyd`` returns for each: centres (means of their cells; an empty
    segment keeps its centre), labels, cost and iterations.  A restart whose
    iteration gained at most BRIEF_TOL stops there, as in ``_lloyd``.
    """
    centers = _seeds_together(x, w, k, r, rng)
    xn = sq_norms(x)
    offset = (np.arange(r) * k)[:, None]
    xw = x * w[:, None]
    active = np.ones(r, dtype=bool)
    cost = np.full(r, np.inf)
    iters = np.zeros(r, dtype=np.int64)
    labels = np.zeros((r, len(x)), dtype=np.int64)
    for _ in range(BRIEF_ITER + 1):
        live = np.flatnonzero(active)
        if live.size == 0:
            break
        c = centers[live]
        lab = (sq_norms(c.reshape(-1, x.shape[1])).reshape(len(live), k)[:, None, :] - 2.0 * (x @ c.transpose(0, 2, 1))).argmin(axis=2)
        flat = (lab + offset[: len(live)]).ravel()
        mass = np.bincount(flat, weights=np.tile(w, len(live)), minlength=len(live) * k).reshape(len(live), k)
        sums = np.stack([np.bincount(flat, weights=np.tile(xw[:, j], len(live)), minlength=len(live) * k)
                         for j in range(x.shape[1])], axis=1).reshape(len(live), k, x.shape[1])
        filled = mass > 0
        new = np.where(filled[:, :, None], sums / np.where(filled, mass, 1.0)[:, :, None], c)
        new_cost = (w * xn).sum() - (sq_norms(sums.reshape(-1, x.shape[1])).reshape(len(live), k) / np.where(filled, mass, 1.0)).sum(axis=1)
        settled = (lab == labels[live]).all(axis=1) | (cost[live] - new_cost <= BRIEF_TOL * np.abs(new_cost))
        centers[live], labels[live], cost[live] = new, lab, new_cost
        iters[live] += 1
        active[live[settled | (iters[live] >= BRIEF_ITER)]] = False
    out = []
    for i in range(r):
        gap = x - centers[i][labels[i]]
        out.append((centers[i], labels[i], float(w @ np.einsum("ij,ij->i", gap, gap)), int(iters[i])))
    return out


class _Ticker:
    """Calls ``progress`` at most once a second (and never before the first second)."""

    def __init__(self, progress: Callable[[str], None] | None) -> None:
        self.progress, self.every = progress, PROGRESS_EVERY
        self.last = time.perf_counter()

    def __call__(self, message: str) -> None:
        now = time.perf_counter()
        if self.progress is not None and now - self.last >= self.every:
            self.progress(message)
            self.last = now


def _partition_key(labels: np.ndarray) -> bytes:
    """The partition of the cells, whatever the segment numbering: labels renumbered by first appearance."""
    _, first = np.unique(labels, return_index=True)
    rank = np.empty(int(labels.max()) + 1, dtype=np.int64)
    rank[labels[np.sort(first)]] = np.arange(first.size)
    return rank[labels].tobytes()


def _distinct(runs: list) -> list:
    """The runs (centres, labels, ...) with the first of each distinct cell partition kept, order kept.

    Lloyd iterations and relocation moves depend only on the partition they start from
    (centres are its means), so a restart that landed on a partition already kept would
    end where that one ends: finishing or relocating it again is wasted work (on small
    cell sets most restarts meet one of a handful of partitions).
    """
    seen: set[bytes] = set()
    out = []
    for got in runs:
        key = _partition_key(got[1])
        if key not in seen:
            seen.add(key)
            out.append(got)
    return out


def kmeans(
    cells: CF,
    k: int,
    weights: np.ndarray | None = None,
    n_init: int = 10,
    max_iter: int = 300,
    tol: float = 0.0,
    seed: int = 0,
    init: np.ndarray | None = None,
    progress: Callable[[str], None] | None = None,
    relocate: bool = True,
) -> KMeansResult:
    """Weighted k-means++ with restarts on CF entries, minimising the exact SSE.

    ``weights`` multiplies each column (the distance is sum_j w_j^2 (u_j - c_j)^2).
    ``init`` (k x d, unweighted coordinates) warm-starts a single run instead.
    Each restart is seeded by greedy k-means++ and given a few Lloyd iterations
    (BRIEF_ITER, BRIEF_TOL); the FINISH cheapest are run to convergence (no cell
    changes centre, or a gain below ``tol``) and the RELOCATE_STARTS cheapest of
    those improved by relocation moves (``_relocate``).  ``progress`` receives a line now and then on long runs.
    """
    with one_blas_thread():
        return _kmeans(cells, k, weights, n_init, max_iter, tol, seed, init, progress, relocate)


def _kmeans(cells: CF, k: int, weights: np.ndarray | None, n_init: int, max_iter: int, tol: float, seed: int,
            init: np.ndarray | None, progress: Callable[[str], None] | None, relocate: bool) -> KMeansResult:
    keep = cells.n > 0
    if int(keep.sum()) < k:
        raise ValueError(f"k={k} is larger than the {int(keep.sum())} non-empty cells")
    cells = cells[keep]
    w_col = np.ones(cells.d) if weights is None else np.asarray(weights, dtype=np.float64)
    x = F.centroids(cells) * w_col[None, :]
    mass = cells.n
    within = F.sse(cells, w_col)
    tick = _Ticker(progress)
    if init is not None:
        starts = [np.asarray(init, dtype=np.float64) * w_col[None, :]]
    else:
        rng = np.random.default_rng(seed)  # only seeding draws (a warm start need not import numpy.random)
        if len(x) * k * 2 * max(1, n_init) <= BATCH_RESTARTS_BELOW:
            brief = _brief_restarts_together(x, mass, k, 2 * max(1, n_init), rng)
            for r, got in enumerate(brief):
                tick(f"k={k}: restart {r + 1} of {len(brief)}, cell SSE {got[2] + within:.6g}")
        else:
            brief = []
            for r in range(max(1, n_init)):
                got = _lloyd(x, mass, kmeans_plus_plus(x, mass, k, rng), BRIEF_ITER, BRIEF_TOL)
                brief.append(got)
                tick(f"k={k}: restart {r + 1} of {n_init}, cell SSE {got[2] + within:.6g}")
        brief.sort(key=lambda got: got[2])
        if len(x) * k <= FINISH_ALL_BELOW:
            chosen = [got for got in brief if got[2] <= brief[0][2] * (1.0 + FINISH_GAP)]
        else:
            chosen = brief[:FINISH]
        starts = [got[0] for got in _distinct(chosen)]
    finished = sorted((_lloyd(x, mass, centers, max_iter, tol) for centers in starts), key=lambda got: got[2])
    best: tuple[np.ndarray, np.ndarray, float, int] = finished[0]
    moves = 0
    small = len(x) * k <= FINISH_ALL_BELOW
    relocated = [got for got in finished if got[2] <= finished[0][2] * (1.0 + RELOCATE_GAP)] if small else finished[:RELOCATE_STARTS]
    for got in _distinct(relocated if relocate else []):
        c, lab, cost, mv = _relocate(x, mass, got[0], got[1], got[2], max_iter, tick)
        if cost < best[2]:
            best, moves = (c, lab, cost, got[3]), mv
    _, labels, cost, iters = best
    per_segment = F.group_sum(cells, labels, k)
    cents = F.centroids(per_segment)
    full_labels = np.full(len(keep), -1, dtype=np.int64)
    full_labels[keep] = labels
    return KMeansResult(centroids=cents, labels=full_labels, sse=cost + within, iterations=iters,
                        restarts=len(starts) if init is not None else max(1, n_init), moves=moves)


# --------------------------------------------------------------------- shared
def _column_weights(cells: CF, weights: np.ndarray | None) -> np.ndarray:
    """Column multipliers as a float array of length d (ones when None)."""
    if weights is None:
        return np.ones(cells.d)
    w = np.asarray(weights, dtype=np.float64).reshape(-1)
    if w.shape[0] != cells.d:
        raise ValueError(f"{w.shape[0]} weights for {cells.d} columns")
    return w


def components(m: int, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Connected components of the graph on 0..m-1 with edges (a[i], b[i]).

    Vectorised hook-and-shortcut: every root hooks onto the smallest root it is
    joined to, then pointers jump until each points at a root; repeated until no
    edge joins two roots.  Labels are 0..c-1 in order of each component's
    smallest vertex.
    """
    parent = np.arange(m)
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    while a.size:
        pa, pb = parent[a], parent[b]
        join = pa != pb
        if not join.any():
            break
        np.minimum.at(parent, np.maximum(pa, pb)[join], np.minimum(pa, pb)[join])
        while True:
            up = parent[parent]
            if np.array_equal(up, parent):
                break
            parent = up
    return np.unique(parent, return_inverse=True)[1].reshape(-1)


def _relabel_by_size(labels: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Renumber labels >= 0 so that segment 0 holds the most points (ties: first seen)."""
    keep = labels >= 0
    if not keep.any():
        return labels
    k = int(labels[keep].max()) + 1
    mass = np.bincount(labels[keep], weights=counts[keep], minlength=k)
    first = np.full(k, labels.shape[0])
    np.minimum.at(first, labels[keep], np.flatnonzero(keep))
    order = np.lexsort((first, -mass))
    new = np.empty(k, dtype=np.int64)
    new[order] = np.arange(k)
    out = labels.copy()
    out[keep] = new[labels[keep]]
    return out


# ----------------------------------------------------------------------- Ward
# Ward by the nearest-neighbour chain takes O(m^2) time: 0.15 s CPU for 2,000 entries,
# 0.56 s for 4,000, 1.6 s for 8,000 (measured on a 2-core box, grid-pattern cells).
# Above this many entries the pipeline first condenses them with the CF tree, which
# is what the BIRCH paper does before its global clustering phase.
WARD_ENTRIES = 4000
@dataclass(frozen=True)
class WardResult:
    """Ward agglomeration of CF entries cut into k segments.

    labels: (m,) segment of each entry, -1 for empty entries (n = 0); segment 0
        holds the most points.
    centroids: (k, d) segment centroids in the CFs' own (unweighted) coordinates.
    sse: exact SSE of the points under this cut (weighted space), within-entry
        scatter included.
    heights: (m'-1,) all merge heights in increasing order, m' the non-empty
        entries; height = sqrt(2 * Ward merge cost), which is scipy's ward linkage
        height (checked against scipy.cluster.hierarchy.linkage in the tests).
    merges: (m'-1, 4) the dendrogram in merge order: the two clusters joined
        (entries are 0..m'-1 in the order of the non-empty entries, the cluster
        made by merge t is m'+t), the height and the cluster's point count.
    """

    labels: np.ndarray
    centroids: np.ndarray
    sse: float
    heights: np.ndarray
    merges: np.ndarray


def _nn_chain(x: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """All merges of Ward agglomeration by the nearest-neighbour chain (O(m) memory).

    x: weighted centroids, n: counts.  Returns pairs (m-1, 2) of representative
    entries (the merged cluster keeps the smaller representative) and the exact
    merge costs n_a n_b / (n_a + n_b) |c_a - c_b|^2, in the order found.
    Ward's cost is reducible, so reciprocal nearest neighbours may merge in any
    order and sorting by cost gives the greedy agglomeration.
    """
    m = x.shape[0]
    pos_x, pos_n = x.copy(), n.astype(np.float64).copy()
    ids = np.arange(m)  # representative entry of each position
    dead = np.zeros(m)  # +inf at merged-away positions
    pairs = np.empty((max(m - 1, 0), 2), dtype=np.int64)
    costs = np.empty(max(m - 1, 0))
    chain: list[int] = []
    done, n_dead = 0, 0
    while done < m - 1:
        if not chain:
            chain.append(int(np.flatnonzero(dead == 0)[0]))
        i = chain[-1]
        gap = pos_x - pos_x[i]
        cost = pos_n * pos_n[i] / (pos_n + pos_n[i]) * sq_norms(gap) + dead
        cost[i] = np.inf
        j = int(cost.argmin())
        prev = chain[-2] if len(chain) > 1 else -1
        if prev >= 0 and cost[prev] <= cost[j]:
            j = prev
        if j != prev:
            chain.append(j)
            continue
        chain.pop()
        chain.pop()
        keep, drop = (i, j) if ids[i] < ids[j] else (j, i)
        pairs[done] = ids[keep], ids[drop]
        costs[done] = cost[j]
        total = pos_n[i] + pos_n[j]
        pos_x[keep] = (pos_n[i] * pos_x[i] + pos_n[j] * pos_x[j]) / total
        pos_n[keep] = total
        dead[drop], pos_x[drop], pos_n[drop] = np.inf, 0.0, 1.0
        done += 1
        n_dead += 1
        if n_dead > 64 and 2 * n_dead > pos_n.shape[0]:
            live = np.flatnonzero(dead == 0)
            where = np.full(pos_n.shape[0], -1, dtype=np.int64)
            where[live] = np.arange(live.shape[0])
            pos_x, pos_n, ids, dead = pos_x[live], pos_n[live], ids[live], dead[live]
            chain = [int(where[c]) for c in chain]
            n_dead = 0
    return pairs, costs


def _dendrogram(pairs: np.ndarray, costs: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Merges sorted by cost, numbered like a dendrogram: rows (a, b, height, count)."""
    m = n.shape[0]
    order = np.argsort(costs, kind="stable")
    root = np.arange(m)  # union-find over representatives
    cluster = np.arange(m)  # current cluster number of each root
    size = n.astype(np.float64).copy()

    def find(v: int) -> int:
        while root[v] != v:
            root[v] = root[root[v]]
            v = root[v]
        return v

    out = np.empty((order.shape[0], 4))
    for t, idx in enumerate(order):  # one step per merge of entries (not per row)
        ra, rb = find(int(pairs[idx, 0])), find(int(pairs[idx, 1]))
        ca, cb = cluster[ra], cluster[rb]
        root[rb] = ra
        size[ra] += size[rb]
        cluster[ra] = m + t
        out[t] = min(ca, cb), max(ca, cb), np.sqrt(2.0 * max(costs[idx], 0.0)), size[ra]
    return out


def ward(cfs: CF, k: int, weights: np.ndarray | None = None) -> WardResult:
    """Ward agglomeration of CF entries (exact merge cost), cut into k segments.

    The cost of merging clusters A and B is features.ward_cost: the growth of the
    SSE, n_A n_B / (n_A + n_B) |c_A - c_B|^2 in the weighted space.  Found by the
    nearest-neighbour chain: O(m^2) time, O(m) memory.
    """
    w = _column_weights(cfs, weights)
    keep = cfs.n > 0
    m = int(keep.sum())
    if not 1 <= k <= m:
        raise ValueError(f"k={k} must be between 1 and the {m} non-empty entries")
    cells = cfs[np.flatnonzero(keep)]
    pairs, costs = _nn_chain(F.centroids(cells) * w[None, :], cells.n)
    merges = _dendrogram(pairs, costs, cells.n)
    first = np.argsort(costs, kind="stable")[: m - k]
    labels = components(m, pairs[first, 0], pairs[first, 1])
    labels = _relabel_by_size(labels, cells.n)
    segments = F.group_sum(cells, labels, k)
    full = np.full(cfs.m, -1, dtype=np.int64)
    full[keep] = labels
    return WardResult(labels=full, centroids=F.centroids(segments), sse=F.sse(segments, w),
                      heights=merges[:, 2].copy(), merges=merges)


# -------------------------------------------------------------------- density
@dataclass(frozen=True)
class DensityResult:
    """Density-connected cells.

    labels: (m,) segment of each cell, -1 for noise (or empty cells); segment 0
        holds the most points.
    n_segments: number of segments; min_count: the density cut used;
    dense: (m,) True for cells with n >= min_count;
    centroids: (n_segments, d) unweighted; counts: points per segment
    (attached sparse cells included);
    radius: the joining distance with adjacency="distance", else None.
    """

    labels: np.ndarray
    n_segments: int
    min_count: float
    dense: np.ndarray
    centroids: np.ndarray
    counts: np.ndarray
    radius: float | None


MIN_COUNT_SHARE = 0.1  # the default density cut, as a share of the typical cell count


def default_min_count(n: np.ndarray) -> float:
    """Density cut when none is given (rule in ``density``'s docstring)."""
    n = n[n > 0]
    if n.size == 0:
        return 1.0
    typical = float((n * n).sum() / n.sum())  # the count of the cell an average point sits in
    return max(2.0, MIN_COUNT_SHARE * typical)


def _face_pairs(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pairs of rows whose integer keys differ by 1 in exactly one axis.

    For each axis, sort rows by the other axes and then this one; neighbours
    along the axis are then consecutive rows.  No hashing, no overflow.
    """
    m, p = keys.shape
    out_a, out_b = [], []
    for axis in range(p):  # loop over grid axes, not rows
        others = [keys[:, j] for j in range(p) if j != axis]
        order = np.lexsort([keys[:, axis]] + others[::-1])
        k = keys[order]
        same = np.ones(m - 1, dtype=bool) if m > 1 else np.zeros(0, dtype=bool)
        for j in range(p):
            if j != axis:
                same &= k[1:, j] == k[:-1, j]
        step = same & (k[1:, axis] - k[:-1, axis] == 1)
        out_a.append(order[:-1][step])
        out_b.append(order[1:][step])
    if not out_a:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    return np.concatenate(out_a), np.concatenate(out_b)


def _near_pairs(x: np.ndarray, radius: float, chunk: int = 1024) -> tuple[np.ndarray, np.ndarray]:
    """Pairs (i < j) of rows within ``radius`` of each other (chunked, O(m^2) time)."""
    out_a, out_b = [], []
    for lo, _, g in sq_distance_blocks(x, chunk=chunk):
        i, j = np.nonzero(g <= radius * radius)
        i = i + lo
        up = i < j
        out_a.append(i[up])
        out_b.append(j[up])
    return np.concatenate(out_a), np.concatenate(out_b)


def default_radius(x: np.ndarray) -> float:
    """Joining distance for adjacency="distance": 1.5 x the median distance from a
    dense cell's centroid to its nearest other dense cell's centroid."""
    if x.shape[0] < 2:
        return 0.0
    near = np.empty(x.shape[0])
    for lo, hi, g in sq_distance_blocks(x, skip_self=True):
        near[lo:hi] = g.min(axis=1)
    return 1.5 * float(np.sqrt(np.median(near)))


def density(cfs: CF, keys: np.ndarray, *, min_count: float | None = None, adjacency: str = "face",
            radius: float | None = None, noise: str = "drop", weights: np.ndarray | None = None,
            min_share: float = 0.001) -> DensityResult:
    """Join dense grid cells that touch into segments (connected components).

    keys: (m, p) integer grid key of each cell (one index per axis).  A cell is
    dense when n >= min_count.  Dense cells are joined when they share a face
    (keys differ by 1 in exactly one axis), or with adjacency="distance" when
    their centroids lie within ``radius`` (weighted space).  Components holding
    less than ``min_share`` of the dense cells' points are not segments: their
    cells count as sparse.  Sparse cells are noise (label -1, noise="drop") or
    join the segment of the nearest dense cell by centroid distance
    (noise="attach").

    Rules for the defaults: ``min_count`` = max(2, 0.1 x the count-weighted mean
    cell count sum n^2 / sum n, i.e. a tenth of the count of the cell an average
    point sits in); ``radius`` = 1.5 x the median nearest-neighbour distance
    between dense cell centroids.  Both are ours.  Measured on make_moons and
    make_circles (200,000 rows, 1,100 to 5,900 cells, with and without 2%
    uniform background rows): shares of 0.05 to 0.2 all gave ARI 1.0 with
    noise="attach"; without ``min_share`` specks of a few cells made 3 to 33
    extra segments.
    """
    if adjacency not in ("face", "distance"):
        raise ValueError(f"adjacency must be 'face' or 'distance', not {adjacency!r}")
    if noise not in ("drop", "attach"):
        raise ValueError(f"noise must be 'drop' or 'attach', not {noise!r}")
    w = _column_weights(cfs, weights)
    keys = np.asarray(keys)
    if keys.ndim == 1:
        keys = keys[:, None]
    if keys.shape[0] != cfs.m:
        raise ValueError(f"{keys.shape[0]} key rows for {cfs.m} cells")
    int_keys = np.rint(keys).astype(np.int64)
    if not np.array_equal(int_keys, keys):
        raise ValueError("grid keys must be integers")
    cut = default_min_count(cfs.n) if min_count is None else float(min_count)
    dense = (cfs.n >= cut) & (cfs.n > 0)
    idx = np.flatnonzero(dense)
    x = F.centroids(cfs)
    if idx.size:  # centre on the dense cells' mean so the distance expansions do not cancel
        x = x - F.centroids(F.total(cfs[idx]))[0]
    x = x * w[None, :]
    used_radius = None
    if adjacency == "face":
        a, b = _face_pairs(int_keys[idx])
    else:
        used_radius = default_radius(x[idx]) if radius is None else float(radius)
        a, b = _near_pairs(x[idx], used_radius)
    comp = components(idx.shape[0], a, b)
    labels = np.full(cfs.m, -1, dtype=np.int64)
    if idx.size:
        mass = np.bincount(comp, weights=cfs.n[idx])
        big = mass >= min_share * mass.sum()
        renum = np.cumsum(big) - 1
        labels[idx] = np.where(big[comp], renum[comp], -1)
    if noise == "attach":
        core = np.flatnonzero(labels >= 0)
        loose = np.flatnonzero((labels < 0) & (cfs.n > 0))
        if core.size and loose.size:
            labels[loose] = labels[core[nearest_rows(x[loose], x[core])]]
    labels = _relabel_by_size(labels, cfs.n)
    k = int(labels.max()) + 1 if (labels >= 0).any() else 0
    segments = F.group_sum(cfs, labels, k)
    return DensityResult(labels=labels, n_segments=k, min_count=cut, dense=dense,
                         centroids=F.centroids(segments), counts=segments.n, radius=used_radius)


# ------------------------------------------------------------------ choosing k
@dataclass(frozen=True)
class KChoice:
    """Candidates for k scored on the CFs alone, and the one chosen.

    table: one dict per candidate: k, sse, calinski_harabasz, log_likelihood,
        parameters, bic (see ``choose_k``).
    k: the chosen k; rule: how it was chosen; result: the kmeans run for it;
    reason: one line saying why this k.
    """

    table: list[dict]
    k: int
    rule: str
    result: KMeansResult
    reason: str = ""


def spherical_bic(counts: np.ndarray, sse: float, d: int) -> tuple[float, int, float]:
    """BIC of a hard-assigned spherical Gaussian mixture with one shared variance.

    With N = sum of counts, N_j the segment counts and sigma^2 = SSE / (N d) (the
    maximum-likelihood shared variance per column):
    log L = sum_j N_j ln(N_j / N) - (N d / 2) ln(2 pi sigma^2) - N d / 2,
    parameters p = k d (means) + 1 (variance) + (k - 1) (mixing weights),
    BIC = -2 log L + p ln N (lower is better).  Returns (log L, p, BIC).
    """
    counts = counts[counts > 0]
    k, big_n = counts.shape[0], float(counts.sum())
    p = k * d + 1 + (k - 1)
    if sse <= 0.0 or big_n <= 0.0:
        return float("inf"), p, float("-inf")
    var = sse / (big_n * d)
    log_l = float((counts * np.log(counts / big_n)).sum() - 0.5 * big_n * d * (np.log(2.0 * np.pi * var) + 1.0))
    return log_l, p, -2.0 * log_l + p * np.log(big_n)


def choose_k(cfs: CF, candidates: Sequence[int], weights: np.ndarray | None = None, n_init: int = 10,
             seed: int = 0, rule: str = "calinski_harabasz",
             progress: Callable[[str], None] | None = None) -> KChoice:
    """Run kmeans for each candidate k and choose one, on the CFs alone.

    For each k: the exact SSE, the Calinski-Harabasz index of the segments' CFs
    (features.calinski_harabasz; needs k >= 2) and the spherical-Gaussian BIC
    (``spherical_bic``, d = the columns with non-zero weight).
    rule="calinski_harabasz" (the default) picks the k with the largest index;
    rule="bic" the k with the lowest BIC.  Ties go to the smaller k.  Why the
    default: on make_blobs with 3, 5 and 8 centres whose spreads differ (cluster_std
    0.5-2), the largest index found the true k in 9 of 9 runs, while the BIC with
    one shared variance chose too many segments in 7 of 9, the shared variance
    being too small for the wide blobs; with equal spreads both found it in
    108 of 108 runs (our measurements, not a published result).

    k = 1 has no Calinski-Harabasz index.  When it is a candidate, the default
    rule keeps one segment if its BIC is lower than the BIC of every candidate
    split: a hard-assigned mixture pays ln(N / N_j) per row for its mixing
    weights, which on one Gaussian blob outweighs what any split gains in fit
    (our reasoning, checked on blobs of 2 to 8 columns in the tests).
    ``progress`` receives a line per candidate.
    """
    if rule not in ("bic", "calinski_harabasz"):
        raise ValueError(f"rule must be 'bic' or 'calinski_harabasz', not {rule!r}")
    ks = sorted({int(k) for k in candidates})
    if not ks or ks[0] < 1:
        raise ValueError("candidates must be integers >= 1")
    w = _column_weights(cfs, weights)
    d = int((w != 0).sum())
    table, runs = [], {}
    for k in ks:
        got = kmeans(cfs, k, w, n_init=n_init, seed=seed, progress=progress)
        segments = F.group_sum(cfs, got.labels, k)
        ch = F.calinski_harabasz(segments, w) if k >= 2 else float("nan")
        log_l, p, bic = spherical_bic(segments.n, got.sse, d)
        table.append({"k": k, "sse": got.sse, "calinski_harabasz": ch, "log_likelihood": log_l,
                      "parameters": p, "bic": bic})
        runs[k] = got
        if progress is not None:
            progress(f"k={k}: SSE {got.sse:.6g}")
    best, reason = pick_k(table, rule)
    return KChoice(table=table, k=best["k"], rule=rule, result=runs[best["k"]], reason=reason)


def ranked_candidates(table: Sequence[dict], rule: str) -> list[dict]:
    """The k table's rows best first by the rule's score, ties to the smaller k: BIC lowest first;
    Calinski-Harabasz largest first, rows where it is undefined (k = 1) left out."""
    if rule == "bic":
        return sorted(table, key=lambda row: (row["bic"], row["k"]))
    scored = [row for row in table if not np.isnan(row["calinski_harabasz"])]
    return sorted(scored, key=lambda row: (-row["calinski_harabasz"], row["k"]))


def pick_k(table: list[dict], rule: str) -> tuple[dict, str]:
    """The chosen row of the k table and why (rules in ``choose_k``)."""
    scored = ranked_candidates(table, rule)
    if rule == "bic":
        best = scored[0]
        return best, f"lowest BIC, {best['bic']:.8g}"
    one = [row for row in table if row["k"] == 1]
    if not scored:
        if one:
            return one[0], "one segment: the only candidate"
        raise ValueError("Calinski-Harabasz needs a candidate k >= 2")
    best = scored[0]
    split_bic = min(row["bic"] for row in scored)
    if one and one[0]["bic"] <= split_bic:
        return one[0], (f"one segment: its BIC {one[0]['bic']:.8g} is lower than every split's "
                        f"(best {split_bic:.8g}), so no split is worth its mixing weights")
    why = f"largest Calinski-Harabasz, {best['calinski_harabasz']:.6g}"
    if one:
        why += f"; one segment's BIC {one[0]['bic']:.8g} is higher than the best split's {split_bic:.8g}"
    return best, why


def _score(value: float, width: int, spec: str) -> str:
    """A score right-aligned, '-' where it is undefined (Calinski-Harabasz of k = 1 is NaN)."""
    return f"{'-':>{width}}" if value != value else f"{value:>{width}{spec}}"


def format_k_table(choice: KChoice) -> str:
    """The candidates as an aligned text table, the chosen k marked with '*', and why."""
    head = f"{'k':>4}  {'SSE':>14}  {'Calinski-Harabasz':>18}  {'BIC':>16}"
    lines = [head, "-" * len(head)]
    for row in choice.table:
        mark = "*" if row["k"] == choice.k else " "
        lines.append(f"{row['k']:>3}{mark}  {_score(row['sse'], 14, '.6g')}  {_score(row['calinski_harabasz'], 18, '.6g')}  "
                     f"{_score(row['bic'], 16, '.8g')}")
    why = choice.reason or ("lowest BIC" if choice.rule == "bic" else "largest Calinski-Harabasz")
    lines.append(f"chosen k = {choice.k} ({why})")
    return "\n".join(lines)
