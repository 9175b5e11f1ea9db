"""The CF tree of tillite.tree checked against references this project did not write.

Outside sources named beside each check: numpy computed directly on the rows that
membership gathers, scipy.spatial.distance.pdist, scikit-learn (make_blobs,
adjusted_rand_score) and the BIRCH paper (Zhang, Ramakrishnan, Livny, SIGMOD 1996)
for the tree's definitions: threshold on an entry's diameter or radius, inner
nodes of at most B entries and leaves of at most L entries, a height-balanced
tree, and an inner entry's CF equal to the sum of its child's entries.
"""

import numpy as np
import pytest
from scipy.spatial.distance import pdist
from sklearn.datasets import make_blobs
from sklearn.metrics import adjusted_rand_score

from tillite import features as F
from tillite.segmenters import kmeans, nearest
from tillite.tree import condense, intrinsic_dimension

W = np.array([0.5, 2.0, 1.0])  # column multipliers


@pytest.fixture(scope="module")
def grouped(blobs_6k_3d_5c):
    """Cells: CFs of small groups of nearby rows (rows sorted along the first column, cut in fours)."""
    x, _ = blobs_6k_3d_5c
    order = np.lexsort((x[:, 1], np.floor(x[:, 0] * 4)))
    group = np.empty(len(x), dtype=np.int64)
    group[order] = np.arange(len(x)) // 4
    return F.from_groups(x, group), group


def _rows_of(x, group, membership, entry):
    """Rows whose cell ended in ``entry`` (numpy gather through both memberships)."""
    return x[membership[group] == entry]


