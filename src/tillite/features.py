"""Clustering features (CFs) and their algebra, vectorised over arrays of CFs.

A CF summarises a set of points by (n, LS, SS): the count, the per-column linear
sum and the per-column square sum (their sum over columns is the scalar SS of the
BIRCH paper, Zhang, Ramakrishnan and Livny 1996).  Everything here is a pure
function of ``CF`` arrays; no function loops over points in Python.

CFs are additive (``merge``) and subtractive (``subtract``).  Scatter is computed
as ``SS - LS**2 / n`` per column, which is only safe when the values were centred
before summing: the SQL stages always sum centred (and scaled) values, and
``affine`` moves CFs between such coordinate systems exactly.  Tiny negative
variances from rounding are clamped to zero.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "CF",
    "from_points",
    "from_groups",
    "concat",
    "merge",
    "subtract",
    "total",
    "group_sum",
    "affine",
    "centroids",
    "column_scatter",
    "scatter",
    "sse",
    "radius",
    "diameter",
    "centroid_euclidean",
    "centroid_manhattan",
    "average_inter_cluster",
    "average_intra_cluster",
    "variance_increase",
    "ward_cost",
    "calinski_harabasz",
    "assignment_cost",
]


@dataclass(frozen=True)
class CF:
    """An array of m clustering features over d columns.

    n: shape (m,), counts (float64 so that weights and sums mix freely)
    ls: shape (m, d), linear sums
    ss: shape (m, d), square sums per column
    """

    n: np.ndarray
    ls: np.ndarray
    ss: np.ndarray

    def __post_init__(self) -> None:
        n = np.asarray(self.n, dtype=np.float64).reshape(-1)
        ls = np.asarray(self.ls, dtype=np.float64)
        ss = np.asarray(self.ss, dtype=np.float64)
        if ls.ndim == 1:
            ls = ls.reshape(n.shape[0], -1)
        if ss.ndim == 1:
            ss = ss.reshape(n.shape[0], -1)
        if ls.ndim != 2 or ls.shape != ss.shape or ls.shape[0] != n.shape[0]:
            raise ValueError(f"CF shapes disagree: n {n.shape}, ls {ls.shape}, ss {ss.shape}")
        object.__setattr__(self, "n", n)
        object.__setattr__(self, "ls", ls)
        object.__setattr__(self, "ss", ss)

    @property
    def m(self) -> int:
        """Number of CF entries."""
        return int(self.n.shape[0])

    @property
    def d(self) -> int:
        """Number of columns."""
        return int(self.ls.shape[1])

    def __len__(self) -> int:
        return self.m

    def __getitem__(self, index) -> "CF":
        idx = [index] if isinstance(index, (int, np.integer)) else index
        return CF(self.n[idx], self.ls[idx], self.ss[idx])

    @staticmethod
    def empty(d: int, m: int = 0) -> "CF":
        """m zero CFs of d columns (the identity of ``merge``)."""
        return CF(np.zeros(m), np.zeros((m, d)), np.zeros((m, d)))


def from_points(x: np.ndarray) -> CF:
    """One CF per row of x (singleton CFs)."""
    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    return CF(np.ones(x.shape[0]), x.copy(), x * x)


def from_groups(x: np.ndarray, labels: np.ndarray, k: int | None = None) -> CF:
    """One CF per group label 0..k-1 of the rows of x."""
    return group_sum(from_points(x), labels, k)


def concat(*cfs: CF) -> CF:
    """Stack CF arrays one after another."""
    return CF(
        np.concatenate([c.n for c in cfs]),
        np.concatenate([c.ls for c in cfs]),
        np.concatenate([c.ss for c in cfs]),
    )


def merge(a: CF, b: CF) -> CF:
    """Entry-wise union: CF(A u B) = CF(A) + CF(B) (BIRCH additivity theorem)."""
    return CF(a.n + b.n, a.ls + b.ls, a.ss + b.ss)


def subtract(a: CF, b: CF) -> CF:
    """Entry-wise difference CF(A) - CF(B) for B a subset of A (deletes)."""
    n = a.n - b.n
    if np.any(n < -0.5):
        raise ValueError("subtracting more points than a CF holds")
    return CF(np.maximum(n, 0.0), a.ls - b.ls, a.ss - b.ss)


def total(cf: CF) -> CF:
    """The single CF of all entries together."""
    return CF(cf.n.sum(keepdims=True), cf.ls.sum(axis=0, keepdims=True), cf.ss.sum(axis=0, keepdims=True))


def group_sum(cf: CF, labels: np.ndarray, k: int | None = None) -> CF:
    """Sum CF entries by integer label 0..k-1 (labels < 0 are dropped)."""
    labels = np.asarray(labels, dtype=np.int64)
    keep = labels >= 0
    labels = labels[keep]
    if k is None:
        k = int(labels.max()) + 1 if labels.size else 0
    n = np.bincount(labels, weights=cf.n[keep], minlength=k)
    ls, ss = cf.ls[keep], cf.ss[keep]
    ls = np.column_stack([np.bincount(labels, weights=ls[:, j], minlength=k) for j in range(cf.d)]) if cf.d else np.zeros((k, 0))
    ss = np.column_stack([np.bincount(labels, weights=ss[:, j], minlength=k) for j in range(cf.d)]) if cf.d else np.zeros((k, 0))
    return CF(n, ls.reshape(k, cf.d), ss.reshape(k, cf.d))


def affine(cf: CF, scale: np.ndarray, offset: np.ndarray) -> CF:
    """CF of y = scale * x + offset per column, from the CF of x, exactly.

    LS_y = a LS + n b and SS_y = a^2 SS + 2ab LS + n b^2.  Used to move cell CFs
    computed in a sample's standardisation into the exact one; keep |offset|
    small relative to the spread (both systems centred) so nothing cancels.
    """
    a = np.asarray(scale, dtype=np.float64).reshape(1, -1)
    b = np.asarray(offset, dtype=np.float64).reshape(1, -1)
    n = cf.n[:, None]
    ls = a * cf.ls + n * b
    ss = a * a * cf.ss + 2.0 * a * b * cf.ls + n * b * b
    return CF(cf.n.copy(), ls, ss)


def centroids(cf: CF) -> np.ndarray:
    """Centroid LS/n of each entry, shape (m, d); zero for empty entries."""
    n = cf.n[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        c = np.where(n > 0, cf.ls / np.where(n > 0, n, 1.0), 0.0)
    return c


def column_scatter(cf: CF) -> np.ndarray:
    """Per-column sum of squared deviations from the centroid, shape (m, d), clamped >= 0."""
    n = np.where(cf.n > 0, cf.n, 1.0)[:, None]
    return np.maximum(cf.ss - cf.ls * cf.ls / n, 0.0)


def scatter(cf: CF, weights: np.ndarray | None = None) -> np.ndarray:
    """Sum of squared distances of each entry's points to its centroid, shape (m,).

    ``weights`` multiplies each column's value (so scatter scales by weight^2).
    """
    col = column_scatter(cf)
    if weights is not None:
        col = col * (np.asarray(weights, dtype=np.float64) ** 2)[None, :]
    return col.sum(axis=1)


def sse(cf: CF, weights: np.ndarray | None = None) -> float:
    """Total within-entry sum of squared errors."""
    return float(scatter(cf, weights).sum())


def radius(cf: CF, weights: np.ndarray | None = None) -> np.ndarray:
    """RMS distance of an entry's points to its centroid (BIRCH radius R)."""
    n = np.where(cf.n > 0, cf.n, 1.0)
    return np.sqrt(scatter(cf, weights) / n)


