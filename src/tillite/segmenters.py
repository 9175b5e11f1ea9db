"""Second-phase segmentation of clustering features, in memory.

The inputs are cell CFs (thousands, not millions); the cost minimised is the
exact row-level SSE of the cells' points: putting a whole cell at centre c costs
its scatter plus n ||centroid - c||^2, so weighted k-means on the cell centroids
(weights n) plus the constant within-cell scatter is exactly the row-level SSE
of that cell assignment.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import features as F
from .features import CF

__all__ = ["KMeansResult", "kmeans", "kmeans_plus_plus", "nearest"]


@dataclass(frozen=True)
class KMeansResult:
    centroids: np.ndarray  # (k, d) in the CFs' own (unweighted) coordinates
    labels: np.ndarray  # (m,) segment of each CF entry
    sse: float  # exact SSE of the points under this entry assignment (weighted space)
    iterations: int
    restarts: int


def _sq_dist(x: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Squared Euclidean distances, matrix (len(x), len(c)), clamped at 0."""
    d = (x * x).sum(1)[:, None] - 2.0 * x @ c.T + (c * c).sum(1)[None, :]
    return np.maximum(d, 0.0)


def nearest(x: np.ndarray, c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index of and squared distance to the nearest row of c, for each row of x."""
    d = _sq_dist(x, c)
    idx = d.argmin(axis=1)
    return idx, d[np.arange(len(x)), idx]


def kmeans_plus_plus(x: np.ndarray, w: np.ndarray, k: int, rng: np.random.Generator) -> np.ndarray:
    """Greedy weighted k-means++ seeding (Arthur and Vassilvitskii 2007).

    Each new centre is the best of 2 + ln(k) candidates drawn with probability
    proportional to weight * squared distance to the nearest chosen centre.
    """
    m = len(x)
    trials = 2 + int(np.log(k))
    first = rng.choice(m, p=w / w.sum())
    centres = [x[first]]
    closest = _sq_dist(x, x[first : first + 1])[:, 0]
    for _ in range(1, k):
        pot = w * closest
        total = pot.sum()
        if total <= 0.0:
            # every point coincides with a centre: any unused point will do
            cand = rng.choice(m, size=trials)
        else:
            cand = np.searchsorted(np.cumsum(pot), rng.random(trials) * total)
            cand = np.minimum(cand, m - 1)
        dist = np.minimum(closest[None, :], _sq_dist(x[cand], x).reshape(len(cand), m))
        costs = (dist * w[None, :]).sum(axis=1)
        best = int(costs.argmin())
        centres.append(x[cand[best]])
        closest = dist[best]
    return np.array(centres)


def _lloyd(
    x: np.ndarray, w: np.ndarray, centres: np.ndarray, max_iter: int, tol: float
) -> tuple[np.ndarray, np.ndarray, float, int]:
    """Weighted Lloyd iterations from the given centres."""
    labels, dist = nearest(x, centres)
    cost = float((w * dist).sum())
    k = len(centres)
    it = 0
    for it in range(1, max_iter + 1):
        mass = np.bincount(labels, weights=w, minlength=k)
        sums = np.column_stack([np.bincount(labels, weights=x[:, j] * w, minlength=k) for j in range(x.shape[1])])
        new = np.where(mass[:, None] > 0, sums / np.where(mass > 0, mass, 1.0)[:, None], centres)
        empty = np.flatnonzero(mass == 0)
        if empty.size:
            # reseat an empty centre on the points that cost most
            far = np.argsort(-(w * dist))[: empty.size]
            new[empty] = x[far]
        new_labels, new_dist = nearest(x, new)
        new_cost = float((w * new_dist).sum())
        converged = np.array_equal(new_labels, labels) or cost - new_cost <= tol * max(cost, 1e-300)
        centres, labels, dist, cost = new, new_labels, new_dist, new_cost
        if converged:
            break
    return centres, labels, cost, it


def kmeans(
    cells: CF,
    k: int,
    weights: np.ndarray | None = None,
    n_init: int = 10,
    max_iter: int = 300,
    tol: float = 1e-7,
    seed: int = 0,
    init: np.ndarray | None = None,
) -> KMeansResult:
    """Weighted k-means++ with restarts on CF entries, minimising the exact SSE.

    ``weights`` multiplies each column (the distance is sum_j w_j^2 (u_j - c_j)^2).
    ``init`` (k x d, unweighted coordinates) warm-starts a single run instead.
    """
    keep = cells.n > 0
    if int(keep.sum()) < k:
        raise ValueError(f"k={k} is larger than the {int(keep.sum())} non-empty cells")
    cells = cells[keep]
    w_col = np.ones(cells.d) if weights is None else np.asarray(weights, dtype=np.float64)
    x = F.centroids(cells) * w_col[None, :]
    mass = cells.n
    within = F.sse(cells, w_col)
    rng = np.random.default_rng(seed)
    best: tuple[np.ndarray, np.ndarray, float, int] | None = None
    starts = [np.asarray(init, dtype=np.float64) * w_col[None, :]] if init is not None else None
    runs = 1 if starts else max(1, n_init)
    for r in range(runs):
        centres = starts[0] if starts else kmeans_plus_plus(x, mass, k, rng)
        got = _lloyd(x, mass, centres, max_iter, tol)
        if best is None or got[2] < best[2]:
            best = got
    _, labels, cost, iters = best
    per_segment = F.group_sum(cells, labels, k)
    cents = F.centroids(per_segment)
    full_labels = np.full(len(keep), -1, dtype=np.int64)
    full_labels[keep] = labels
    return KMeansResult(centroids=cents, labels=full_labels, sse=cost + within, iterations=iters, restarts=runs)
