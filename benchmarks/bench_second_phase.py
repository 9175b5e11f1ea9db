"""The in-memory second phase against its targets (issues 15 and 12), old code beside new.

    python benchmarks/bench_second_phase.py             # everything, 10 seeds
    python benchmarks/bench_second_phase.py --seeds 3   # quicker
    python benchmarks/bench_second_phase.py --no-old    # skip the previous code (it is slow at k = 100)

"old" is the second phase of the main branch (``git show main:src/tillite/segmenters.py``,
loaded as a module); "new" is this checkout.  Cells are made in numpy the way the cell
pass makes them: standardised rows, floor(u / width) per axis (the top 4 principal axes
above 6 columns), the width bisected to the cell budget.  Times are wall and CPU seconds
(medians); the box is shared, so CPU seconds are the steadier figure.  Not a pass/fail test.

Data (generated here, seeded):
- grid: the BIRCH paper's first pattern (recalled from memory): 100 Gaussian clusters of
  1,000 points on a 10 x 10 grid, centres 4 sqrt(2) apart, radius sqrt(2); about 17,000 cells.
- random: its third pattern (recalled from memory): 100 clusters, random centres, radius in
  [0, 4], sizes in [0, 2000]; about 17,000 cells.
- wide: 300,000 rows x 8 columns from 12 overlapping anisotropic Gaussians; 20,000 cells
  on 4 principal axes (issue 12's "default budget, up to 8 columns").
- wine, breast_cancer: scikit-learn's bundled real datasets, one row per cell.
"""

from __future__ import annotations

import argparse
import importlib.util
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from sklearn.cluster import KMeans
from sklearn.datasets import load_breast_cancer, load_wine

from tillite import features as F
from tillite import segmenters as new
from tillite.pipeline import Settings, run_second_phase


