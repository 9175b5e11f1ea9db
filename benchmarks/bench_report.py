"""Cost of `tillite report` on the demo, in plain scans of the columns plus drawing time.

    python benchmarks/bench_report.py                    # the 10,000,000-row demo
    python benchmarks/bench_report.py --rows 2000000     # quicker

Builds the demo database once (in a temporary folder), segments it with k=5,
then measures, each as the median of --repeat runs in one process on one
database: a plain `sum` scan of the 5 columns, each step of the report with
`--by district` and the drawing (HTML with inline SVG).  Steps now:

  1. one scan: per-segment count, mean, sd, min, max and the breakdown by
     district, from one GROUP BY over the rows assigned once;
  2. the quartiles from a seeded sample of about 100,000 rows;
  3. the map, kept in the model file (no SQL); the cell pass that older model
     files fall back to is timed too, for reference.

and steps 1-2 again with --labels: reading a labels table made by
`tillite label --materialize` instead of assigning each row.

Before (the statements the report used until this change, still in sqlgen):
statistics with reservoir_quantile over all rows, a breakdown statement per
--by column and a cell pass for the map.  Each step prints as a multiple of
the plain scan; target: at most 3 plain scans of SQL in all plus at most 3 s
of drawing.  Not a pass/fail test.
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import tempfile
import time
from pathlib import Path

from tillite import DuckDBEngine, Settings, Source, label, segment, sqlgen
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


def before_statements(engine, src, model, by: str) -> list:
    """The report's statements before the one-scan change: statistics with reservoir quartiles, a breakdown."""
    labels = sqlgen.report_labels_select(src, model.columns, [], model.assignment(), "duckdb", cell_map=model.cell_map_spec())
    labels_by = sqlgen.report_labels_select(src, model.columns, [by], model.assignment(), "duckdb", cell_map=model.cell_map_spec())
    return [sqlgen.segment_stats_statement(labels, model.columns, "duckdb"), sqlgen.breakdown_statement(labels_by, by, 20, "duckdb")]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--k", type=int, default=5)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--no-before", action="store_true", help="skip timing the statements used before the one-scan change")
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
        t_scan, (stats, by) = median_time(lambda: R.report_scan(engine, src, model, ["district"]), args.repeat)
        t_q, (quartiles, sampled) = median_time(lambda: R.sample_quartiles(engine, src, model), args.repeat)
        t_map, figure = median_time(lambda: R.report_map(engine, src, model), args.repeat)
        t_cells, _ = median_time(lambda: R.map_cells(engine, src, model), args.repeat)
        stats = R.with_quartiles(stats, quartiles)
        t_assemble, content = median_time(lambda: R.assemble(model, stats, R._no_cells(model), by, [], None, None, figure=figure, sampled=sampled), args.repeat)
        t_draw, page = median_time(lambda: render_html(content), args.repeat)
        label(engine, src, model, "meter_labels", materialize=True)
        lab = Source.of_table("meter_labels")
        t_lscan, _ = median_time(lambda: R.report_scan(engine, src, model, ["district"], labels=lab), args.repeat)
        t_lq, _ = median_time(lambda: R.sample_quartiles(engine, src, model, labels=lab), args.repeat)
        before = []
        if not args.no_before:
            for name, st in zip(("statistics, reservoir quartiles", "breakdown by district"), before_statements(engine, src, model, "district")):
                before.append((name, median_time(lambda st=st: engine.query(st), args.repeat)[0]))
            before.append(("cell pass for the map", t_cells))
        engine.close()
        sql = t_scan + t_q + t_map
        print(f"\n{args.rows:,} meter-days, {len(cols)} columns, k={args.k}, {model.grid.get('cells', 0):,} cells, "
              f"map of {len(figure['dots']['n']):,} dots kept in the model file (medians of {args.repeat})")
        print(f"{'plain sum scan':<52}{scan:>8.3f} s")
        print("now:")
        for name, t in ((f"1. statistics + breakdown by district (one scan)", t_scan),
                        (f"2. quartiles from a sample of {sampled:,} rows", t_q),
                        ("3. map from the model file", t_map)):
            print(f"  {name:<50}{t:>8.3f} s   ({t / scan:5.1f} plain scans)")
        print(f"  {'SQL in all':<50}{sql:>8.3f} s   ({sql / scan:5.1f} plain scans; target <= 3)")
        lsql = t_lscan + t_lq + t_map
        print("now, with --labels (a table made by `tillite label --materialize`):")
        for name, t in (("1. statistics + breakdown, segment column read", t_lscan), ("2. quartiles from the sample", t_lq)):
            print(f"  {name:<50}{t:>8.3f} s   ({t / scan:5.1f} plain scans)")
        print(f"  {'SQL in all':<50}{lsql:>8.3f} s   ({lsql / scan:5.1f} plain scans; target <= 3)")
        if before:
            print("before:")
            for name, t in before:
                print(f"  {name:<50}{t:>8.3f} s   ({t / scan:5.1f} plain scans)")
            total = sum(t for _, t in before)
            print(f"  {'SQL in all':<50}{total:>8.3f} s   ({total / scan:5.1f} plain scans); now / before = {sql / total:.2f}")
        print(f"(older model files without a map: + cell pass {t_cells:.3f} s = {t_cells / scan:.1f} plain scans)")
        print(f"{'map and figures in Python':<52}{t_assemble:>8.3f} s")
        print(f"{'drawing the HTML (inline SVG)':<52}{t_draw:>8.3f} s   (target <= 3 s with the line above: "
              f"{t_assemble + t_draw:.3f} s); page {len(page) / 1e3:,.0f} kB")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
