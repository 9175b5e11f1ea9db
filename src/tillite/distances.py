"""Squared Euclidean distances between rows, in chunks of rows (pure numpy).

One place for the ``|a|^2 + |b|^2 - 2 a.b`` form the second phase and the CF tree
use: whole matrices for small sets (``sq_distances``), and blocks of rows for
all-pairs work on thousands of cells, so memory stays at ``chunk x m`` floats
(``sq_distance_blocks``, ``nearest_rows``).  Imports nothing of ours.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np


def sq_norms(x: np.ndarray) -> np.ndarray:
    """Squared Euclidean norm of each row."""
    return np.einsum("ij,ij->i", x, x)


def sq_distances(x: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Squared Euclidean distances, matrix (len(x), len(c)), clamped at 0 (one BLAS product)."""
    d = x @ c.T
    d *= -2.0
    d += sq_norms(x)[:, None]
    d += sq_norms(c)[None, :]
    return np.maximum(d, 0.0, out=d)


def sq_distance_blocks(x: np.ndarray, ref: np.ndarray | None = None, *, chunk: int = 1024,
                       skip_self: bool = False, ranking: bool = False
                       ) -> Iterator[tuple[int, int, np.ndarray]]:
    """(lo, hi, block): squared distances from rows lo:hi of x to every row of ``ref``.

    ``ref`` None means x itself; ``skip_self`` then puts inf on each row's distance to
    itself.  Blocks are clamped at 0.  With ``ranking`` a block leaves out the x row's own
    norm and the clamp: it orders the ``ref`` rows for each x row (argmin) at less cost,
    but its values are not distances.
    """
    ref = x if ref is None else ref
    ref_norms = sq_norms(ref)
    x_norms = None if ranking else (ref_norms if ref is x else sq_norms(x))
    m = x.shape[0]
    for lo in range(0, m, chunk):
        hi = min(m, lo + chunk)
        if ranking:
            g = x[lo:hi] @ ref.T
            g *= -2.0
            g += ref_norms[None, :]
        else:
            g = x_norms[lo:hi, None] + ref_norms[None, :]
            g -= 2.0 * x[lo:hi] @ ref.T
            np.maximum(g, 0.0, out=g)
        if skip_self:
            g[np.arange(hi - lo), np.arange(lo, hi)] = np.inf
        yield lo, hi, g


def nearest_rows(x: np.ndarray, ref: np.ndarray | None = None, *, chunk: int = 1024,
                 skip_self: bool = False) -> np.ndarray:
    """Index of the nearest row of ``ref`` (x itself when None) for each row of x."""
    out = np.empty(x.shape[0], dtype=np.int64)
    for lo, hi, g in sq_distance_blocks(x, ref, chunk=chunk, skip_self=skip_self, ranking=True):
        out[lo:hi] = g.argmin(axis=1)
    return out
