"""distances.py: squared distances in chunks, checked against scipy.spatial.distance.cdist and numpy argmin."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from tillite.distances import nearest_rows, sq_distance_blocks, sq_distances, sq_norms


@pytest.fixture(scope="module")
def points():
    rng = np.random.default_rng(3)
    return rng.normal(size=(700, 5)) * 3.0, rng.normal(size=(40, 5)) * 3.0


def test_sq_norms_equal_numpy_row_sums_of_squares(points):
    x, _ = points
    np.testing.assert_allclose(sq_norms(x), (x * x).sum(axis=1), rtol=1e-12)


def test_sq_distances_equal_scipy_cdist_squared(points):
    x, c = points
    # reference: scipy.spatial.distance.cdist, metric "sqeuclidean"
    np.testing.assert_allclose(sq_distances(x, c), cdist(x, c, "sqeuclidean"), rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("chunk", [1, 64, 699, 700, 1024])
def test_blocks_cover_every_row_once_and_equal_scipy_cdist(points, chunk):
    x, c = points
    got = np.full((len(x), len(c)), np.nan)
    for lo, hi, g in sq_distance_blocks(x, c, chunk=chunk):
        assert np.isnan(got[lo:hi]).all()
        got[lo:hi] = g
    # reference: scipy.spatial.distance.cdist, metric "sqeuclidean"
    np.testing.assert_allclose(got, cdist(x, c, "sqeuclidean"), rtol=1e-9, atol=1e-9)


def test_skip_self_puts_inf_on_the_diagonal_only(points):
    x, _ = points
    got = np.vstack([g for _, _, g in sq_distance_blocks(x, chunk=128, skip_self=True)])
    assert np.isinf(np.diag(got)).all()
    off = ~np.eye(len(x), dtype=bool)
    np.testing.assert_allclose(got[off], cdist(x, x, "sqeuclidean")[off], rtol=1e-9, atol=1e-9)


def test_distances_are_never_negative_for_repeated_rows():
    x = np.repeat(np.array([[1e8 + 0.1, -3e7, 7.0]]), 50, axis=0)
    for _, _, g in sq_distance_blocks(x, chunk=16):
        assert (g >= 0.0).all()
    assert (sq_distances(x, x) >= 0.0).all()


@pytest.mark.parametrize("chunk", [7, 1024])
def test_nearest_rows_equal_numpy_argmin_of_scipy_cdist(points, chunk):
    x, c = points
    # reference: numpy argmin over scipy's cdist (no ties in continuous random data)
    np.testing.assert_array_equal(nearest_rows(x, c, chunk=chunk), cdist(x, c).argmin(axis=1))
    d = cdist(x, x)
    np.fill_diagonal(d, np.inf)
    np.testing.assert_array_equal(nearest_rows(x, chunk=chunk, skip_self=True), d.argmin(axis=1))
