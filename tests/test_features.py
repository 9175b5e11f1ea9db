"""The CF algebra of tillite.features checked against references this project did not write.

Outside sources named beside each check: numpy computed directly on the same rows,
scipy.spatial.distance (pdist/cdist), scipy.cluster.hierarchy (Ward linkage),
sklearn.metrics.calinski_harabasz_score, the BIRCH paper (Zhang, Ramakrishnan, Livny,
SIGMOD 1996) and the pairwise variance update of Chan, Golub and LeVeque (1979).
"""

import numpy as np
import pytest
from scipy.cluster.hierarchy import linkage
from scipy.spatial.distance import cdist, pdist
from sklearn.datasets import load_wine
from sklearn.metrics import calinski_harabasz_score

from tillite import features as F

from conftest import numpy_sse

RTOL = 1e-9
W = np.array([0.5, 2.0, 1.0, 3.0])  # column multipliers for the weighted variants


@pytest.fixture(scope="module")
def two_sides(blobs_600_4d_5c):
    """Disjoint row sets A (5 blob groups) and B (3 random groups) for the pairwise distances."""
    x, y = blobs_600_4d_5c
    yb = np.random.default_rng(11).integers(0, 3, size=300)
    xa, xb = x[:300], x[300:]
    ga = [xa[y[:300] == g] for g in range(5)]
    gb = [xb[yb == h] for h in range(3)]
    return F.from_groups(xa, y[:300], 5), F.from_groups(xb, yb, 3), ga, gb


@pytest.fixture(params=[None, W], ids=["unweighted", "weighted"])
def weights(request):
    return request.param


def _scaled(x, weights):
    return x if weights is None else x * weights


def _assert_cf(cf, n, ls, ss, rtol=RTOL, atol=1e-9):
    np.testing.assert_allclose(cf.n, n, rtol=rtol, atol=atol)
    np.testing.assert_allclose(cf.ls, ls, rtol=rtol, atol=atol)
    np.testing.assert_allclose(cf.ss, ss, rtol=rtol, atol=atol)


def _numpy_groups(x, y, k):
    # numpy direct: per-group count, column sums, column square sums
    return (np.array([(y == g).sum() for g in range(k)], dtype=float),
            np.array([x[y == g].sum(axis=0) for g in range(k)]).reshape(k, x.shape[1]),
            np.array([(x[y == g] ** 2).sum(axis=0) for g in range(k)]).reshape(k, x.shape[1]))


def test_from_points_gives_singleton_counts_sums_and_square_sums(blobs_600_4d_5c):
    x, _ = blobs_600_4d_5c
    _assert_cf(F.from_points(x), np.ones(len(x)), x, x * x)  # numpy direct on the rows


