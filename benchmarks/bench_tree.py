"""Time ``tillite.tree.condense`` on 100,000 cell CFs of 8 columns (default parameters).

    python benchmarks/bench_tree.py                  # 100,000 cells, median of 3
    python benchmarks/bench_tree.py --cells 20000 --repeat 5
    python benchmarks/bench_tree.py --profile        # cProfile of one run, top 25 by own time

The cells are CFs of small groups of points (``--group`` points each) around
standardised blob points (scikit-learn make_blobs, 8 columns, 10 centres in a
box (-10, 10), cluster_std 1), each group within +-0.05 of its centre, like the
rows of one grid cell of the cell pass.
Prints wall seconds (median of --repeat, runs seeded 0, 1, 2, ...) and CPU
seconds (the box is shared: CPU time is steadier), leaf entries, outlier
entries, final threshold and rebuilds of the last run.  Target: under 2 s on the 2-core development box.
Not a pass/fail test.
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import statistics
import time

import numpy as np
from sklearn.datasets import make_blobs

from tillite import features as F
from tillite.tree import condense


def cells(count: int, cols: int, group: int, seed: int, spread: float = 0.05) -> F.CF:
    """``count`` CFs of ``group`` points each, standardised like the cell pass.

    Cell centres are blob points; each cell's points scatter uniformly within
    +-``spread`` (standardised units) of its centre, like the rows of one grid cell.
    """
    rng = np.random.default_rng(seed)
    center, _ = make_blobs(n_samples=count, n_features=cols, centers=10, cluster_std=1.0,
                           center_box=(-10, 10), random_state=seed)
    center = (center - center.mean(axis=0)) / center.std(axis=0)
    x = np.repeat(center, group, axis=0) + rng.uniform(-spread, spread, size=(count * group, cols))
    return F.from_groups(x, np.repeat(np.arange(count), group), count)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--cells", type=int, default=100_000)
    ap.add_argument("--cols", type=int, default=8)
    ap.add_argument("--group", type=int, default=4, help="points per cell")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--profile", action="store_true", help="cProfile one run instead of timing")
    args = ap.parse_args()
    cf = cells(args.cells, args.cols, args.group, args.seed)
    if args.profile:
        prof = cProfile.Profile()
        prof.enable()
        condense(cf, seed=args.seed)
        prof.disable()
        pstats.Stats(prof).sort_stats("tottime").print_stats(25)
        return
    times, cpu, got = [], [], None
    for r in range(args.repeat):
        t, c = time.perf_counter(), time.process_time()
        got = condense(cf, seed=args.seed + r)
        times.append(time.perf_counter() - t)
        cpu.append(time.process_time() - c)
    print(f"condense: {cf.m:,} cells x {cf.d} columns, defaults (budget {got.budget}, B {got.branching}, "
          f"L {got.leaf_capacity}, {got.criterion})")
    print(f"seconds: median {statistics.median(times):.3f} of {args.repeat} ({', '.join(f'{t:.3f}' for t in times)}); "
          f"CPU seconds median {statistics.median(cpu):.3f}")
    print(f"leaf entries {got.entries.m:,}, outlier entries {got.outliers.m:,} "
          f"({int((got.membership < 0).sum()):,} cells), threshold {got.threshold:.4g}, rebuilds {got.rebuilds}")


if __name__ == "__main__":
    main()
