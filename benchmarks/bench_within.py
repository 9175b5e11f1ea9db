"""Cost of `segment --within` with 50 groups beside one global segmentation of the same table.

    python benchmarks/bench_within.py [--rows 2000000] [--groups 50] [--k 4] [--repeat 3]

Builds the demo database once (in /tmp, `tillite demo`'s generator) and adds a column
``route`` = meter_id % GROUPS (50 groups of about equal size; the demo's own ``district`` has
only 6 values).  Then, in one process, alternating the two, median of --repeat runs each:
  - a global segmentation of the demo's five columns (k as given);
  - the same with --within route (k per group).
Both include the profile sample, the cell pass, the second phase and the refine passes.
Target: --within <= 1.5 x the global run.  Not a pass/fail test: the machine is shared.
"""

from __future__ import annotations

import argparse
import statistics
import time
import warnings
from pathlib import Path

import duckdb

from tillite import demo
from tillite.engines import DuckDBEngine
from tillite.pipeline import Settings, segment
from tillite.sqlgen import Source

TARGET = 1.5


def build(rows: int, groups: int) -> Path:
    path = Path(f"/tmp/tillite-bench-within-{rows}-{groups}.duckdb")
    if not path.exists():
        tmp = path.with_suffix(".building")
        if tmp.exists():
            tmp.unlink()
        demo.build_demo_database(tmp, rows=rows, replace=True)
        con = duckdb.connect(str(tmp))
        con.execute(f"CREATE TABLE routed AS SELECT *, meter_id % {int(groups)} AS route FROM meter_days")
        con.close()
        tmp.rename(path)
    return path


def routed_arguments(doc: str | None) -> argparse.Namespace:
    """The options of the benchmarks on the routed demo table (this one, bench_within_categorical, bench_store_within)."""
    ap = argparse.ArgumentParser(description=doc.splitlines()[0] if doc else None)
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--groups", type=int, default=50)
    ap.add_argument("--k", type=int, default=4)
    ap.add_argument("--repeat", type=int, default=3)
    return ap.parse_args()


def main() -> None:
    args = routed_arguments(__doc__)
    path = build(args.rows, args.groups)
    src = Source.of_table("routed")
    columns = list(demo.DEMO_COLUMNS)
    times: dict[str, list[float]] = {"global": [], "within": []}
    stages: dict[str, dict] = {}
    with DuckDBEngine(str(path), read_only=True) as engine:
        for _ in range(args.repeat):
            for kind in ("global", "within"):
                t0 = time.perf_counter()
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    model = segment(engine, src, columns, Settings(k=args.k, within="route" if kind == "within" else None))
                times[kind].append(time.perf_counter() - t0)
                stages[kind] = model.timings
    g, w = statistics.median(times["global"]), statistics.median(times["within"])
    print(f"demo table: {args.rows:,} rows x {len(columns)} columns, --within route: {args.groups} groups, k={args.k}, "
          f"median of {args.repeat} (shared, loaded machine)")
    for kind in ("global", "within"):
        parts = ", ".join(f"{name} {sec:.2f}" for name, sec in stages[kind].items() if name != "total")
        print(f"  {kind:6s}  {statistics.median(times[kind]):7.2f} s   (last run's stages: {parts})")
    print(f"--within / global = {w / g:.2f}x   (target <= {TARGET}x: {'met' if w / g <= TARGET else 'missed'})")


if __name__ == "__main__":
    main()
