"""The profile's seeded sample in DuckDB, form by form, against one plain scan (ratios from one run).

    python benchmarks/bench_sample.py                       # the 20M x 8 file of bench_pipeline.py
    python benchmarks/bench_sample.py --db FILE --table T --rows N

Forms compared, each drawing about 1.5 x 50,000 rows like `run_profile`:

- ``TABLESAMPLE BERNOULLI (p PERCENT) REPEATABLE (seed)``: what the profile uses;
- a filter on a hash of (rowid, seed): ``hash(rowid, seed) % 2^32 < p * 2^32``, for base tables;
- ``TABLESAMPLE SYSTEM (p PERCENT) REPEATABLE (seed)``: whole vectors of 2,048 rows;
- the block sample the profile now draws from large base tables: SYSTEM (8 p PERCENT) on one
  thread, then BERNOULLI (12.5 PERCENT), both REPEATABLE (seed).  Its "1/2/4 threads" column
  is the connection's count before the statement, which runs on one thread.

Prints, per form: the warm median (interleaved with a plain `sum` scan of the same columns),
whether 1, 2 and 4 threads draw the same rows, and the first statement of a fresh process
(form first, then a plain scan), which pays for reading the table into DuckDB's buffers.
Not a pass/fail test: read the ratios (the machine may be loaded).
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time

TARGET = 50_000


def statements(table: str, cols: list[str], rows: int, seed: int) -> dict[str, str]:
    percent = min(100.0, 150.0 * TARGET / rows)
    sel = ", ".join(f"CAST({c} AS DOUBLE)" for c in cols)
    cut = int(percent / 100.0 * 2**32)
    return {
        "scan": "SELECT " + ", ".join(f"sum({c})" for c in cols) + f" FROM {table}",
        "bernoulli": f"SELECT {sel} FROM {table} TABLESAMPLE BERNOULLI ({percent!r} PERCENT) REPEATABLE ({seed})",
        "rowid_hash": f"SELECT {sel} FROM {table} WHERE hash(rowid, {seed}) % 4294967296 < {cut}",
        "system": f"SELECT {sel} FROM {table} TABLESAMPLE SYSTEM ({percent!r} PERCENT) REPEATABLE ({seed})",
        # what the profile draws from a large base table (sqlgen.block_sample_statement), run on one thread
        "block": f"SELECT * FROM (SELECT {sel} FROM {table} TABLESAMPLE SYSTEM ({8 * percent!r} PERCENT) REPEATABLE ({seed})) AS s"
                 f" TABLESAMPLE BERNOULLI (12.5 PERCENT) REPEATABLE ({seed})",
    }


ONE_THREAD = ("block",)


def child(db: str, table: str, cols: list[str], rows: int, first: str, seed: int) -> None:
    """A fresh process: one form first (the table not yet read), then a plain scan twice."""
    import duckdb

    con = duckdb.connect(db, read_only=True)
    qs = statements(table, cols, rows, seed)
    out = {}
    for name in (first, "scan", "scan2"):
        con.execute(f"SET threads = {1 if name in ONE_THREAD else 2}")
        t = time.perf_counter()
        con.execute(qs["scan" if name == "scan2" else name]).fetchall()
        out[name] = time.perf_counter() - t
    print(json.dumps(out))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--db", default="/tmp/tillite-bench-20000000x8.duckdb")
    ap.add_argument("--table", default="blobs")
    ap.add_argument("--cols", type=int, default=8)
    ap.add_argument("--rows", type=int, default=20_000_000)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    cols = [f"c{j}" for j in range(args.cols)]
    if args.child:
        child(args.db, args.table, cols, args.rows, args.child, args.seed)
        return
    import duckdb

    qs = statements(args.table, cols, args.rows, args.seed)
    forms = [k for k in qs if k != "scan"]
    same = {}
    for name in forms:
        drawn = []
        for threads in (1, 2, 4):
            con = duckdb.connect(args.db, read_only=True)
            con.execute(f"SET threads = {1 if name in ONE_THREAD else threads}")
            drawn.append(sorted(con.execute(qs[name]).fetchall()))
            con.close()
        same[name] = (drawn[0] == drawn[1] == drawn[2], [len(d) for d in drawn])
    first = {}
    for name in forms:
        cmd = [sys.executable, __file__, "--child", name, "--db", args.db, "--table", args.table,
               "--cols", str(args.cols), "--rows", str(args.rows), "--seed", str(args.seed)]
        first[name] = json.loads(subprocess.run(cmd, capture_output=True, text=True, check=True).stdout)
    con = duckdb.connect(args.db, read_only=True)
    for q in qs.values():
        con.execute(q).fetchall()
    times: dict[str, list[float]] = {k: [] for k in qs}
    for _ in range(args.repeat):
        for name, q in qs.items():
            con.execute(f"SET threads = {1 if name in ONE_THREAD else 2}")
            t = time.perf_counter()
            con.execute(q).fetchall()
            times[name].append(time.perf_counter() - t)
    scan = statistics.median(times["scan"])
    print(f"{args.rows:,} rows x {args.cols} columns ({args.db}), medians of {args.repeat}, forms interleaved")
    print(f"{'form':<12}{'warm s':>9}{'scans':>8}   {'1/2/4 threads':<22}{'fresh process: form, then scan, scan':>40}")
    print(f"{'plain scan':<12}{scan:>9.3f}{1.0:>8.2f}")
    for name in forms:
        w = statistics.median(times[name])
        ok, sizes = same[name]
        f = first[name]
        print(f"{name:<12}{w:>9.3f}{w / scan:>8.2f}   {('same' if ok else 'DIFFER') + ' ' + '/'.join(map(str, sizes)):<22}"
              f"{f[name]:>14.3f} {f['scan']:>8.3f} {f['scan2']:>8.3f}")


if __name__ == "__main__":
    main()