def test_entry_statistics_after_many_inserts_equal_numpy_on_member_rows(blobs_6k_3d_5c, grouped):
    x, _ = blobs_6k_3d_5c
    cells, group = grouped
    got = condense(cells, threshold=0.05, budget=300, branching=6, leaf_capacity=8, weights=W, seed=3)
    assert got.rebuilds >= 1  # the bookkeeping also went through rebuilds
    seen = 0
    for node in got.walk():
        if not node.leaf:
            continue
        for j, entry in enumerate(node.entries):
            if entry < 0:
                continue
            rows = _rows_of(x, group, got.membership, entry) * W
            # numpy direct: count, mean and sum of squared deviations of the weighted rows
            assert node.n[j] == pytest.approx(len(rows))
            np.testing.assert_allclose(node.centroids[j], rows.mean(axis=0), rtol=1e-9, atol=1e-9)
            assert node.scatter[j] == pytest.approx(((rows - rows.mean(axis=0)) ** 2).sum(), rel=1e-8, abs=1e-9)
            seen += 1
    assert seen == got.entries.m
    for e in range(got.entries.m):
        rows = _rows_of(x, group, got.membership, e)
        # numpy direct: the returned entries are the CFs of their rows, unweighted
        assert got.entries.n[e] == len(rows)
        np.testing.assert_allclose(got.entries.ls[e], rows.sum(axis=0), rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(got.entries.ss[e], (rows**2).sum(axis=0), rtol=1e-9, atol=1e-9)


def test_every_cell_lands_in_exactly_one_entry_or_outlier_entry(blobs_6k_3d_5c, grouped):
    x, _ = blobs_6k_3d_5c
    cells, _ = grouped
    got = condense(cells, budget=300, seed=1)
    inside, outside = got.membership >= 0, got.outlier_membership >= 0
    assert not (inside & outside).any() and (inside | outside).all()
    # numpy direct: entries and outlier entries together hold all rows
    both = F.total(F.concat(got.entries, got.outliers))
    assert both.n[0] == len(x)
    np.testing.assert_allclose(both.ls[0], x.sum(axis=0), rtol=1e-9)


def test_tree_of_points_keeps_every_leaf_entry_diameter_within_threshold(blobs_6k_3d_5c):
    x, _ = blobs_6k_3d_5c
    got = condense(F.from_points(x), threshold=1.5, budget=10**6, weights=W, keep_outliers=True, seed=0)
    assert got.rebuilds == 0 and got.threshold == 1.5
    worst = 0.0
    for e in range(got.entries.m):
        rows = x[got.membership == e] * W
        if len(rows) > 1:
            # scipy pdist: diameter = RMS distance over ordered pairs (BIRCH paper definition)
            d = np.sqrt(2.0 * (pdist(rows) ** 2).sum() / (len(rows) * (len(rows) - 1)))
            worst = max(worst, d)
    assert 0.5 < worst <= 1.5 * (1 + 1e-9)


def test_radius_criterion_keeps_every_leaf_entry_radius_within_threshold(blobs_6k_3d_5c):
    x, _ = blobs_6k_3d_5c
    got = condense(F.from_points(x), threshold=0.6, criterion="radius", budget=10**6, weights=W, seed=0)
    worst = 0.0
    for e in range(got.entries.m):
        rows = x[got.membership == e] * W
        # numpy direct: radius = RMS distance to the centroid (BIRCH paper definition)
        worst = max(worst, np.sqrt(((rows - rows.mean(axis=0)) ** 2).sum(axis=1).mean()))
    assert 0.2 < worst <= 0.6 * (1 + 1e-9)


@pytest.mark.parametrize("branching,leaf_capacity", [(3, 4), (7, 5), (50, 50)])
def test_node_sizes_never_exceed_branching_and_leaf_capacity(blobs_6k_3d_5c, branching, leaf_capacity):
    x, _ = blobs_6k_3d_5c
    got = condense(F.from_points(x), threshold=0.8, budget=10**6, branching=branching,
                   leaf_capacity=leaf_capacity, seed=2)
    nodes = {v.node: v for v in got.walk()}
    leaf_levels = {v.level for v in nodes.values() if v.leaf}
    assert len(leaf_levels) == 1  # height-balanced (BIRCH paper: a B+-tree-like CF tree)
    if branching < 10:
        assert max(leaf_levels) >= 3  # the splits propagated up several levels
    for v in nodes.values():
        assert v.size <= (leaf_capacity if v.leaf else branching)
        if v.leaf:
            continue
        for j, child in enumerate(v.children):
            kid = nodes[child]
            live = kid.entries >= 0 if kid.leaf else np.ones(kid.size, dtype=bool)
            # BIRCH additivity: a nonleaf entry is the sum of its child's entries (numpy sum)
            assert v.n[j] == pytest.approx(kid.n[live].sum())
            if v.n[j] > 0:
                mean = (kid.n[live, None] * kid.centroids[live]).sum(axis=0) / kid.n[live].sum()
                np.testing.assert_allclose(v.centroids[j], mean, rtol=1e-9, atol=1e-9)


def test_budget_rebuilds_raise_threshold_until_leaf_entries_fit(blobs_6k_3d_5c):
    x, _ = blobs_6k_3d_5c
    cells = F.from_points(x)
    first = condense(cells, threshold=0.05, budget=10**6, keep_outliers=True)
    got = condense(cells, threshold=0.05, budget=250, keep_outliers=True)
    assert first.entries.m > 250  # the starting T alone does not fit the budget
    assert got.rebuilds >= 1 and got.threshold > 0.05
    assert got.entries.m <= 250
    assert sum(v.size for v in got.walk() if v.leaf) <= 250
    # numpy direct: nothing was lost through the rebuilds
    assert got.entries.n.sum() == len(x)


def test_default_threshold_fits_the_budget_and_is_zero_when_cells_already_fit(blobs_6k_3d_5c):
    x, _ = blobs_6k_3d_5c
    cells = F.from_points(x)
    got = condense(cells, budget=500)
    assert got.entries.m <= 500 and got.threshold > 0
    small = condense(cells[np.arange(300)], budget=500, keep_outliers=True)
    assert small.threshold == 0.0 and small.entries.m == 300  # distinct points stay apart at T = 0


def test_planted_far_points_end_in_the_outlier_group(blobs_6k_3d_5c):
    x, _ = blobs_6k_3d_5c
    far = np.array([[90.0, 0, 0], [0, -90.0, 0], [0, 0, 90.0], [-90.0, 90.0, 0], [60.0, 60.0, 60.0]])
    data = np.vstack([x, far])
    planted = np.arange(len(x), len(data))
    got = condense(F.from_points(data), budget=400, seed=5)
    assert (got.membership[planted] == -1).all()
    assert (got.outlier_membership[planted] >= 0).all()
    # each planted point is alone in its outlier entry (numpy direct on the rows)
    for i in planted:
        mates = np.flatnonzero(got.outlier_membership == got.outlier_membership[i])
        assert mates.tolist() == [i]
    assert (got.membership[: len(x)] >= 0).mean() > 0.9
    kept = condense(F.from_points(data), budget=400, seed=5, keep_outliers=True)
    assert (kept.membership >= 0).all() and kept.outliers.m == 0


def test_two_insertion_orders_give_the_same_kmeans_segments():
    x, y = make_blobs(n_samples=20000, n_features=4, centers=6, cluster_std=1.0, center_box=(-15, 15),
                      random_state=8)
    cells = F.from_points(x)
    labels = []
    for seed in (1, 2):
        got = condense(cells, budget=800, seed=seed)
        assert got.entries.m <= 800
        seg = kmeans(got.entries, 6, seed=0)
        row = np.where(got.membership >= 0, seg.labels[np.maximum(got.membership, 0)], -1)
        # rows of outlier entries go to the nearest segment centroid, as the refine pass would
        out = got.outlier_membership
        if got.outliers.m:
            to, _ = nearest(F.centroids(got.outliers), seg.centroids)
            row = np.where(out >= 0, to[np.maximum(out, 0)], row)
        assert (row >= 0).all()
        labels.append(row)
    # scikit-learn adjusted_rand_score between the two orders, and against make_blobs' truth
    assert adjusted_rand_score(labels[0], labels[1]) >= 0.95
    assert adjusted_rand_score(y, labels[0]) >= 0.95


def test_column_weights_act_like_scaled_columns(blobs_6k_3d_5c):
    x, _ = blobs_6k_3d_5c
    a = condense(F.from_points(x), threshold=1.2, budget=10**6, weights=W, seed=6)
    b = condense(F.from_points(x * W), threshold=1.2, budget=10**6, seed=6)
    # numpy direct: scaling the columns gives the same tree, hence the same membership
    assert adjusted_rand_score(a.membership, b.membership) > 0.999
    np.testing.assert_allclose(a.entries.n, b.entries.n)


@pytest.mark.parametrize("kwargs", [dict(branching=1), dict(leaf_capacity=1), dict(criterion="width"),
                                    dict(threshold=-1.0), dict(budget=0), dict(outlier_share=1.5),
                                    dict(weights=np.ones(2))])
def test_bad_parameters_raise_value_error(blobs_6k_3d_5c, kwargs):
    with pytest.raises(ValueError):
        condense(F.from_points(blobs_6k_3d_5c[0][:50]), **kwargs)


def test_data_shifted_to_1e9_gives_the_same_entries(blobs_6k_3d_5c):
    x, _ = blobs_6k_3d_5c
    near0 = condense(F.from_points(x), budget=300, seed=4)
    far = condense(F.from_points(x + 1e9), budget=300, seed=4)
    # DESIGN.md numerics rule: values near 1e9 with spread near 1 segment like the same data near 0
    np.testing.assert_array_equal(near0.membership, far.membership)
    assert far.threshold == pytest.approx(near0.threshold, rel=1e-6)


def test_intrinsic_dimension_of_a_plane_in_five_columns_is_about_two():
    rng = np.random.default_rng(0)
    plane = rng.uniform(size=(3000, 2)) @ rng.normal(size=(2, 5))  # numpy: a 2-d sheet in 5 columns
    cube = rng.uniform(size=(3000, 5))
    # Levina-Bickel estimate (formula recalled from memory): about 2 for the sheet, about 5 (a bit
    # under, the edges of the cube) for the filled cube
    assert 1.7 < intrinsic_dimension(plane) < 2.3
    assert 3.8 < intrinsic_dimension(cube) <= 5.0


def test_tree_shape_assumptions_name_one_parameter_each():
    from tillite.tree import CFTree

    with pytest.raises(ValueError, match="^leaf_capacity must be at least 2"):
        CFTree(2, 0.5, branching=50, leaf_capacity=1)
    with pytest.raises(ValueError, match="^branching must be at least 2"):
        CFTree(2, 0.5, branching=1, leaf_capacity=50)
