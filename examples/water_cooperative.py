"""Walkthrough of the invented Saltmere Bay water co-operative, with the Python API.

    python examples/water_cooperative.py [--rows 200000] [--workdir /tmp/saltmere]

Everything here is what the `tillite` commands do, called as a notebook user would:
build the demo table, segment it, label it with a view, keep a summary store
current as a day's readings are corrected, and score rows with a SQL macro.
The meters, town and districts are invented.  A segment is a statistical
grouping, not a diagnosis: a "probable leak" segment is a list for the
co-operative's usual inspection procedure to confirm.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

from tillite import DuckDBEngine, Settings, Source, label, segment
from tillite import macros, report
from tillite import store as summary_store
from tillite.demo import DEMO_COLUMNS, METERS_TABLE, build_demo_database
from tillite.model import default_model_path


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--workdir", default=None)
    args = ap.parse_args()
    work = Path(args.workdir or tempfile.mkdtemp(prefix="saltmere-"))
    work.mkdir(parents=True, exist_ok=True)
    db = work / "saltmere.duckdb"

    print(f"1. building {args.rows:,} invented meter-days in {db}")
    build_demo_database(db, rows=args.rows, days=30, replace=True)
    engine = DuckDBEngine(str(db))
    meter_days = Source.of_table("meter_days")
    columns = list(DEMO_COLUMNS)

    print("\n2. segmenting in the database: only cell summaries come back to Python")
    model = segment(engine, meter_days, columns, Settings(k=5), progress=lambda stage, msg: print(f"   {stage}: {msg}"))
    print(model.describe())
    model_file = work / default_model_path(str(db), "meter_days")  # meter_days.model.json, as `tillite segment` names it
    model.write(model_file)
    print(f"   model written to {model_file}")

    print("\n3. labelling every row with a view (the source table is never written)")
    print("  ", label(engine, meter_days, model, "meter_day_segments"))
    print(report.crosstab(engine, "meter_day_segments", METERS_TABLE, "meter_id", "kind"))

    print("\n4. a summary store per day, and a refresh after one day's readings are corrected")
    summary_store.build(engine, meter_days, columns, summary_store.PartitionSpec(("day",)), Settings(k=5, refine_passes=0),
                        replace=True)
    summary_store.label(engine, "meter_days", "meter_day_segments_current")
    engine.con.execute("UPDATE meter_days SET litres = litres * 1.1 WHERE day = DATE '2026-01-15'")
    refreshed = summary_store.refresh(engine, "meter_days")
    print(refreshed.describe())

    print("\n5. a scoring macro, for people who only use a SQL console")
    macros.install(engine.con, macros.generic_macros() + macros.scoring_macros(model, "water"))
    rows = engine.con.execute(
        "SELECT water_segment(litres, night_share, peak_litres, flow_run_hours, zero_hours) AS segment, count(*) AS n "
        "FROM meter_days GROUP BY ALL ORDER BY segment NULLS LAST"
    ).fetchall()
    print("   " + ", ".join(f"segment {s}: {n:,}" if s is not None else f"skipped (a NULL value): {n:,}" for s, n in rows))
    engine.close()
    print(f"\nall of it is in {db}; open it with any DuckDB client.")


if __name__ == "__main__":
    main()
