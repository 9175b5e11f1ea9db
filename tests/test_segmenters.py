"""Second-phase segmenters (tillite.segmenters) checked against references this project did not write.

Outside sources named beside each check: scipy.cluster.hierarchy (ward linkage,
fcluster), scipy.sparse.csgraph.connected_components, scipy.stats.norm,
scikit-learn (make_blobs, make_moons, make_circles, adjusted_rand_score,
calinski_harabasz_score, KMeans inertia) and numpy computed directly on the rows.
"""

import re

import numpy as np
import pytest
from scipy.cluster.hierarchy import fcluster, linkage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.stats import norm
from sklearn.cluster import KMeans
from sklearn.datasets import load_breast_cancer, load_wine, make_blobs, make_circles, make_moons
from sklearn.metrics import adjusted_rand_score, calinski_harabasz_score

from tillite import features as F
from tillite.segmenters import choose_k, components, density, format_k_table, kmeans, spherical_bic, ward

from conftest import numpy_sse

W = np.array([0.5, 2.0, 1.0])


@pytest.fixture(scope="module")
def sixty():
    x, y = make_blobs(n_samples=60, n_features=3, centers=4, cluster_std=1.2, random_state=0)
    return x, y


# ----------------------------------------------------------------------- Ward
def test_ward_heights_equal_scipy_ward_linkage_heights(sixty):
    x, _ = sixty
    got = ward(F.from_points(x), 4)
    ref = np.sort(linkage(x, method="ward")[:, 2])  # scipy.cluster.hierarchy ward linkage
    assert got.heights.shape == (59,)
    np.testing.assert_allclose(got.heights, ref, rtol=1e-9)
    # the height convention: scipy's height is sqrt(2 x Ward merge cost); for two points it is their distance
    two = ward(F.from_points(x[:2]), 1)
    assert two.heights[0] == pytest.approx(np.linalg.norm(x[0] - x[1]), rel=1e-12)


def test_ward_with_weights_equals_scipy_ward_on_scaled_columns(sixty):
    x, _ = sixty
    got = ward(F.from_points(x), 5, weights=W)
    ref = linkage(x * W, method="ward")  # scipy on the weighted columns
    np.testing.assert_allclose(got.heights, np.sort(ref[:, 2]), rtol=1e-9)
    assert adjusted_rand_score(fcluster(ref, 5, criterion="maxclust"), got.labels) == 1.0


@pytest.mark.parametrize("k", [2, 4, 7])
def test_ward_cut_equals_scipy_fcluster_maxclust(sixty, k):
    x, _ = sixty
    got = ward(F.from_points(x), k)
    ref = fcluster(linkage(x, method="ward"), k, criterion="maxclust")  # scipy
    assert len(np.unique(got.labels)) == k
    assert adjusted_rand_score(ref, got.labels) == 1.0  # scikit-learn ARI: same partition


def test_ward_merges_follow_scipy_dendrogram_numbering(sixty):
    x, _ = sixty
    got = ward(F.from_points(x), 3)
    ref = linkage(x, method="ward")  # scipy: (a, b, height, count) per merge, new clusters m + t
    np.testing.assert_allclose(got.merges[:, 2], ref[:, 2], rtol=1e-9)
    np.testing.assert_array_equal(got.merges[:, 3], ref[:, 3])
    np.testing.assert_array_equal(got.merges[:, :2], ref[:, :2])


def test_ward_on_cells_reports_exact_row_sse_and_centroids():
    x, y = make_blobs(n_samples=3000, n_features=3, centers=4, cluster_std=0.8, random_state=2)
    cell = np.floor((x - x.min(axis=0)) / 1.5).astype(np.int64)
    _, group = np.unique(cell, axis=0, return_inverse=True)
    group = group.reshape(-1)
    cells = F.from_groups(x, group)
    got = ward(cells, 4, weights=W)
    rows = got.labels[group]
    # numpy direct on the rows: SSE (weighted columns, within-cell scatter included) and means
    assert got.sse == pytest.approx(numpy_sse(x * W, rows), rel=1e-9)
    for g in range(4):
        np.testing.assert_allclose(got.centroids[g], x[rows == g].mean(axis=0), rtol=1e-9, atol=1e-9)
    assert adjusted_rand_score(y, rows) > 0.95  # scikit-learn ARI against make_blobs' truth