def load_old():
    """main's segmenters.py as a module (None when git or the branch is missing)."""
    try:
        text = subprocess.run(["git", "show", "main:src/tillite/segmenters.py"], capture_output=True, text=True,
                              check=True, cwd=Path(__file__).resolve().parent).stdout
    except (OSError, subprocess.CalledProcessError):
        return None
    path = Path(tempfile.mkdtemp()) / "old_segmenters.py"
    path.write_text(text)
    spec = importlib.util.spec_from_file_location("tillite._old_segmenters", path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod
    spec.loader.exec_module(mod)
    return mod


def grid_pattern(seed):
    rng = np.random.default_rng(seed)
    g = np.arange(10) * 4 * np.sqrt(2)
    centers = np.array([(a, b) for a in g for b in g])
    truth = np.repeat(np.arange(100), 1000)
    return centers[truth] + rng.normal(size=(truth.size, 2)), centers


def random_pattern(seed):
    rng = np.random.default_rng(seed)
    centers = rng.uniform(0, 40 * np.sqrt(2), size=(100, 2))
    radius = rng.uniform(0, 4, 100)
    truth = np.repeat(np.arange(100), rng.integers(0, 2001, 100))
    return centers[truth] + rng.normal(size=(truth.size, 2)) * (radius[truth] / np.sqrt(2))[:, None], centers


def wide_pattern(seed, rows=300_000, cols=8, comps=12):
    rng = np.random.default_rng(seed)
    centers = rng.normal(scale=3.0, size=(comps, cols))
    truth = rng.choice(comps, size=rows, p=rng.dirichlet(np.ones(comps)))
    mix = rng.normal(size=(comps, cols, cols)) * 0.6
    return centers[truth] + np.einsum("ij,ijk->ik", rng.normal(size=(rows, cols)), mix[truth])


def cells_of(x, budget):
    """(cells, standardised rows): floor(u / width) on u (or its top 4 principal axes above 6 columns)."""
    u = (x - x.mean(axis=0)) / x.std(axis=0)
    b = u @ np.linalg.eigh(np.cov(u.T))[1][:, -4:] if u.shape[1] > 6 else u
    lo, hi = 1e-4, 10.0
    for _ in range(40):
        width = np.sqrt(lo * hi)
        if np.unique(np.floor(b / width).astype(np.int64), axis=0).shape[0] > budget:
            lo = width
        else:
            hi = width
    _, cell = np.unique(np.floor(b / hi).astype(np.int64), axis=0, return_inverse=True)
    return F.from_groups(u, cell.reshape(-1)), u


def sse_at(u, centers):
    return sum(float(((u[lo:lo + 10_000, None, :] - centers[None]) ** 2).sum(axis=2).min(axis=1).sum())
               for lo in range(0, len(u), 10_000))


def refined(u, centers, passes=3):
    """SSE after the pipeline's default three refine passes (Lloyd steps on the rows, in numpy)."""
    for _ in range(passes):
        near = np.concatenate([((u[lo:lo + 10_000, None, :] - centers[None]) ** 2).sum(axis=2).argmin(axis=1)
                               for lo in range(0, len(u), 10_000)])
        centers = np.array([u[near == j].mean(axis=0) if (near == j).any() else centers[j] for j in range(len(centers))])
    return sse_at(u, centers)


def timed(fn, *args, **kwargs):
    t, c = time.perf_counter(), time.process_time()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - t, time.process_time() - c


def med(values):
    return statistics.median(values) if values else float("nan")


def line(target, measured):
    print(f"  {target:<62} {measured}")


def issue_15(old, seeds):
    print("Issue 15: k = 100 on the BIRCH patterns (data seed 0; second-phase seeds 0..%d)" % (seeds - 1))
    for name, maker in (("grid", grid_pattern), ("random", random_pattern)):
        x, centers = maker(0)
        cells, u = cells_of(x, 17_000)
        gen = sse_at(u, (centers - x.mean(axis=0)) / x.std(axis=0))
        inertia = KMeans(n_clusters=100, n_init=3, random_state=0).fit(u).inertia_
        print(f" {name}: {cells.m:,} cells; SSE at generating centres {gen:.6g}; scikit-learn KMeans(n_init=3) on rows {inertia:.6g}")
        for label, mod in (("old", old), ("new", new)):
            if mod is None:
                continue
            runs = [timed(mod.kmeans, cells, 100, seed=s) for s in range(seeds)]
            ok = sum(r.sse <= 1.005 * gen for r, _, _ in runs)
            worst = max(r.sse for r, _, _ in runs) / inertia
            after = max(refined(u, r.centroids) for r, _, _ in runs[:3]) / inertia
            line(f"{label}: SSE within 0.5% of generating, >= 9 of 10", f"{ok} of {seeds}")
            line(f"{label}: worst cell SSE / sklearn n_init=3 (target <= 1.002)", f"{worst:.4f}")
            line(f"{label}: worst after 3 refine passes / sklearn (first 3 seeds)", f"{after:.4f}")
            line(f"{label}: second phase at k=100 (target <= 2 s)",
                 f"wall median {med([w for _, w, _ in runs]):.2f} s, CPU median {med([c for _, _, c in runs]):.2f} s")


def issue_12(old, repeat):
    x = wide_pattern(0)
    cells, _ = cells_of(x, 20_000)
    print(f"Issue 12 items 1-2: wide data, {cells.m:,} cells x {cells.d} columns, default restarts")
    for k in (8, 16, 20):
        got = {}
        for label, mod in (("old", old), ("new", new)):
            if mod is None:
                continue
            runs = [timed(mod.kmeans, cells, k, seed=s) for s in range(repeat)]
            got[label] = runs
            line(f"{label}: k={k} second phase (target <= 0.5 s)",
                 f"wall median {med([w for _, w, _ in runs]):.2f} s, CPU median {med([c for _, _, c in runs]):.2f} s")
        if "old" in got:
            ratio = max(n[0].sse / o[0].sse for n, o in zip(got["new"], got["old"]))
            line(f"k={k}: worst SSE new / old over {repeat} seeds (target <= 1 + 1e-6)", f"{ratio:.7f}")
    for label, mod in (("old", old), ("new", new)):
        if mod is None:
            continue
        got, wall, cpu = timed(mod.choose_k, cells, range(2, 13))
        line(f"{label}: choice of k over 2..12 (target <= 3 s)", f"wall {wall:.2f} s, CPU {cpu:.2f} s, chose k={got.k}")
    print("Issue 12 item 3: Ward, k = 8, default budget")
    for name, data in (("wide", cells), ("grid", cells_of(grid_pattern(0)[0], 17_000)[0])):
        w = np.ones(data.d)
        phase, wall, cpu = timed(run_second_phase, data, np.zeros((data.m, 1)), Settings(k=8, method="ward"), w, name,
                                 lambda *_: None)
        line(f"new: Ward on {data.m:,} cells of {name} (target <= 1.5 s)",
             f"wall {wall:.2f} s, CPU {cpu:.2f} s, condensed to {phase.params['tree']['entries']:,} entries first")
        if old is not None:
            _, wall, cpu = timed(old.ward, data, 8)
            line(f"old: exact Ward on all {data.m:,} cells", f"wall {wall:.2f} s, CPU {cpu:.2f} s")


def real_data(old):
    if old is None:
        return
    print("Issue 12 check: bundled real data, one row per cell, seed 0 (target: new SSE <= old x (1 + 1e-6))")
    for loader in (load_wine, load_breast_cancer):
        x = loader().data
        cells = F.from_points((x - x.mean(axis=0)) / x.std(axis=0))
        ratios = {k: new.kmeans(cells, k, seed=0).sse / old.kmeans(cells, k, seed=0).sse for k in range(2, 13)}
        worst = max(ratios, key=ratios.get)
        line(f"{loader.__name__[5:]}: worst new / old over k = 2..12", f"{ratios[worst]:.7f} (k={worst}), "
             f"best {min(ratios.values()):.5f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seeds", type=int, default=10, help="second-phase seeds on the BIRCH patterns")
    ap.add_argument("--repeat", type=int, default=3, help="seeds per timing on the wide data")
    ap.add_argument("--no-old", action="store_true", help="skip the previous code")
    args = ap.parse_args()
    old = None if args.no_old else load_old()
    real_data(old)
    issue_12(old, args.repeat)
    issue_15(old, args.seeds)


if __name__ == "__main__":
    main()
