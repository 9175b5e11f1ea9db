"""What reproducible runs cost in DuckDB: the seeded profile sample and compensated sums.

Prints, from one run, medians of interleaved repetitions as multiples of a plain scan:
  - the old unseeded profile query (TABLESAMPLE SYSTEM + LIMIT, not repeatable under threads),
  - the seeded one (TABLESAMPLE BERNOULLI ... REPEATABLE, a full scan), and the whole run_profile,
  - the cell pass with plain SUM and with fsum (the compensated sum tillite uses).

    python benchmarks/bench_reproducible.py [--rows N] [--repeat R] [--db PATH]
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import duckdb
import numpy as np

from tillite import sqlgen
from tillite.engines import DuckDBEngine
from tillite.pipeline import Settings, grid_for_profile, run_profile

COLUMNS = ["a", "b", "c"]


def build(path: Path, rows: int) -> None:
    if path.exists():
        return
    con = duckdb.connect(str(path))
    con.execute("SELECT setseed(0.5)")
    con.execute(
        "CREATE TABLE t AS SELECT (i % 4) * 6.0 + random() AS a, (i % 4) * -3.0 + random() AS b, "
        f"random() * 2 AS c FROM range({int(rows)}) r(i)"
    )
    con.close()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--db", default="/tmp/tillite-bench-reproducible.duckdb")
    args = ap.parse_args()
    path = Path(args.db)
    build(path, args.rows)
    engine = DuckDBEngine(str(path), read_only=True)
    src = sqlgen.Source.of_table("t")
    settings = Settings(k=4)
    rows = int(engine.query(sqlgen.count_statement(src))["n"][0])
    percent = min(100.0, 150.0 * settings.sample_rows / rows)
    grid = grid_for_profile(run_profile(engine, src, COLUMNS, settings), settings)
    cells_fsum = sqlgen.render(sqlgen.cells_statement(src, COLUMNS, grid, "duckdb"), "duckdb")
    jobs = {
        "plain scan (sum of 3 columns)": lambda: engine.con.execute("SELECT sum(a), sum(b), sum(c) FROM t").fetchall(),
        "old profile query (SYSTEM + LIMIT)": lambda: engine.query(
            sqlgen.sample_statement(src, COLUMNS, "duckdb", percent=percent, method="SYSTEM", limit=settings.sample_rows)),
        "seeded sample query (BERNOULLI REPEATABLE)": lambda: engine.query(
            sqlgen.sample_statement(src, COLUMNS, "duckdb", percent=percent, method="BERNOULLI", seed=0)),
        "run_profile (seeded, sorted, cut)": lambda: run_profile(engine, src, COLUMNS, settings),
        "cell pass, plain SUM": lambda: engine.con.execute(cells_fsum.replace("FSUM(", "SUM(")).fetchall(),
        "cell pass, fsum": lambda: engine.con.execute(cells_fsum).fetchall(),
    }
    times: dict[str, list[float]] = {k: [] for k in jobs}
    for _ in range(args.repeat):
        for name, job in jobs.items():
            t0 = time.perf_counter()
            job()
            times[name].append(time.perf_counter() - t0)
    engine.close()
    med = {k: float(np.median(v)) for k, v in times.items()}
    scan = med["plain scan (sum of 3 columns)"]
    print(f"{rows:,} rows x {len(COLUMNS)} doubles, medians of {args.repeat} interleaved runs")
    for name, t in med.items():
        print(f"  {name:45s} {t:8.3f} s  {t / scan:6.2f} x scan")
    print(f"  fsum / SUM in the cell pass: {med['cell pass, fsum'] / med['cell pass, plain SUM']:.2f}")


if __name__ == "__main__":
    main()
