"""Cost of a categorical column: `segment --categorical` with 20 categories beside the same run without it.

    python benchmarks/bench_categorical.py [--rows 2000000] [--repeat 3]

Builds the demo database once (in /tmp) and adds a copy of meter_days with a `zone` column of 20
categories (meter_id mod 20, as text), so both runs read the same table.  Then, in one process,
alternating, median of --repeat runs each (whole `segment` runs: profile, cell pass, second phase,
refine passes):
  - litres, night_share, zero_hours, k = 5                         (baseline)
  - the same plus --categorical zone (20 categories)               (target: <= 1.5 x baseline)
  - the same plus --categorical district (the demo's 6 districts)
Prints seconds and the ratios.  Not a pass/fail test; compare ratios from one run only.
"""

from __future__ import annotations

import argparse
import statistics
import time
from pathlib import Path

import duckdb

from tillite import demo, sqlgen
from tillite.engines import DuckDBEngine
from tillite.pipeline import Settings, segment

TARGET = 1.5
COLUMNS = ["litres", "night_share", "zero_hours"]
TABLE = "meter_days_zones"


def build(rows: int) -> Path:
    db = Path(f"/tmp/tillite-bench-categorical-{rows}.duckdb")
    if not db.exists():
        demo.build_demo_database(str(db), rows=rows, days=60, seed=7, replace=True)
        con = duckdb.connect(str(db))
        con.execute(f"CREATE TABLE {TABLE} AS SELECT *, 'zone ' || lpad(CAST(meter_id % 20 AS VARCHAR), 2, '0') AS zone "
                    "FROM meter_days")
        con.close()
    return db


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--k", type=int, default=5)
    args = ap.parse_args()
    db = build(args.rows)
    engine = DuckDBEngine(str(db))
    src = sqlgen.Source.of_table(TABLE)
    runs = {
        "numeric only": (),
        "+ --categorical zone (20)": ("zone",),
        "+ --categorical district (6)": ("district",),
    }
    times: dict[str, list[float]] = {name: [] for name in runs}
    models = {}
    for _ in range(args.repeat):
        for name, categorical in runs.items():
            t0 = time.perf_counter()
            models[name] = segment(engine, src, COLUMNS, Settings(k=args.k, categorical=categorical))
            times[name].append(time.perf_counter() - t0)
    base = statistics.median(times["numeric only"])
    print(f"{args.rows:,} demo rows, columns {', '.join(COLUMNS)}, k = {args.k}; median of {args.repeat} whole segment runs "
          "(shared, loaded machine: compare ratios only)")
    for name in runs:
        t = statistics.median(times[name])
        m = models[name]
        stages = ", ".join(f"{k} {v:.2f}" for k, v in m.timings.items() if k != "total")
        print(f"  {name:30s} {t:7.2f} s  {t / base:5.2f} x   ({m.grid['cells']:,} cells, {len(m.passes)} refine passes; {stages})")
    ratio = statistics.median(times["+ --categorical zone (20)"]) / base
    print(f"--categorical with 20 categories: {ratio:.2f} x the run without (target <= {TARGET} x): "
          f"{'met' if ratio <= TARGET else 'MISSED'}")
    engine.close()


if __name__ == "__main__":
    main()