def test_ward_skips_empty_entries_and_rejects_bad_k(sixty):
    x, _ = sixty
    cells = F.concat(F.from_points(x[:10]), F.CF.empty(3, 2))
    got = ward(cells, 3)
    assert (got.labels[10:] == -1).all() and got.heights.shape == (9,)
    with pytest.raises(ValueError):
        ward(cells, 11)


# -------------------------------------------------------------------- density
def _grid_cells(x, width):
    """Standardise, floor(u / width) per axis, one CF per occupied cell (numpy + features)."""
    u = (x - x.mean(axis=0)) / x.std(axis=0)
    key = np.floor(u / width).astype(np.int64)
    keys, cell = np.unique(key, axis=0, return_inverse=True)
    cell = cell.reshape(-1)
    return F.from_groups(u, cell, len(keys)), keys, cell


@pytest.fixture(scope="module", params=["moons", "circles"])
def shapes(request):
    if request.param == "moons":
        x, y = make_moons(n_samples=200_000, noise=0.06, random_state=0)
    else:
        x, y = make_circles(n_samples=200_000, noise=0.05, factor=0.5, random_state=0)
    cells, keys, cell = _grid_cells(x, 0.05)
    return x, y, cells, keys, cell


def test_density_recovers_moons_and_circles_where_kmeans_cannot(shapes):
    x, y, cells, keys, cell = shapes
    assert 1000 < cells.m < 6000  # a few thousand cells for 200,000 rows
    got = density(cells, keys, noise="attach")
    assert got.n_segments == 2
    assert (got.labels >= 0).all()
    # scikit-learn ARI against the generating labels, rows labelled through their cell
    assert adjusted_rand_score(y, got.labels[cell]) >= 0.95
    km = kmeans(cells, 2, seed=0)
    assert adjusted_rand_score(y, km.labels[cell]) < 0.6
    # numpy direct: segment counts and centroids are those of the rows
    for g in range(2):
        rows = (x - x.mean(axis=0)) / x.std(axis=0)
        rows = rows[got.labels[cell] == g]
        assert got.counts[g] == len(rows)
        np.testing.assert_allclose(got.centroids[g], rows.mean(axis=0), rtol=1e-9, atol=1e-12)


def test_density_drop_leaves_sparse_cells_as_noise(shapes):
    _, y, cells, keys, cell = shapes
    got = density(cells, keys, noise="drop")
    assert got.n_segments == 2
    sparse = cells.n < got.min_count
    assert (got.labels[sparse] == -1).all() and np.array_equal(got.dense, ~sparse)
    rows = got.labels[cell] >= 0
    assert 0.9 < rows.mean() < 1.0
    # scikit-learn ARI on the rows that got a segment
    assert adjusted_rand_score(y[rows], got.labels[cell][rows]) >= 0.99


def test_density_distance_adjacency_recovers_moons():
    x, y = make_moons(n_samples=50_000, noise=0.06, random_state=3)
    cells, keys, cell = _grid_cells(x, 0.06)
    got = density(cells, keys, adjacency="distance", noise="attach")
    assert got.radius is not None and got.radius > 0
    assert adjusted_rand_score(y, got.labels[cell]) >= 0.95  # scikit-learn ARI


def test_face_adjacency_joins_cells_sharing_a_face_but_not_a_corner():
    # hand-checkable grid: (0,0)-(0,1) share a face; (1,2) touches (0,1) only at a corner;
    # (5,5)-(5,6)-(6,6) form an L through faces; (9,0) stands alone
    keys = np.array([[0, 0], [0, 1], [1, 2], [5, 5], [5, 6], [6, 6], [9, 0]])
    cells = F.from_points(keys.astype(float) + 0.5)
    cells = F.CF(cells.n * 10, cells.ls * 10, cells.ss * 10)
    got = density(cells, keys, min_count=1, min_share=0.0)
    lab = got.labels
    assert lab[0] == lab[1] and lab[3] == lab[4] == lab[5]
    assert len({lab[0], lab[2], lab[3], lab[6]}) == 4 and got.n_segments == 4


def test_default_min_count_is_a_tenth_of_the_typical_cell_count():
    n = np.array([1.0, 2.0, 3.0, 100.0, 200.0])
    cells = F.CF(n, np.zeros((5, 1)), np.zeros((5, 1)))
    got = density(cells, np.arange(5)[:, None])
    # numpy direct: 0.1 * sum(n^2) / sum(n)
    assert got.min_count == pytest.approx(0.1 * (n**2).sum() / n.sum())


