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

Before (the statements the report used until the one-scan change, kept in this file for the comparison):
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

from tillite import DuckDBEngine, Settings, Source, label, segment
from tillite import report as R
from tillite.demo import DEMO_COLUMNS, build_demo_database
from tillite.report_render import render_html
from tillite.sqlgen import (  # builders the old statements below are made of
    QUARTILES, SPARK_DIALECTS, Assignment, CellMap, Source as _Source, approx_quantile, case_when, col, internal, label_select, num,
    subquery, to_double,
)
from sqlglot import exp
from typing import Sequence

# ------------------------------------------------------------ the report's statements before the one-scan change

def report_labels_select(
    source: _Source, columns: Sequence[str], extra_columns: Sequence[str], assign: Assignment, dialect: str,
    cell_map: CellMap | None = None,
) -> exp.Select:
    """The model's columns, the breakdown columns and the segment of every row (as internal names)."""
    keep = list(dict.fromkeys(list(columns) + list(extra_columns)))
    return label_select(
        source, columns, keep, assign, dialect, segment_name=internal("segment"), distance_name=internal("distance"),
        cell_map=cell_map,
    )


def segment_stats_statement(labels: exp.Select, columns: Sequence[str], dialect: str) -> exp.Select:
    """Per segment: n, and per column j mean{j}, sd{j} (population), min{j}, max{j}, q25_{j}, q50_{j}, q75_{j}.

    On DuckDB the quartiles come back as one list q_{j} per column from
    reservoir_quantile (a uniform sample of 8,192 values per group: exact for
    smaller segments, bounded memory, and faster here than approx_quantile's
    T-digest).  Rows without a segment (skipped for NULL/NaN/Inf) form the
    group whose s is NULL, for the caller to leave out.
    """
    seg = col(internal("segment"))
    projections: list[exp.Expression] = [exp.alias_(seg, "s"), exp.alias_(exp.Count(this=exp.Star()), "n")]
    for j, name in enumerate(columns):
        x = to_double(col(name))
        projections += [
            exp.alias_(exp.Avg(this=x.copy()), f"mean{j}"),
            exp.alias_(exp.StddevPop(this=x.copy()), f"sd{j}"),
            exp.alias_(exp.Min(this=x.copy()), f"min{j}"),
            exp.alias_(exp.Max(this=x.copy()), f"max{j}"),
        ]
        if dialect == "duckdb":  # one reservoir per column for all three quartiles: q_{j} is a list
            quartiles = exp.Array(expressions=[exp.Literal.number(repr(q)) for q in QUARTILES])
            projections.append(exp.alias_(exp.func("reservoir_quantile", x.copy(), quartiles), f"q_{j}"))
            continue
        projections += [
            exp.alias_(approx_quantile(x.copy(), q, dialect), f"q{int(round(q * 100))}_{j}") for q in QUARTILES
        ]
    # no WHERE on the segment: DuckDB pushes such a filter down to the rows and computes the assignment twice
    return exp.select(*projections).from_(subquery(labels, internal("r"))).group_by(seg.copy())


def breakdown_statement(labels: exp.Select, column: str, top: int = 20, dialect: str = "duckdb") -> exp.Select:
    """Rows per (segment, category) of one column, the ``top`` categories by rows kept and the rest summed.

    Returns s, b (the category's rank 1..top, or top+1 for "other"), c (the
    category as text, NULL for a missing value) and n.  Ranks order categories
    by their usable rows, ties by the text.  The per-(segment, category) counts
    are a MATERIALIZED CTE where the dialect has one: DuckDB otherwise turns the
    window over them into a self-join that scans the source twice.  Skipped
    rows (NULL segment) come back as groups with a NULL s for the caller to
    drop: a filter on the segment is pushed down to the rows and computes the
    assignment twice per row.
    """
    seg = internal("segment")
    text = exp.cast(col(column), exp.DataType.build("VARCHAR"))
    # grouped on the raw column, turned into text once per group (not once per row)
    per = (
        exp.select(exp.alias_(col(seg), "s"), exp.alias_(text, "c"), exp.alias_(exp.Count(this=exp.Star()), "n"))
        .from_(subquery(labels, internal("r")))
        .group_by(col(seg), col(column))
    )
    usable = exp.Not(this=exp.Is(this=col("s"), expression=exp.Null()))
    counts = internal("p")
    totals = exp.select(
        col("s"), col("c"), col("n"),
        exp.alias_(exp.Window(this=exp.Sum(this=case_when(usable, col("n"))), partition_by=[col("c")]), "t"),
    ).from_(exp.to_identifier(counts, quoted=True))
    ranked = exp.select(
        col("s"), col("c"), col("n"),
        exp.alias_(
            exp.Window(
                this=exp.func("DENSE_RANK"),
                order=exp.Order(expressions=[
                    exp.Ordered(this=col("t"), desc=True, nulls_first=False),
                    exp.Ordered(this=col("c"), nulls_first=False),
                ]),
            ),
            "k",
        ),
    ).from_(subquery(totals, internal("t")))
    bucket = case_when(exp.LTE(this=col("k"), expression=num(top)), col("k")).else_(num(top + 1))
    category = exp.Min(this=case_when(exp.LTE(this=col("k"), expression=num(top)), col("c")))
    return (
        exp.select(col("s"), exp.alias_(bucket, "b"), exp.alias_(category, "c"), exp.alias_(exp.Sum(this=col("n")), "n"))
        .from_(subquery(ranked, internal("k")))
        .group_by(col("s"), bucket.copy())
        .with_(exp.to_identifier(counts, quoted=True), as_=per, materialized=None if dialect in SPARK_DIALECTS else True)
    )



def median_time(fn, repeat: int) -> tuple[float, object]:
    times, out = [], None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times), out


def before_statements(engine, src, model, by: str) -> list:
    """The report's statements before the one-scan change: statistics with reservoir quartiles, a breakdown."""
    labels = report_labels_select(src, model.columns, [], model.assignment(), "duckdb", cell_map=model.cell_map_spec())
    labels_by = report_labels_select(src, model.columns, [by], model.assignment(), "duckdb", cell_map=model.cell_map_spec())
    return [segment_stats_statement(labels, model.columns, "duckdb"), breakdown_statement(labels_by, by, 20, "duckdb")]


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
        for name, t in (("1. statistics + breakdown by district (one scan)", t_scan),
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
