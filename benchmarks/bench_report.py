"""Cost of `tillite report` on the demo, in plain scans of the columns plus drawing time.

    python benchmarks/bench_report.py                    # the 10,000,000-row demo
    python benchmarks/bench_report.py --rows 2000000     # quicker

Builds the demo database once (in a temporary folder), segments it with k=5,
then measures, each as the median of --repeat runs in one process on one
database: a plain `sum` scan of the 5 columns, the report's three statements
(per-segment statistics, the cell pass for the map, the breakdown by
district) and the drawing (HTML with inline SVG).  Prints each statement as a
multiple of the plain scan.  Target: at most 3 plain scans of SQL in all (the
statements cost more than a plain sum, so the target is in time) plus at most
3 s of drawing.  Not a pass/fail test.
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import tempfile
import time
from pathlib import Path

from tillite import DuckDBEngine, Settings, Source, segment
from tillite import report as R
from tillite.demo import DEMO_COLUMNS, build_demo_database
from tillite.report_render import render_html


def median_time(fn, repeat: int) -> tuple[float, object]:
    times, out = [], None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times), out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--k", type=int, default=5)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    work = Path(tempfile.mkdtemp(prefix="tillite-bench-report-"))
    try:
        db = work / "water.duckdb"
        build_demo_database(db, rows=args.rows)
        engine = DuckDBEngine(str(db))
        src = Source.of_table("meter_days")
        cols = list(DEMO_COLUMNS)
        model = segment(engine, src, cols, Settings(k=args.k))
        scan_q = "SELECT " + ", ".join(f"sum({c})" for c in cols) + " FROM meter_days"
        engine.con.execute(scan_q).fetchall()
        scan, _ = median_time(lambda: engine.con.execute(scan_q).fetchall(), 5)
        t_stats, stats = median_time(lambda: R.segment_statistics(engine, src, model), args.repeat)
        t_cells, (cells, keys) = median_time(lambda: R.map_cells(engine, src, model), args.repeat)
        t_by, by = median_time(lambda: R.breakdown(engine, src, model, "district"), args.repeat)
        t_assemble, content = median_time(lambda: R.assemble(model, stats, cells, [by], [], None, keys), args.repeat)
        t_draw, page = median_time(lambda: render_html(content), args.repeat)
        engine.close()
        sql = t_stats + t_cells + t_by
        print(f"\n{args.rows:,} meter-days, {len(cols)} columns, k={args.k}, {cells.m:,} cells (medians of {args.repeat})")
        print(f"{'plain sum scan':<38}{scan:>8.3f} s")
        for name, t in (("per-segment statistics (GROUP BY)", t_stats), ("cell pass for the map", t_cells),
                        ("breakdown by district (GROUP BY)", t_by)):
            print(f"{name:<38}{t:>8.3f} s   ({t / scan:.1f} plain scans)")
        print(f"{'SQL in all':<38}{sql:>8.3f} s   ({sql / scan:.1f} plain scans; target <= 3)")
        print(f"{'map and figures in Python':<38}{t_assemble:>8.3f} s")
        print(f"{'drawing the HTML (inline SVG)':<38}{t_draw:>8.3f} s   (target <= 3 s with the line above: "
              f"{t_assemble + t_draw:.3f} s); page {len(page) / 1e3:,.0f} kB")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
