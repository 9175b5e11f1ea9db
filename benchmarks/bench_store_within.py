"""Refresh of a `store build --within` store: one group changed in one partition against every group changed.

    python benchmarks/bench_store_within.py [--rows 2000000] [--groups 50] [--k 4] [--repeat 3]

Builds the demo database once (in /tmp, with ``route`` = meter_id % GROUPS as bench_within.py does), copies it,
and builds a store partitioned by day with --within route (k per group, no refine passes: the store default).
Then, alternating, median of --repeat rounds each:
  - one route's rows in one day updated, then a refresh (re-segments that route only);
  - every row of one day updated, then a refresh (re-segments every route);
  - the same whole-day update on a plain store of the same table (one global segmentation), for scale.
Each refresh's own seconds (fingerprints, cells, segment) are printed.  Not a pass/fail test: the machine is shared.
"""

from __future__ import annotations

import shutil
import statistics
import sys
import time
import warnings
from pathlib import Path

import duckdb

sys.path.insert(0, str(Path(__file__).parent))
from bench_within import build, routed_arguments  # noqa: E402  (the routed demo table and options)

from tillite import store as S  # noqa: E402
from tillite.demo import DEMO_COLUMNS  # noqa: E402
from tillite.engines import DuckDBEngine  # noqa: E402
from tillite.pipeline import Settings  # noqa: E402
from tillite.sqlgen import Source  # noqa: E402


def timed_refresh(path: Path, store: str, change: str) -> tuple[float, S.RefreshReport]:
    with duckdb.connect(str(path)) as con:
        con.execute(change)
    t0 = time.perf_counter()
    with DuckDBEngine(str(path)) as engine, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        report = S.refresh(engine, store)
    return time.perf_counter() - t0, report


def main() -> None:
    args = routed_arguments(__doc__)
    source = build(args.rows, args.groups)
    work = Path(f"/tmp/tillite-bench-store-within-{args.rows}-{args.groups}.duckdb")
    shutil.copy(source, work)
    columns = list(DEMO_COLUMNS)
    with DuckDBEngine(str(work)) as engine, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        S.build(engine, Source.of_table("routed"), columns, S.PartitionSpec(("day",)), Settings(k=args.k, within="route"),
                store="within")
        t_within = time.perf_counter() - t0
        t0 = time.perf_counter()
        S.build(engine, Source.of_table("routed"), columns, S.PartitionSpec(("day",)), Settings(k=args.k), store="plain")
        t_plain = time.perf_counter() - t0
    print(f"{args.rows:,} rows, {args.groups} routes, k={args.k}: build --within {t_within:.2f} s, plain build {t_plain:.2f} s")
    with duckdb.connect(str(work)) as con:
        days = [r[0] for r in con.execute("SELECT DISTINCT day FROM routed ORDER BY day").fetchall()]
    times: dict[str, list[float]] = {"one route": [], "every route": [], "plain store": []}
    for i in range(args.repeat):
        day = days[i % len(days)]
        one, r1 = timed_refresh(work, "within", f"UPDATE routed SET litres = litres * 1.01 WHERE day = DATE '{day}' AND route = {i}")
        every, r2 = timed_refresh(work, "within", f"UPDATE routed SET litres = litres * 1.01 WHERE day = DATE '{day}'")
        plain, r3 = timed_refresh(work, "plain", f"UPDATE routed SET litres = litres * 1.01 WHERE day = DATE '{day}'")
        plain_again, _ = timed_refresh(work, "within", "SELECT 1")  # the plain store's change, seen by the within store
        for name, t, r in (("one route", one, r1), ("every route", every, r2), ("plain store", plain, r3)):
            times[name].append(t)
            groups = f", {len(r.groups.get('resegmented', []))} group(s) re-segmented" if r.groups else ""
            print(f"  round {i + 1} {name:>11}: {t:.2f} s ({', '.join(f'{k} {v:.2f}' for k, v in r.seconds.items())}){groups}")
        print(f"  (catching up the within store after the plain store's change: {plain_again:.2f} s)")
    med = {k: statistics.median(v) for k, v in times.items()}
    print(f"medians: one route {med['one route']:.2f} s, every route {med['every route']:.2f} s "
          f"({med['one route'] / med['every route']:.2f}x), plain store {med['plain store']:.2f} s "
          f"(every route {med['every route'] / med['plain store']:.2f}x of it)")


if __name__ == "__main__":
    main()
