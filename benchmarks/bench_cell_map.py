"""Cost of labelling rows through a cell map (outlier group), beside the same pass without one.

    python benchmarks/bench_cell_map.py [--rows 1000000] [--tree-budget 2000]

Builds the demo database once (in /tmp), segments it with a small CF tree
budget so an outlier group (segment -1, labelled through its cells) exists,
then times in one process, median of --repeat runs each:
  - a refine pass with the map held as a temporary relation (what `segment` does),
    with the map inline (what engines without temporary relations get), and without a map;
  - a materialized label table with and without the map; creating a label view
    (inline map) and counting its rows per segment.
Statement building and rendering are included: they are part of what a pass costs.
Target: a pass with a map <= 1.5 x the same pass without one.  Not a pass/fail test.
"""

from __future__ import annotations

import argparse
import statistics
import time
from dataclasses import replace
from pathlib import Path

from tillite import demo, pipeline, sqlgen
from tillite.engines import DuckDBEngine
from tillite.pipeline import Settings, run_refine_pass, segment, temporary_cell_map

TARGET = 1.5


def median_time(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--tree-budget", type=int, default=2000)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    db = Path(f"/tmp/tillite-bench-demo-{args.rows}.duckdb")
    if not db.exists():
        demo.build_demo_database(str(db), rows=args.rows, days=60, seed=7, replace=True)
    engine = DuckDBEngine(str(db))
    src = sqlgen.Source.of_table("meter_days")
    cols = list(demo.DEMO_COLUMNS)
    model = segment(engine, src, cols, Settings(k=5, tree_budget=args.tree_budget))
    cell_map = model.cell_map_spec()
    if cell_map is None:
        raise SystemExit("no outlier group at this tree budget; lower --tree-budget")
    assign = model.assignment()
    print(f"{args.rows:,} demo rows, {len(cell_map.keys):,} cells in the map "
          f"({model.extras.get('outliers', {}).get('rows', 0):,} rows in the outlier group); median of {args.repeat}")

    def refine_held() -> None:
        with temporary_cell_map(engine, cell_map) as held:
            run_refine_pass(engine, src, cols, assign, held)

    plain = median_time(lambda: run_refine_pass(engine, src, cols, assign), args.repeat)
    held = median_time(refine_held, args.repeat)
    inline = median_time(lambda: run_refine_pass(engine, src, cols, assign, cell_map), args.repeat)

    without = replace(model, cell_map={})
    table_plain = median_time(lambda: pipeline.label(engine, src, without, "bench_labels", materialize=True, replace=True), args.repeat)
    table_held = median_time(lambda: pipeline.label(engine, src, model, "bench_labels", materialize=True, replace=True), args.repeat)
    engine.execute(sqlgen.drop_statement("bench_labels", "table"))
    count = sqlgen.select_where("bench_view", None, ["segment"])

    def view_and_count(m) -> None:
        pipeline.label(engine, src, m, "bench_view")
        engine.query(sqlgen.count_statement(sqlgen.Source.of_table("bench_view")))
        engine.query(count)

    view_plain = median_time(lambda: view_and_count(without), args.repeat)
    view_inline = median_time(lambda: view_and_count(model), args.repeat)
    engine.execute(sqlgen.drop_statement("bench_view", "view"))
    engine.close()

    print(f"{'pass':<44}{'seconds':>9}{'x no map':>10}{'target':>8}")
    rows = [
        ("refine pass, no map", plain, plain, None),
        ("refine pass, map as temporary relation", held, plain, TARGET),
        ("refine pass, map inline (PostgreSQL path)", inline, plain, None),
        ("label table, no map", table_plain, table_plain, None),
        ("label table, map as temporary relation", table_held, table_plain, TARGET),
        ("label view + 2 reads, no map", view_plain, view_plain, None),
        ("label view + 2 reads, map inline", view_inline, view_plain, TARGET),
    ]
    for name, secs, base, target in rows:
        mark = "" if target is None else f"{target:>8.1f}  {'ok' if secs / base <= target else 'MISSED'}"
        print(f"{name:<44}{secs:>9.3f}{secs / base:>10.2f}{mark}")


if __name__ == "__main__":
    main()