def test_components_match_scipy_connected_components():
    rng = np.random.default_rng(4)
    m = 3000
    a, b = rng.integers(0, m, 2500), rng.integers(0, m, 2500)
    got = components(m, a, b)
    graph = coo_matrix((np.ones(len(a)), (a, b)), shape=(m, m))
    count, ref = connected_components(graph, directed=False)  # scipy.sparse.csgraph
    assert got.max() + 1 == count
    assert adjusted_rand_score(ref, got) == 1.0


# ------------------------------------------------------------------ choosing k
@pytest.mark.parametrize("k,d,std", [(3, 4, 0.5), (5, 5, 1.0), (8, 6, 0.8)])
def test_choose_k_recovers_the_true_number_of_blobs(k, d, std):
    x, y = make_blobs(n_samples=3000, n_features=d, centers=k, cluster_std=std, center_box=(-20, 20),
                      random_state=k)
    got = choose_k(F.from_points(x), range(2, 12), n_init=4, seed=0)
    assert got.k == k
    assert [row["k"] for row in got.table] == list(range(2, 12))
    assert adjusted_rand_score(y, got.result.labels) == 1.0  # scikit-learn ARI against make_blobs' truth
    by_bic = choose_k(F.from_points(x), range(2, 12), n_init=4, seed=0, rule="bic")
    assert by_bic.k == k  # equal spreads: the shared-variance BIC agrees


def test_choose_k_scores_equal_sklearn_calinski_harabasz_and_kmeans_sse():
    x, _ = make_blobs(n_samples=2000, n_features=4, centers=5, cluster_std=1.0, center_box=(-20, 20),
                      random_state=1)
    got = choose_k(F.from_points(x), [2, 3, 5, 7], n_init=3, seed=2)
    for row in got.table:
        labels = kmeans(F.from_points(x), row["k"], n_init=3, seed=2).labels
        # scikit-learn calinski_harabasz_score and numpy SSE on the same assignment
        assert row["calinski_harabasz"] == pytest.approx(calinski_harabasz_score(x, labels), rel=1e-9)
        assert row["sse"] == pytest.approx(numpy_sse(x, labels), rel=1e-9)
    chosen = got.result.labels
    best = max(got.table, key=lambda r: r["calinski_harabasz"])
    assert best["k"] == got.k == 5
    assert best["calinski_harabasz"] == pytest.approx(calinski_harabasz_score(x, chosen), rel=1e-9)


def test_spherical_bic_equals_direct_gaussian_log_likelihood():
    x, _ = make_blobs(n_samples=500, n_features=3, centers=3, random_state=5)
    labels = kmeans(F.from_points(x), 3, seed=0).labels
    counts = np.bincount(labels).astype(float)
    sse = numpy_sse(x, labels)
    log_l, p, bic = spherical_bic(counts, sse, 3)
    # scipy.stats.norm: hard-assigned mixture, shared variance sse / (N d), mixing weights N_j / N
    means = np.array([x[labels == g].mean(axis=0) for g in range(3)])
    sd = np.sqrt(sse / (len(x) * 3))
    direct = norm.logpdf(x, loc=means[labels], scale=sd).sum() + np.log(counts[labels] / len(x)).sum()
    assert log_l == pytest.approx(direct, rel=1e-12)
    assert p == 3 * 3 + 1 + 2
    assert bic == pytest.approx(-2 * direct + p * np.log(len(x)), rel=1e-12)


def test_format_k_table_lists_every_candidate_and_marks_the_choice():
    x, _ = make_blobs(n_samples=600, n_features=2, centers=3, cluster_std=0.5, center_box=(-20, 20),
                      random_state=0)
    got = choose_k(F.from_points(x), [2, 3, 4], n_init=2)
    text = format_k_table(got)
    lines = text.splitlines()
    assert any(line.strip().startswith("3*") for line in lines)
    assert sum(1 for line in lines if line[:4].strip().rstrip("*").isdigit()) == 3
    assert "chosen k = 3" in text


# --------------------------------------------------------------------- kmeans
def test_kmeans_keeps_its_signature_and_exact_sse():
    x, _ = make_blobs(n_samples=1500, n_features=3, centers=4, random_state=3)
    got = kmeans(F.from_points(x), 4, None, 5, seed=1, init=None)
    assert got.sse == pytest.approx(numpy_sse(x, got.labels), rel=1e-9)  # numpy direct


