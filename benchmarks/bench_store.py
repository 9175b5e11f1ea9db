"""Refresh cost against a full store build: 60 daily partitions, one changed.

    python benchmarks/bench_store.py                  # 6M meter-days (100,000 per day)
    python benchmarks/bench_store.py --rows 1200000   # quicker

Prints the full build time, the refresh time after one partition changed (and
after none changed), the plain scan for scale, and the refresh/build ratio
(target <= 0.1).  Medians of --repeat runs, measured in one process on one
database, so the ratios compare like with like.  Not a pass/fail test.
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from tillite import DuckDBEngine, Settings, Source
from tillite import store as S
from tillite.demo import DEMO_COLUMNS, build_demo_database


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=6_000_000)
    ap.add_argument("--days", type=int, default=60)
    ap.add_argument("--k", type=int, default=5)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    work = Path(tempfile.mkdtemp(prefix="tillite-bench-store-"))
    try:
        db = work / "water.duckdb"
        build_demo_database(db, rows=args.rows, days=args.days)
        engine = DuckDBEngine(str(db))
        # warehouse tables land a partition at a time: store the rows day by day
        engine.con.execute("CREATE TABLE by_day AS SELECT * FROM meter_days ORDER BY day")
        engine.con.execute("DROP TABLE meter_days")
        engine.con.execute("ALTER TABLE by_day RENAME TO meter_days")
        engine.con.execute("CHECKPOINT")
        cols = list(DEMO_COLUMNS)
        scan_q = "SELECT " + ", ".join(f"sum({c})" for c in cols) + " FROM meter_days"
        engine.con.execute(scan_q).fetchall()
        scans = []
        for _ in range(5):
            t = time.perf_counter()
            engine.con.execute(scan_q).fetchall()
            scans.append(time.perf_counter() - t)
        builds, refreshes, idle, stages = [], [], [], []
        S.match_segments(np.zeros((1, 1)), [0], np.zeros((1, 1)), 1, np.ones(1), 1.0)  # load the assignment solver once
        for r in range(args.repeat):
            t = time.perf_counter()
            S.build(engine, Source.of_table("meter_days"), cols, S.PartitionSpec(("day",)), Settings(k=args.k, refine_passes=0), replace=True)
            builds.append(time.perf_counter() - t)
            t = time.perf_counter()
            S.refresh(engine, "meter_days")
            idle.append(time.perf_counter() - t)
            # change one day: every reading of that day goes up by 5%
            day = f"2026-01-{10 + r:02d}"
            engine.con.execute(f"UPDATE meter_days SET litres = litres * 1.05 WHERE day = DATE '{day}'")
            engine.con.execute("CHECKPOINT")
            t = time.perf_counter()
            report = S.refresh(engine, "meter_days")
            refreshes.append(time.perf_counter() - t)
            stages.append(report.seconds)
            assert report.changed == [day], report.changed
        engine.close()
        b, f, i, s = (statistics.median(v) for v in (builds, refreshes, idle, scans))
        print(f"\n{args.rows:,} meter-days in {args.days} daily partitions, k={args.k}")
        print(f"{'plain sum scan':<34}{s:>9.3f} s")
        print(f"{'full store build':<34}{b:>9.3f} s   ({b / s:.1f} plain scans)")
        print(f"{'refresh, no partition changed':<34}{i:>9.3f} s   ({i / s:.1f} plain scans)")
        print(f"{'refresh, one partition changed':<34}{f:>9.3f} s   ({f / s:.1f} plain scans)")
        print(f"builds {', '.join(f'{v:.3f}' for v in builds)}; refreshes {', '.join(f'{v:.3f}' for v in refreshes)} (medians above)")
        keys = sorted({k for st in stages for k in st})
        print("refresh stages (median s): " + ", ".join(f"{k} {statistics.median(st.get(k, 0.0) for st in stages):.3f}" for k in keys))
        print(f"\nratio refresh (one changed) / full build: {f / b:.3f}  (target <= 0.1)")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
