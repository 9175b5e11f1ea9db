"""Cost of labelling rows through a cell map (outlier group), beside the same pass without one.

    python benchmarks/bench_cell_map.py [--rows 1000000] [--tree-budget 2000] [--repeat 5] [--postgres] [--db PATH]

Builds the demo database once (in /tmp), segments it with a small CF tree
budget so an outlier group (segment -1, labelled through its cells) exists,
then times in one process, median of --repeat runs each (and says how many rows skip their cell key):
  - a refine pass with the map held as a temporary relation (what `segment` does),
    with the map inline (what engines without temporary relations get), and without a map;
  - a materialized label table with and without the map;
  - a label view: made and read once, and read alone (rows and mean litres per segment), with its map
    in its own table (what `label` makes), inline (what views had before), and without a map; and its count(*),
    which without a map needs no label at all.
With --postgres, the refine pass and the view read again on a throwaway PostgreSQL server.
Statement building and rendering are included: they are part of what a pass costs.
Wall and CPU seconds (this process, DuckDB's threads included: less moved by other jobs on a shared
machine).  Target: a pass with a map <= 1.5 x the same pass without one.  Not a pass/fail test.
"""

from __future__ import annotations

import argparse
import statistics
import time
from dataclasses import replace
from pathlib import Path
from typing import Callable

import sqlglot

from tillite import demo, pipeline, sqlgen
from tillite.engines import DuckDBEngine
from tillite.pipeline import Settings, run_refine_pass, segment, temporary_cell_map

TARGET = 1.5


def median_times(jobs: dict[str, Callable[[], object]], repeat: int) -> dict[str, tuple[float, float]]:
    """Each job's median (wall, CPU) seconds, the jobs taking turns (so a busy moment on the shared
    machine hits them alike).  CPU is this process's, DuckDB's threads included: less moved by other load."""
    times: dict[str, list[tuple[float, float]]] = {name: [] for name in jobs}
    for _ in range(repeat):
        for name, fn in jobs.items():
            w0, c0 = time.perf_counter(), time.process_time()
            fn()
            times[name].append((time.perf_counter() - w0, time.process_time() - c0))
    return {name: (statistics.median(w for w, _ in t), statistics.median(c for _, c in t)) for name, t in times.items()}


def skipping_share(engine: DuckDBEngine, cols: list[str], model) -> float:
    """The share of usable rows nearer some centroid than that centroid's bound (``CellMap.nearest_bound``),
    which the passes therefore give no cell key: numpy on the rows."""
    import numpy as np

    assign = model.assignment()
    got = engine.con.execute("SELECT " + ", ".join(f'CAST("{c}" AS DOUBLE) AS "{c}"' for c in cols) + " FROM meter_days").fetchnumpy()
    x = np.column_stack([np.ma.filled(got[c], np.nan) for c in cols])
    u = (x - np.asarray(assign.center)) * np.asarray(assign.inv_scale) * np.asarray(assign.weights)
    c = np.asarray(assign.centroids) * np.asarray(assign.weights)
    d = np.column_stack([((u - ci) ** 2).sum(axis=1) for ci in c])
    ok = np.isfinite(d).all(axis=1)
    return float((d[ok] < model.cell_map_spec().nearest_bound(assign)[None, :]).any(axis=1).mean())


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--tree-budget", type=int, default=2000)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--postgres", action="store_true", help="also time the refine pass and the view read on a throwaway PostgreSQL server")
    ap.add_argument("--db", type=Path, default=None,
                    help="the demo DuckDB file to build or reuse (default /tmp/tillite-bench-demo-<rows>.duckdb)")
    args = ap.parse_args()
    db = args.db or Path(f"/tmp/tillite-bench-demo-{args.rows}.duckdb")
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
          f"({model.extras.get('outliers', {}).get('rows', 0):,} rows in the outlier group); median of {args.repeat}, "
          "the jobs of each table taking turns")
    print(f"rows that skip their cell key (nearer some centroid than its bound): {skipping_share(engine, cols, model):.1%}")

    def refine_held() -> None:
        with temporary_cell_map(engine, cell_map) as held:
            run_refine_pass(engine, src, cols, assign, held)

    refine = median_times({
        "plain": lambda: run_refine_pass(engine, src, cols, assign),
        "held": refine_held,
        "inline": lambda: run_refine_pass(engine, src, cols, assign, cell_map),
    }, args.repeat)

    without = replace(model, cell_map={})
    table = median_times({
        "plain": lambda: pipeline.label(engine, src, without, "bench_labels", materialize=True, replace=True),
        "held": lambda: pipeline.label(engine, src, model, "bench_labels", materialize=True, replace=True),
    }, args.repeat)
    engine.execute(sqlgen.drop_statement("bench_labels", "table"))
    # a read that needs every row's label: rows and mean litres per segment
    per_segment = sqlglot.parse_one('SELECT "segment", count(*) AS n, avg("litres") AS l FROM "bench_view" GROUP BY 1')
    count = sqlgen.count_statement(sqlgen.Source.of_table("bench_view"))

    def read_view() -> None:
        engine.query(per_segment)

    def count_view() -> None:
        engine.query(count)

    source_columns = pipeline.check_columns(engine, src, cols)

    def inline_view() -> None:
        """The view as labels made it before: the map inline as a VALUES list."""
        select = sqlgen.label_select(src, cols, source_columns, assign, engine.target, cell_map=cell_map)
        engine.execute(sqlgen.drop_statement("bench_view", "view"))
        engine.execute(sqlgen.create_relation_statement("bench_view", select, materialize=False))

    view = median_times({
        "plain": lambda: (pipeline.label(engine, src, without, "bench_view", replace=True), read_view()),
        "table": lambda: (pipeline.label(engine, src, model, "bench_view", replace=True), read_view()),
        "inline": lambda: (inline_view(), read_view()),
    }, args.repeat)
    reads = {}
    for name, make in (("plain", lambda: pipeline.label(engine, src, without, "bench_view", replace=True)),
                       ("table", lambda: pipeline.label(engine, src, model, "bench_view", replace=True)),
                       ("inline", inline_view)):
        make()
        reads.update(median_times({name: read_view, f"{name} count": count_view}, args.repeat))
    engine.execute(sqlgen.drop_statement("bench_view", "view"))
    engine.execute(sqlgen.drop_statement(pipeline.cell_map_table("bench_view"), "table"))
    engine.close()

    print(f"{'pass':<50}{'wall s':>8}{'x no map':>9}{'CPU s':>8}{'x no map':>9}{'target':>8}")
    rows = [
        ("refine pass, no map", refine["plain"], refine["plain"], None),
        ("refine pass, map as temporary relation", refine["held"], refine["plain"], TARGET),
        ("refine pass, map inline (PostgreSQL path)", refine["inline"], refine["plain"], None),
        ("label table, no map", table["plain"], table["plain"], None),
        ("label table, map as temporary relation", table["held"], table["plain"], TARGET),
        ("make label view + read it, no map", view["plain"], view["plain"], None),
        ("make label view + read it, map in its own table", view["table"], view["plain"], None),
        ("make label view + read it, map inline (before)", view["inline"], view["plain"], None),
        ("read the view per segment, no map", reads["plain"], reads["plain"], None),
        ("read the view per segment, map in its own table", reads["table"], reads["plain"], TARGET),
        ("read the view per segment, map inline (before)", reads["inline"], reads["plain"], None),
        ("count(*) of the view, no map (labels not computed)", reads["plain count"], reads["plain count"], None),
        ("count(*) of the view, map in its own table", reads["table count"], reads["plain count"], None),
    ]
    for name, (wall, cpu), (base_wall, base_cpu), target in rows:
        mark = "" if target is None else f"{target:>8.1f}  {'ok' if wall / base_wall <= target else 'MISSED'}"
        print(f"{name:<50}{wall:>8.3f}{wall / base_wall:>9.2f}{cpu:>8.3f}{cpu / base_cpu:>9.2f}{mark}")
    if args.postgres:
        postgres_run(db, model, args.repeat)