def test_ward_of_data_shifted_to_1e9_gives_the_same_cut(sixty):
    x, _ = sixty
    near0 = ward(F.from_points(x), 4)
    far = ward(F.from_points(x + 1e9), 4)
    # DESIGN.md numerics rule; heights compared with scipy's on the unshifted data
    assert adjusted_rand_score(near0.labels, far.labels) == 1.0
    np.testing.assert_allclose(far.heights, np.sort(linkage(x, method="ward")[:, 2]), rtol=1e-6)


# ------------------------------------------------- many segments (issue 15) and speed (issue 12)
def _grid_pattern(seed):
    """The BIRCH paper's first pattern (Zhang, Ramakrishnan, Livny 1996; recalled from memory): 100
    Gaussian clusters of 1,000 points on a 10 x 10 grid, centres 4 sqrt(2) apart, radius sqrt(2)
    (standard deviation 1 per axis in two dimensions)."""
    rng = np.random.default_rng(seed)
    g = np.arange(10) * 4 * np.sqrt(2)
    centers = np.array([(a, b) for a in g for b in g])
    truth = np.repeat(np.arange(100), 1000)
    return centers[truth] + rng.normal(size=(truth.size, 2)), centers


def _random_pattern(seed):
    """The paper's third pattern (recalled from memory): 100 clusters, centres uniform in the grid
    pattern's square, radius uniform in [0, 4], sizes uniform in [0, 2000]."""
    rng = np.random.default_rng(seed)
    centers = rng.uniform(0, 40 * np.sqrt(2), size=(100, 2))
    radius = rng.uniform(0, 4, 100)
    truth = np.repeat(np.arange(100), rng.integers(0, 2001, 100))
    return centers[truth] + rng.normal(size=(truth.size, 2)) * (radius[truth] / np.sqrt(2))[:, None], centers


def _cells_like_the_cell_pass(x, budget=17_000):
    """Standardise, then floor(u / width) with the width that gives about ``budget`` cells."""
    u = (x - x.mean(axis=0)) / x.std(axis=0)
    lo, hi = 1e-4, 10.0
    for _ in range(40):
        width = np.sqrt(lo * hi)
        if np.unique(np.floor(u / width).astype(np.int64), axis=0).shape[0] > budget:
            lo = width
        else:
            hi = width
    _, cell = np.unique(np.floor(u / hi).astype(np.int64), axis=0, return_inverse=True)
    return F.from_groups(u, cell.reshape(-1)), u


def _sse_at(u, centers):
    """numpy direct: every row to its nearest of the given centres."""
    return sum(float(((u[lo:lo + 10_000, None, :] - centers[None]) ** 2).sum(axis=2).min(axis=1).sum())
               for lo in range(0, len(u), 10_000))


def _refined(u, centers, passes=3):
    """The pipeline's refine passes (Lloyd steps on the rows), in numpy; the SSE after them."""
    for _ in range(passes):
        near = ((u[:, None, :] - centers[None]) ** 2).sum(axis=2).argmin(axis=1)
        centers = np.array([u[near == j].mean(axis=0) if (near == j).any() else centers[j]
                            for j in range(len(centers))])
    return _sse_at(u, centers)


@pytest.fixture(scope="module", params=["grid", "random"])
def hundred_clusters(request):
    x, centers = (_grid_pattern if request.param == "grid" else _random_pattern)(0)
    cells, u = _cells_like_the_cell_pass(x)
    at_generating = _sse_at(u, (centers - x.mean(axis=0)) / x.std(axis=0))
    # scikit-learn KMeans(n_init=3) on the standardised rows: the reference
    inertia = KMeans(n_clusters=100, n_init=3, random_state=0).fit(u).inertia_
    return request.param, cells, u, at_generating, inertia


def test_kmeans_at_k100_finds_the_generating_solution_for_nine_of_ten_seeds(hundred_clusters):
    pattern, cells, u, at_generating, inertia = hundred_clusters
    runs = [kmeans(cells, 100, seed=seed) for seed in range(10)]
    # numpy SSE of the rows at the generating centres (nearest centre): within 0.5% for 9 of 10 seeds
    assert sum(r.sse <= 1.005 * at_generating for r in runs) >= 9
    if pattern == "grid":
        # scikit-learn KMeans(n_init=3) on the rows: the cell-phase SSE alone is within 0.2%
        assert max(r.sse for r in runs) <= 1.002 * inertia
    else:
        # overlapping clusters of random radii: a cell goes whole to one segment, so the cell-phase
        # SSE stays up to about 0.4% above; after the three default refine passes (numpy Lloyd steps
        # on the rows) within 0.2% of scikit-learn KMeans(n_init=3) on the rows
        assert max(r.sse for r in runs) <= 1.006 * inertia
        assert max(_refined(u, r.centroids) for r in runs[:3]) <= 1.002 * inertia