def test_from_groups_matches_numpy_per_group_counts_sums_square_sums(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    _assert_cf(F.from_groups(x, y), *_numpy_groups(x, y, 5))  # numpy per group


def test_group_sum_drops_negative_labels_and_keeps_empty_groups(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    lab = np.where(np.arange(len(y)) % 7 == 0, -1, y)  # every 7th row dropped
    got = F.group_sum(F.from_points(x), lab, k=7)  # groups 5 and 6 are empty
    _assert_cf(got, *_numpy_groups(x, lab, 7))  # numpy per group
    assert np.all(got.n[5:] == 0)


def test_group_sum_of_fine_cfs_equals_cf_of_coarse_groups_of_rows(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    fine = np.random.default_rng(3).integers(0, 40, size=len(x))
    coarse_of_fine = np.arange(40) % 4
    got = F.group_sum(F.from_groups(x, fine, 40), coarse_of_fine, 4)
    _assert_cf(got, *_numpy_groups(x, coarse_of_fine[fine], 4))  # numpy on the rows, BIRCH additivity


def test_total_is_numpy_count_column_sums_and_square_sums(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    _assert_cf(F.total(F.from_groups(x, y)), [len(x)], x.sum(0)[None], (x * x).sum(0)[None])  # numpy


def test_merge_is_cf_of_union_birch_additivity(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    a, b = F.from_groups(x[:250], y[:250], 5), F.from_groups(x[250:], y[250:], 5)
    # BIRCH CF additivity theorem: CF(A u B) = CF(A) + CF(B); reference is numpy on all rows
    _assert_cf(F.merge(a, b), *_numpy_groups(x, y, 5))


def test_subtract_removing_subset_gives_cf_of_rest(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    gone = np.random.default_rng(5).random(len(x)) < 0.3
    rest = F.subtract(F.from_groups(x, y, 5), F.from_groups(x[gone], y[gone], 5))
    _assert_cf(rest, *_numpy_groups(x[~gone], y[~gone], 5), atol=1e-8)  # numpy on the kept rows


def test_subtract_more_points_than_present_raises_value_error(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    small = F.from_groups(x[:10], y[:10], 5)
    with pytest.raises(ValueError):
        F.subtract(small, F.from_groups(x, y, 5))


def test_affine_matches_cf_of_transformed_rows(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    scale, offset = np.array([0.3, -2.0, 1.5, 0.01]), np.array([0.7, -1.2, 0.0, 3.0])
    got = F.affine(F.from_groups(x, y), scale, offset)
    _assert_cf(got, *_numpy_groups(x * scale + offset, y, 5))  # numpy: CF of the transformed rows


def test_centroids_match_numpy_group_means_and_empty_entries_are_zero(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    got = F.centroids(F.from_groups(x, y, 6))  # group 5 empty
    want = np.array([x[y == g].mean(axis=0) for g in range(5)] + [np.zeros(4)])  # numpy mean
    np.testing.assert_allclose(got, want, rtol=RTOL, atol=1e-12)


def test_scatter_sse_radius_match_numpy_deviations(blobs_600_4d_5c, weights):
    x, y = blobs_600_4d_5c
    cf, xs = F.from_groups(x, y), _scaled(x, weights)  # weights: numpy on the scaled rows
    dev = [(xs[y == g] - xs[y == g].mean(0)) ** 2 for g in range(5)]  # numpy direct
    want_col = np.array([d.sum(0) for d in dev])
    if weights is None:
        np.testing.assert_allclose(F.column_scatter(cf), want_col, rtol=RTOL)
    np.testing.assert_allclose(F.scatter(cf, weights), want_col.sum(1), rtol=RTOL)
    np.testing.assert_allclose(F.sse(cf, weights), want_col.sum(), rtol=RTOL)
    # BIRCH radius R = sqrt(sum ||x - c||^2 / n), the RMS distance to the centroid
    want_r = np.array([np.sqrt(d.sum(1).mean()) for d in dev])
    np.testing.assert_allclose(F.radius(cf, weights), want_r, rtol=RTOL)


def test_diameter_matches_scipy_pdist_rms_over_ordered_pairs(blobs_600_4d_5c, weights):
    x, y = blobs_600_4d_5c
    xs = _scaled(x, weights)
    # BIRCH diameter D = sqrt(sum_{i != j} ||x_i - x_j||^2 / (n (n - 1))); pdist lists each
    # unordered pair once, so the mean over pdist equals the mean over ordered pairs i != j
    want = [np.sqrt(np.mean(pdist(xs[y == g], "sqeuclidean"))) for g in range(5)]
    np.testing.assert_allclose(F.diameter(F.from_groups(x, y), weights), want, rtol=RTOL)
    assert np.all(F.diameter(F.from_points(x[:5]), weights) == 0.0)  # n = 1: no pairs


def test_d0_d1_centroid_distances_match_scipy_cdist(two_sides, weights):
    a, b, ga, gb = two_sides
    ca = np.array([_scaled(g, weights).mean(0) for g in ga])  # numpy means on scaled rows
    cb = np.array([_scaled(g, weights).mean(0) for g in gb])
    # BIRCH D0 (centroid Euclidean) and D1 (centroid Manhattan) vs scipy cdist
    np.testing.assert_allclose(F.centroid_euclidean(a, b, weights), cdist(ca, cb), rtol=RTOL)
    np.testing.assert_allclose(F.centroid_manhattan(a, b, weights), cdist(ca, cb, "cityblock"), rtol=RTOL)


def test_d2_average_inter_cluster_is_rms_of_cdist_between_members(two_sides, weights):
    a, b, ga, gb = two_sides
    # BIRCH D2 = sqrt(sum_{i in A, j in B} ||x_i - y_j||^2 / (n_A n_B)), brute force with cdist
    want = np.array([[np.sqrt(cdist(_scaled(p, weights), _scaled(q, weights), "sqeuclidean").mean())
                      for q in gb] for p in ga])
    np.testing.assert_allclose(F.average_inter_cluster(a, b, weights), want, rtol=RTOL)


def test_d3_average_intra_cluster_is_diameter_of_union_by_pdist(two_sides, weights):
    a, b, ga, gb = two_sides
    # BIRCH D3 = RMS distance over ordered pairs i != j of A u B, brute force with pdist
    want = np.array([[np.sqrt(pdist(_scaled(np.vstack([p, q]), weights), "sqeuclidean").mean())
                      for q in gb] for p in ga])
    np.testing.assert_allclose(F.average_intra_cluster(a, b, weights), want, rtol=RTOL)


def test_d4_variance_increase_and_ward_cost_equal_sse_growth_of_union(two_sides, weights):
    a, b, ga, gb = two_sides
    # BIRCH D4 = SSE(A u B) - SSE(A) - SSE(B), numpy direct on the scaled rows
    s = lambda z: numpy_sse(_scaled(z, weights))  # noqa: E731
    want = np.array([[s(np.vstack([p, q])) - s(p) - s(q) for q in gb] for p in ga])
    np.testing.assert_allclose(F.variance_increase(a, b, weights), want, rtol=1e-8)
    np.testing.assert_allclose(F.ward_cost(a, b, weights), want, rtol=1e-8)


def test_ward_cost_of_singletons_is_half_squared_distance(blobs_600_4d_5c, weights):
    x, _ = blobs_600_4d_5c
    p, q = x[:40], x[40:70]
    want = cdist(_scaled(p, weights), _scaled(q, weights), "sqeuclidean") / 2  # scipy cdist
    np.testing.assert_allclose(F.ward_cost(F.from_points(p), F.from_points(q), weights), want, rtol=RTOL)


def test_ward_cost_matches_scipy_ward_linkage_merge_heights(blobs_600_4d_5c):
    x, _ = blobs_600_4d_5c
    pts = x[:60]
    z = linkage(pts, method="ward")
    # scipy's Ward height for merging u and v is sqrt(2 n_u n_v / (n_u + n_v)) ||c_u - c_v||
    # (recalled from memory), i.e. sqrt(2 * ward_cost)
    cfs = F.from_points(pts)
    for left, right, height, _ in z:  # a handful of merges (59), each a small CF step
        i, j = int(left), int(right)
        cost = F.ward_cost(cfs[i], cfs[j])[0, 0]
        np.testing.assert_allclose(np.sqrt(2.0 * cost), height, rtol=1e-8)
        cfs = F.concat(cfs, F.merge(cfs[i], cfs[j]))


def test_assignment_cost_matches_brute_force_squared_distances_to_centers(blobs_600_4d_5c, weights):
    x, y = blobs_600_4d_5c
    centers = np.random.default_rng(9).normal(scale=5.0, size=(6, 4))
    xs, cs = _scaled(x, weights), _scaled(centers, weights)
    # brute force: sum over the entry's points of ||x - c||^2, via scipy cdist
    want = np.array([cdist(xs[y == g], cs, "sqeuclidean").sum(0) for g in range(5)])
    got = F.assignment_cost(F.from_groups(x, y), centers, weights)
    np.testing.assert_allclose(got, want, rtol=RTOL)


def test_calinski_harabasz_matches_sklearn_on_blobs(blobs_600_4d_5c, weights):
    x, y = blobs_600_4d_5c
    want = calinski_harabasz_score(_scaled(x, weights), y)  # sklearn on the same (scaled) rows
    assert F.calinski_harabasz(F.from_groups(x, y, 7), weights) == pytest.approx(want, rel=RTOL)
    # an arbitrary (poor) assignment too, with two empty groups that must be ignored
    bad = np.random.default_rng(2).integers(0, 4, size=len(x))
    want = calinski_harabasz_score(_scaled(x, weights), bad)
    assert F.calinski_harabasz(F.from_groups(x, bad, 6), weights) == pytest.approx(want, rel=RTOL)


def test_calinski_harabasz_matches_sklearn_on_standardised_wine():
    data = load_wine()  # bundled real dataset: 178 wines, 13 measurements, 3 cultivars
    x = (data.data - data.data.mean(0)) / data.data.std(0)
    want = calinski_harabasz_score(x, data.target)  # sklearn
    assert F.calinski_harabasz(F.from_groups(x, data.target)) == pytest.approx(want, rel=RTOL)


def test_calinski_harabasz_rejects_a_single_cluster(blobs_600_4d_5c):
    x, _ = blobs_600_4d_5c
    with pytest.raises(ValueError):
        F.calinski_harabasz(F.from_groups(x, np.zeros(len(x), dtype=int)))


def test_merged_scatter_follows_chan_golub_leveque_pairwise_update(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    rng = np.random.default_rng(4)
    half = rng.random(len(x)) < 0.4
    a, b = F.from_groups(x[half], y[half], 5), F.from_groups(x[~half], y[~half], 5)
    # Chan, Golub, LeVeque (1979), per column: M2_AB = M2_A + M2_B + delta^2 n_A n_B / (n_A + n_B)
    delta = F.centroids(b) - F.centroids(a)
    na, nb = a.n[:, None], b.n[:, None]
    want = F.column_scatter(a) + F.column_scatter(b) + delta**2 * na * nb / (na + nb)
    np.testing.assert_allclose(F.column_scatter(F.merge(a, b)), want, rtol=RTOL)
    # and the same M2 from numpy on the rows
    want_np = np.array([((x[y == g] - x[y == g].mean(0)) ** 2).sum(0) for g in range(5)])
    np.testing.assert_allclose(want, want_np, rtol=RTOL)


def test_scatter_of_data_near_1e9_after_centring_matches_unshifted():
    rng = np.random.default_rng(21)
    x0 = rng.normal(size=(2000, 3))
    y = rng.integers(0, 4, size=2000)
    raw = x0 + 1e9  # spread ~1 around 1e9 (timestamps, coordinates)
    shift = raw[:100].mean(axis=0)  # a profile's sample mean, as the SQL stage would use
    centered = F.from_groups(raw - shift, y, 4)
    # move to exact centring and sample-sd scaling with affine, offsets small by construction
    sd = (raw[:100] - shift).std(axis=0)
    exact_mean = F.centroids(F.total(centered))[0]
    moved = F.affine(centered, 1.0 / sd, -exact_mean / sd)
    want = np.array([((x0[y == g] - x0[y == g].mean(0)) ** 2).sum() for g in range(4)])  # numpy, unshifted
    np.testing.assert_allclose(F.scatter(centered), want, rtol=1e-6)
    np.testing.assert_allclose(F.scatter(moved, sd), want, rtol=1e-6)  # weights sd undo the scaling
    np.testing.assert_allclose(F.total(moved).ls, 0.0, atol=1e-6)
    # why centring is required: raw square sums at 1e9 lose the spread entirely
    naive = F.scatter(F.from_groups(raw, y, 4))
    assert not np.allclose(naive, want, rtol=1e-2)


def test_constant_column_gives_exactly_zero_scatter_and_radius():
    x = np.column_stack([np.full(7, 0.7), np.arange(7.0)])
    cf = F.from_groups(x, np.zeros(7, dtype=int))
    assert cf.ss[0, 0] - cf.ls[0, 0] ** 2 / 7 < 0  # numpy: the unclamped variance is slightly negative
    assert F.column_scatter(cf)[0, 0] == 0.0
    const = F.from_groups(x[:, :1], np.zeros(7, dtype=int))
    assert F.scatter(const)[0] == 0.0 and F.radius(const)[0] == 0.0 and F.diameter(const)[0] == 0.0
    # a hand-made CF with ss a hair below ls^2/n is clamped, not negative
    tiny = F.CF([4.0], [[2.0, 1.0]], [[1.0 - 1e-15, 0.25 - 1e-16]])
    assert np.all(F.column_scatter(tiny) == 0.0)


@pytest.mark.parametrize(
    "n, ls, ss",
    [
        (np.ones(3), np.zeros((3, 2)), np.zeros((3, 3))),  # ls and ss disagree on d
        (np.ones(3), np.zeros((2, 2)), np.zeros((2, 2))),  # n disagrees with m
        (np.ones(2), np.zeros(5), np.zeros(5)),  # flat sums that do not split into m rows
        (np.ones(2), np.zeros((2, 3, 4)), np.zeros((2, 3, 4))),  # sums must be 2-D
        (1.0, 2.0, 3.0),  # scalar sums
    ],
)
def test_cf_shape_validation_raises_value_error(n, ls, ss):
    with pytest.raises(ValueError):
        F.CF(n, ls, ss)


def test_cf_indexing_concat_and_empty_identity(blobs_600_4d_5c):
    x, y = blobs_600_4d_5c
    cf = F.from_groups(x, y)
    again = F.concat(cf[[0, 1]], cf[2], cf[3:])
    _assert_cf(again, cf.n, cf.ls, cf.ss, rtol=0, atol=0)
    _assert_cf(F.merge(cf, F.CF.empty(4, 5)), cf.n, cf.ls, cf.ss, rtol=0, atol=0)
    assert (cf.m, cf.d, len(cf)) == (5, 4, 5)