def postgres_run(db: Path, model, repeat: int) -> None:
    """On a throwaway PostgreSQL server holding the same rows: the refine pass (map inline: the segmenting
    session is read-only) and the label view read per segment, with its map table, inline, and without a map."""
    import sys

    import duckdb
    import psycopg

    sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
    from throwaway_servers import start_postgres

    from tillite.engines import PostgresEngine

    cols = list(demo.DEMO_COLUMNS)
    with duckdb.connect(str(db), read_only=True) as con:
        rows = con.execute("SELECT " + ", ".join(f'CAST("{c}" AS DOUBLE)' for c in cols) + " FROM meter_days").fetchall()
    server = start_postgres()
    try:
        with psycopg.connect(server.conninfo, autocommit=True) as con:
            con.execute("CREATE TABLE meter_days (" + ", ".join(f'"{c}" DOUBLE PRECISION' for c in cols) + ")")
            with con.cursor().copy("COPY meter_days FROM STDIN") as copy:
                for row in rows:
                    copy.write_row(row)
            con.execute("ANALYZE meter_days")
        engine = PostgresEngine(server.conninfo)
        src = sqlgen.Source.of_table("meter_days")
        assign, cell_map, without = model.assignment(), model.cell_map_spec(), replace(model, cell_map={})
        refine = median_times({
            "plain": lambda: run_refine_pass(engine, src, cols, assign),
            "inline": lambda: run_refine_pass(engine, src, cols, assign, cell_map),
        }, repeat)
        per_segment = sqlglot.parse_one('SELECT "segment", count(*) AS n, avg("litres") AS l FROM "pg_view" GROUP BY 1')

        def inline_view() -> None:
            select = sqlgen.label_select(src, cols, cols, assign, engine.target, cell_map=cell_map)
            engine.run_in_transaction([sqlgen.drop_statement("pg_view", "view"),
                                       sqlgen.create_relation_statement("pg_view", select, materialize=False)])

        reads = {}
        for name, make in (("plain", lambda: pipeline.label(engine, src, without, "pg_view", replace=True)),
                           ("table", lambda: pipeline.label(engine, src, model, "pg_view", replace=True)),
                           ("inline", inline_view)):
            make()
            reads.update(median_times({name: lambda: engine.query(per_segment)}, repeat))
        engine.close()
    finally:
        server.stop()
    print(f"\nPostgreSQL, the same {len(rows):,} rows (wall seconds; the server's CPU is not this process's)")
    for name, secs, base in (
        ("refine pass, no map", refine["plain"][0], refine["plain"][0]),
        ("refine pass, map inline", refine["inline"][0], refine["plain"][0]),
        ("read the view per segment, no map", reads["plain"][0], reads["plain"][0]),
        ("read the view per segment, map in its own table", reads["table"][0], reads["plain"][0]),
        ("read the view per segment, map inline (before)", reads["inline"][0], reads["plain"][0]),
    ):
        print(f"{name:<50}{secs:>8.3f}{secs / base:>9.2f}")


if __name__ == "__main__":
    main()