def test_warm_start_with_two_clusters_merged_and_one_split_recovers_the_grid_pattern():
    x, centers = _grid_pattern(1)
    cells, u = _cells_like_the_cell_pass(x, 8_000)
    good = (centers - x.mean(axis=0)) / x.std(axis=0)
    bad = good.copy()
    bad[0] = (good[0] + good[1]) / 2  # one centre between two clusters ...
    bad[1] = good[55] + 0.05  # ... and two centres inside one: what refresh may start from
    got = kmeans(cells, 100, init=bad)
    # numpy SSE at the generating centres; a plain Lloyd run stays about 7% above it
    assert got.sse <= 1.005 * _sse_at(u, good)
    assert got.moves >= 1
    plain = kmeans(cells, 100, init=bad, relocate=False)
    assert plain.sse > 1.02 * _sse_at(u, good)


def _binned(u, width):
    """Cells of the rows: floor(u / width) per column; (cells, cell of each row)."""
    _, cell = np.unique(np.floor(u / width).astype(np.int64), axis=0, return_inverse=True)
    cell = cell.reshape(-1)
    return F.from_groups(u, cell), cell


@pytest.mark.parametrize("loader", [load_wine, load_breast_cancer], ids=["wine", "breast_cancer"])
@pytest.mark.parametrize("k", [2, 3, 5, 8, 12])
def test_faster_second_phase_reaches_weighted_sklearn_kmeans_on_bundled_real_data(loader, k):
    x = loader().data  # bundled real datasets (scikit-learn)
    u = (x - x.mean(axis=0)) / x.std(axis=0)
    # one row per cell, and cells of several rows as the cell pass makes them
    for cells, cell in ((F.from_points(u), np.arange(len(u))), _binned(u, 2.0)):
        if cells.m < 3 * k:
            continue
        got = kmeans(cells, k, seed=0)
        # scikit-learn KMeans(n_init=10) on the cell centroids weighted by their counts (the plain
        # k-means++ restarts the second phase ran before), plus the exact within-cell scatter; the
        # comparison with the previous code itself (within 1e-6) is printed by bench_second_phase.py
        ref = KMeans(n_clusters=k, n_init=10, random_state=0).fit(F.centroids(cells), sample_weight=cells.n).inertia_
        assert got.sse <= (ref + F.sse(cells)) * 1.002
        assert got.sse == pytest.approx(numpy_sse(u, got.labels[cell]), rel=1e-9)  # numpy direct on the rows


def test_kmeans_reports_progress_on_long_runs(monkeypatch):
    import tillite.segmenters as S

    monkeypatch.setattr(S, "PROGRESS_EVERY", 0.0)
    x, _ = make_blobs(n_samples=2000, n_features=2, centers=6, random_state=0)
    lines = []
    kmeans(F.from_points(x), 6, n_init=3, progress=lines.append)
    assert any(re.search(r"restart (\d+) of \1,", line) for line in lines)  # the last restart is announced


# ------------------------------------------------------------- k = 1 (issue 9)
@pytest.mark.parametrize("d", [2, 4, 8])
def test_choose_k_keeps_one_segment_for_one_gaussian_blob(d):
    x, _ = make_blobs(n_samples=4000, n_features=d, centers=1, random_state=d)  # scikit-learn: one blob
    got = choose_k(F.from_points(x), range(1, 13), n_init=3)
    assert got.k == 1 and (got.result.labels == 0).all()
    assert "one segment" in format_k_table(got).splitlines()[-1]


def test_choose_k_with_one_as_candidate_still_finds_separated_blobs():
    x, y = make_blobs(n_samples=3000, n_features=3, centers=4, cluster_std=0.8, center_box=(-20, 20), random_state=1)
    got = choose_k(F.from_points(x), range(1, 13), n_init=3)
    assert got.k == 4 and adjusted_rand_score(y, got.result.labels) == 1.0  # scikit-learn ARI
    assert "largest Calinski-Harabasz" in got.reason and "higher than the best split" in got.reason