def diameter(cf: CF, weights: np.ndarray | None = None) -> np.ndarray:
    """RMS pairwise distance within an entry (BIRCH diameter D); 0 for n <= 1.

    sum_{i,j} ||x_i - x_j||^2 = 2 n SSE, averaged over n (n - 1) ordered pairs.
    """
    n = cf.n
    with np.errstate(invalid="ignore", divide="ignore"):
        d2 = np.where(n > 1, 2.0 * scatter(cf, weights) / np.where(n > 1, n - 1.0, 1.0), 0.0)
    return np.sqrt(d2)


def _weighted(c: np.ndarray, weights: np.ndarray | None) -> np.ndarray:
    return c if weights is None else c * np.asarray(weights, dtype=np.float64)[None, :]


def _sq_centroid_gap(a: CF, b: CF, weights: np.ndarray | None) -> np.ndarray:
    ca = _weighted(centroids(a), weights)
    cb = _weighted(centroids(b), weights)
    g = (ca * ca).sum(1)[:, None] - 2.0 * ca @ cb.T + (cb * cb).sum(1)[None, :]
    return np.maximum(g, 0.0)


def centroid_euclidean(a: CF, b: CF, weights: np.ndarray | None = None) -> np.ndarray:
    """D0: Euclidean distance between centroids, matrix (m_a, m_b)."""
    return np.sqrt(_sq_centroid_gap(a, b, weights))


