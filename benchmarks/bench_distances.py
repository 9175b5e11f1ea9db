"""The chunked distance loops of segmenters.py and tree.py, main's copies beside this checkout's.

    python benchmarks/bench_distances.py            # 4,000 cells x 4 columns, 7 repeats
    python benchmarks/bench_distances.py --cells 10000 --repeat 5

"old" is the code of the main branch (``git show main:src/tillite/{segmenters,tree}.py``,
loaded as modules); "new" is this checkout, where the five loops go through distances.py.
Old and new run interleaved in one process; the figures are median wall and CPU seconds and
the new / old ratio of the CPU medians (the box is shared: CPU seconds are the steadier
figure).  Each line also says whether the results are identical, bit for bit.  Not a test.
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

import tillite  # noqa: F401 (the old modules load as tillite submodules)
from tillite import segmenters as new_seg
from tillite import tree as new_tree


def load_main(module: str):
    """main's src/tillite/<module>.py as a module."""
    text = subprocess.run(["git", "show", f"main:src/tillite/{module}.py"], capture_output=True, text=True,
                          check=True, cwd=Path(__file__).resolve().parent).stdout
    path = Path(tempfile.mkdtemp()) / f"old_{module}.py"
    path.write_text(text)
    spec = importlib.util.spec_from_file_location(f"tillite._old_{module}", path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod
    spec.loader.exec_module(mod)
    return mod


def timed(fn):
    w, c = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - w, time.process_time() - c


def same(a, b) -> bool:
    if isinstance(a, tuple):
        return all(same(x, y) for x, y in zip(a, b))
    return bool(np.array_equal(np.asarray(a), np.asarray(b)))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--cells", type=int, default=4000, help="rows of the cell centroid matrix")
    ap.add_argument("--repeat", type=int, default=7, help="timed runs of each side")
    args = ap.parse_args()
    old_seg, old_tree = load_main("segmenters"), load_main("tree")
    rng = np.random.default_rng(0)
    x = rng.normal(size=(args.cells, 4)) * 3.0
    ref = x[rng.choice(args.cells, args.cells // 4, replace=False)] + 0.01
    n = rng.integers(1, 40, args.cells).astype(float)
    s = rng.random(args.cells) * n
    radius = new_seg.default_radius(x)
    cases = [
        ("segmenters: density radius", lambda m: m.default_radius(x)),
        ("segmenters: pairs within radius", lambda m: m._near_pairs(x, radius)),
        ("segmenters: nearest dense cell", lambda m: (m.nearest_rows if m is new_seg else m._nearest_rows)(x, ref)),
        ("tree: merged size to nearest item", lambda m: m._merged_sq_to_nearest(n, x, s, "diameter")),
        ("tree: intrinsic dimension", lambda m: m.intrinsic_dimension(x)),
    ]
    print(f"{args.cells:,} cells x 4 columns, {args.repeat} runs per side (loaded machine: compare ratios)")
    for name, call in cases:
        mods = (old_tree, new_tree) if name.startswith("tree") else (old_seg, new_seg)
        walls, cpus, outs = ([], []), ([], []), [None, None]
        for _ in range(args.repeat):
            for side, mod in enumerate(mods):
                outs[side], w, c = timed(lambda: call(mod))
                walls[side].append(w)
                cpus[side].append(c)
        ow, nw = statistics.median(walls[0]), statistics.median(walls[1])
        oc, nc = statistics.median(cpus[0]), statistics.median(cpus[1])
        print(f"  {name:<36} old wall {ow:.3f} s CPU {oc:.3f} s | new wall {nw:.3f} s CPU {nc:.3f} s"
              f" | CPU new/old {nc / oc:.2f} | identical: {same(outs[0], outs[1])}")


if __name__ == "__main__":
    main()