# ---------------------------------------------------------- Ward on entries
def test_ward_cut_of_weighted_entries_equals_scipy_on_centroids_repeated_by_count():
    rng = np.random.default_rng(5)
    x, _ = make_blobs(n_samples=400, n_features=3, centers=5, random_state=4)
    counts = rng.integers(1, 6, size=len(x)).astype(float)
    cells = F.CF(counts, x * counts[:, None], x * x * counts[:, None])  # each entry: count copies of one point
    got = ward(cells, 5)
    rows = np.repeat(np.arange(len(x)), counts.astype(int))
    # scipy ward linkage on the centroids repeated n times: identical copies merge first at height 0,
    # after which each entry is one cluster of n points, as in Ward on the weighted entries
    ref = fcluster(linkage(x[rows], method="ward"), 5, criterion="maxclust")
    assert adjusted_rand_score(ref, got.labels[rows]) == 1.0


# ------------------------------------------------ relocation splits, distinct restarts
def test_split_of_every_segment_at_once_gains_the_numpy_sse_drop_of_its_two_centers(sixty):
    from tillite.segmenters import _split_all

    x, y = sixty
    rng = np.random.default_rng(3)
    w = rng.integers(1, 5, size=len(x)).astype(np.float64)
    gain, ca, cb = _split_all(x, w, y, 4)
    for j in range(4):
        xs, ws = x[y == j], w[y == j]
        mean = ws @ xs / ws.sum()
        before = ws @ ((xs - mean) ** 2).sum(axis=1)  # numpy on the segment's own points
        after = ws @ np.minimum(((xs - ca[j]) ** 2).sum(axis=1), ((xs - cb[j]) ** 2).sum(axis=1))
        assert gain[j] == pytest.approx(before - after, rel=1e-9)
        assert gain[j] > 0.0
        alone = _split_all(xs, ws, np.zeros(len(xs), dtype=np.int64), 1)  # the segment split on its own
        assert alone[0][0] == pytest.approx(gain[j], rel=1e-9)


def test_split_gains_nothing_on_a_single_cell_or_an_empty_segment():
    from tillite.segmenters import _split_all

    x = np.array([[0.0, 0.0], [1.0, 0.0], [5.0, 5.0]])
    gain, _, _ = _split_all(x, np.ones(3), np.array([0, 0, 1]), 3)
    assert gain[0] == pytest.approx(0.5)  # two unit-weight points 1 apart: scatter 0.5, all of it removed
    assert gain[1] == 0.0 and gain[2] == 0.0


def test_restarts_on_the_same_partition_are_finished_once_with_the_same_result(monkeypatch):
    import tillite.segmenters as S

    x, _ = make_blobs(n_samples=400, n_features=3, centers=6, cluster_std=1.5, random_state=2)
    cells = F.from_points(x)
    assert S._partition_key(np.array([2, 2, 0, 1])) == S._partition_key(np.array([0, 0, 1, 2]))
    assert S._partition_key(np.array([2, 2, 0, 1])) != S._partition_key(np.array([0, 1, 1, 2]))
    got = kmeans(cells, 6, seed=4)
    monkeypatch.setattr(S, "_distinct", lambda runs: list(runs))  # every restart finished and relocated again
    every = kmeans(cells, 6, seed=4)
    assert got.sse == every.sse
    np.testing.assert_array_equal(got.labels, every.labels)
    assert got.sse <= 1.002 * KMeans(6, n_init=10, random_state=0).fit(x).inertia_  # scikit-learn KMeans objective


def test_restarts_drawn_together_return_the_means_and_numpy_weighted_sse_of_their_labels():
    import tillite.segmenters as S

    x, _ = make_blobs(n_samples=300, n_features=3, centers=5, random_state=3)  # scikit-learn blobs
    w = np.random.default_rng(1).integers(1, 40, len(x)).astype(float)
    got = S._brief_restarts_together(x, w, 5, 8, np.random.default_rng(0))
    assert len(got) == 8
    for centers, labels, cost, iterations in got:
        assert 1 <= iterations <= S.BRIEF_ITER
        for c in range(5):  # numpy: weighted mean of each segment's points
            mine = labels == c
            if mine.any():
                np.testing.assert_allclose(centers[c], np.average(x[mine], axis=0, weights=w[mine]), rtol=1e-9, atol=1e-12)
        assert cost == pytest.approx(float((w * ((x - centers[labels]) ** 2).sum(axis=1)).sum()), rel=1e-9)  # numpy direct