def centroid_manhattan(a: CF, b: CF, weights: np.ndarray | None = None) -> np.ndarray:
    """D1: Manhattan distance between centroids, matrix (m_a, m_b)."""
    ca = _weighted(centroids(a), weights)
    cb = _weighted(centroids(b), weights)
    return np.abs(ca[:, None, :] - cb[None, :, :]).sum(axis=2)


def average_inter_cluster(a: CF, b: CF, weights: np.ndarray | None = None) -> np.ndarray:
    """D2: RMS distance between a point of A and a point of B, matrix (m_a, m_b).

    Equals sqrt(SSE_A/n_A + SSE_B/n_B + ||c_A - c_B||^2), the centred form of the
    paper's expression, which does not cancel.
    """
    va = scatter(a, weights) / np.where(a.n > 0, a.n, 1.0)
    vb = scatter(b, weights) / np.where(b.n > 0, b.n, 1.0)
    return np.sqrt(va[:, None] + vb[None, :] + _sq_centroid_gap(a, b, weights))


def _merged_sse(a: CF, b: CF, weights: np.ndarray | None) -> np.ndarray:
    na, nb = a.n[:, None], b.n[None, :]
    nn = np.where(na + nb > 0, na + nb, 1.0)
    return scatter(a, weights)[:, None] + scatter(b, weights)[None, :] + na * nb / nn * _sq_centroid_gap(a, b, weights)


def average_intra_cluster(a: CF, b: CF, weights: np.ndarray | None = None) -> np.ndarray:
    """D3: diameter of the union of A and B, matrix (m_a, m_b)."""
    nn = a.n[:, None] + b.n[None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        d2 = np.where(nn > 1, 2.0 * _merged_sse(a, b, weights) / np.where(nn > 1, nn - 1.0, 1.0), 0.0)
    return np.sqrt(d2)


def variance_increase(a: CF, b: CF, weights: np.ndarray | None = None) -> np.ndarray:
    """D4: SSE(A u B) - SSE(A) - SSE(B), matrix (m_a, m_b).

    Equal to the Ward merge cost n_A n_B / (n_A + n_B) ||c_A - c_B||^2.
    """
    return ward_cost(a, b, weights)


def ward_cost(a: CF, b: CF, weights: np.ndarray | None = None) -> np.ndarray:
    """Ward merge cost n_a n_b / (n_a + n_b) ||c_a - c_b||^2, matrix (m_a, m_b)."""
    na, nb = a.n[:, None], b.n[None, :]
    nn = np.where(na + nb > 0, na + nb, 1.0)
    return na * nb / nn * _sq_centroid_gap(a, b, weights)


def assignment_cost(cf: CF, centers: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    """Cost of putting all points of each entry at each centre, matrix (m, k).

    sum_{x in entry} ||x - c||^2 = scatter + n ||centroid - c||^2.
    """
    pts = CF(np.ones(len(centers)), np.asarray(centers, dtype=np.float64), np.asarray(centers, dtype=np.float64) ** 2)
    return scatter(cf, weights)[:, None] + cf.n[:, None] * _sq_centroid_gap(cf, pts, weights)


def calinski_harabasz(clusters: CF, weights: np.ndarray | None = None) -> float:
    """Calinski-Harabasz index of a partition given one CF per cluster.

    (B / (k - 1)) / (W / (N - k)) with W the within-cluster SSE and B the
    between-cluster sum n_k ||c_k - c||^2; infinite when W is 0.
    """
    keep = clusters.n > 0
    clusters = clusters[keep]
    k, big_n = clusters.m, float(clusters.n.sum())
    if k < 2 or big_n <= k:
        raise ValueError("Calinski-Harabasz needs 2 <= k < N")
    w = sse(clusters, weights)
    overall = total(clusters)
    gap = _sq_centroid_gap(clusters, overall, weights)[:, 0]
    b = float((clusters.n * gap).sum())
    if w <= 0.0:
        return float("inf")
    return (b / (k - 1)) / (w / (big_n - k))
