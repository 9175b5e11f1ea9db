"""Refresh cost against a full store build: 60 daily partitions, one changed.

    python benchmarks/bench_store.py                   # 3M meter-days (50,000 per day)
    python benchmarks/bench_store.py --rows 30000000   # the large target
    python benchmarks/bench_store.py --rows 600000 --repeat 1   # quick look
    python benchmarks/bench_store.py --categorical district --no-commands   # a store keeping a categorical column

Two ways, each on one database built once:

- in process (the Python API): the store's own work, without start-up;
- as commands (``tillite store build``, ``tillite refresh``, ``tillite refresh
  --partitions day=...``), each in a fresh process, start-up included: what a
  scheduled job waits for.

Prints the medians of --repeat runs, the plain scan for scale, the refresh
stages, and the refresh/build ratios beside their targets (issue 12: 1 changed
partition of 60, as commands, fingerprints <= 0.35 of a build and named
partitions <= 0.15 on 3M rows; <= 0.2 and <= 0.05 on 30M rows).  Ratios come
from one run on one machine: compare them, not the seconds, across machines.
Not a pass/fail test.
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from tillite import DuckDBEngine, Settings, Source
from tillite import store as S
from tillite.demo import DEMO_COLUMNS, build_demo_database

#: (rows at or above which they apply, fingerprint refresh target, named-partition refresh target), as commands
TARGETS = ((30_000_000, 0.2, 0.05), (0, 0.35, 0.15))
COMMAND = [sys.executable, "-c", "from tillite.cli import main; main()"]


def targets_for(rows: int) -> tuple[float, float]:
    for at_least, fp, named in TARGETS:
        if rows >= at_least:
            return fp, named
    raise AssertionError


def command_env() -> dict[str, str]:
    """The environment of the measured commands: bytecode caching on, as for an installed package.

    A session that sets PYTHONDONTWRITEBYTECODE makes every command compile tillite's
    sources again (about 0.1 s of CPU here); an installed package has its .pyc files.
    """
    env = {**os.environ}
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    return env


#: CPU seconds (all threads) of each command run by run_command, by its first argument(s): steadier than the
#: wall clock when other jobs share the cores
COMMAND_CPU: dict[str, list[float]] = {}


def children_cpu() -> float:
    import resource

    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def run_command(args: list[str], kind: str | None = None) -> float:
    t, c = time.perf_counter(), children_cpu()
    done = subprocess.run(COMMAND + args, capture_output=True, text=True, env=command_env())
    took = time.perf_counter() - t
    if done.returncode != 0:
        raise SystemExit(f"{' '.join(args)} failed:\n{done.stdout}\n{done.stderr}")
    if kind is not None:
        COMMAND_CPU.setdefault(kind, []).append(children_cpu() - c)
    return took


def change_day(db: Path, day: str) -> None:
    """Every reading of one day goes up by 5% (another process, as a loader would)."""
    import duckdb

    con = duckdb.connect(str(db))
    con.execute(f"UPDATE meter_days SET litres = litres * 1.05 WHERE day = DATE '{day}'")
    con.execute("CHECKPOINT")
    con.close()


def prepare(db: Path, rows: int, days: int) -> float:
    """The demo table stored day by day (as warehouse tables land); returns the plain scan time."""
    build_demo_database(db, rows=rows, days=days)
    engine = DuckDBEngine(str(db))
    engine.con.execute("CREATE TABLE by_day AS SELECT * FROM meter_days ORDER BY day")
    engine.con.execute("DROP TABLE meter_days")
    engine.con.execute("ALTER TABLE by_day RENAME TO meter_days")
    engine.con.execute("CHECKPOINT")
    scan_q = "SELECT " + ", ".join(f"sum({c})" for c in DEMO_COLUMNS) + " FROM meter_days"
    engine.con.execute(scan_q).fetchall()
    scans = []
    for _ in range(5):
        t = time.perf_counter()
        engine.con.execute(scan_q).fetchall()
        scans.append(time.perf_counter() - t)
    engine.close()
    return statistics.median(scans)


def in_process(db: Path, k: int, repeat: int, day_of, categorical: tuple[str, ...] = ()) -> dict[str, list]:
    engine = DuckDBEngine(str(db))
    cols = list(DEMO_COLUMNS)
    out: dict[str, list] = {"build": [], "idle": [], "fingerprints": [], "named": [], "named_fresh": [], "stages": [],
                            "named_stages": []}
    S.match_segments(np.zeros((1, 1)), [0], np.zeros((1, 1)), 1, np.ones(1), 1.0)  # load the assignment solver once
    for r in range(repeat):
        t = time.perf_counter()
        S.build(engine, Source.of_table("meter_days"), cols, S.PartitionSpec(("day",)),
                Settings(k=k, refine_passes=0, categorical=categorical), replace=True)
        out["build"].append(time.perf_counter() - t)
        t = time.perf_counter()
        S.refresh(engine, "meter_days")
        out["idle"].append(time.perf_counter() - t)
        for kind in ("fingerprints", "named", "named_fresh"):
            day = day_of(r, kind)
            engine.con.execute(f"UPDATE meter_days SET litres = litres * 1.05 WHERE day = DATE '{day}'")
            engine.con.execute("CHECKPOINT")
            rule = S.fresh_seeding_reason
            if kind == "named_fresh":  # as before the rule: a fresh k-means++ seeding on every refresh
                S.fresh_seeding_reason = lambda *a: "always"
            t = time.perf_counter()
            try:
                report = S.refresh(engine, "meter_days", partitions=[f"day={day}"] if kind != "fingerprints" else None)
            finally:
                S.fresh_seeding_reason = rule
            out[kind].append(time.perf_counter() - t)
            if kind != "named_fresh":
                out["stages" if kind == "fingerprints" else "named_stages"].append(report.seconds)
            assert report.changed == [day], report.changed
    engine.close()
    return out


def as_commands(db: Path, k: int, repeat: int, day_of, categorical: tuple[str, ...] = ()) -> dict[str, list]:
    cols = ",".join(DEMO_COLUMNS)
    extra_build = [a for c in categorical for a in ("--categorical", c)]
    out: dict[str, list] = {"build": [], "fingerprints": [], "named": [], "version": []}
    run_command(["store", "status", str(db), "--store", "meter_days"])  # writes the bytecode cache once
    for r in range(repeat):
        out["version"].append(run_command(["--version"], "version"))
        out["build"].append(run_command(["store", "build", str(db), "-t", "meter_days", "-c", cols, "--partition-by", "day",
                                         "--k", str(k), "--refine-passes", "0", "--regrid", "-q", *extra_build], "build"))
        for kind in ("fingerprints", "named"):
            day = day_of(r + repeat, kind)
            change_day(db, day)
            extra = ["--partitions", f"day={day}"] if kind == "named" else []
            out[kind].append(run_command(["refresh", str(db), "--store", "meter_days", "-q", *extra], kind))
    return out


def median(v):
    return statistics.median(v)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=3_000_000)
    ap.add_argument("--days", type=int, default=60)
    ap.add_argument("--k", type=int, default=5)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--categorical", action="append", default=[], help="Also keep this categorical column (e.g. district).")
    ap.add_argument("--no-commands", action="store_true", help="Only the in-process runs.")
    args = ap.parse_args()
    categorical = tuple(args.categorical)
    work = Path(tempfile.mkdtemp(prefix="tillite-bench-store-"))

    def day_of(r: int, kind: str) -> str:  # a different day for every change, all inside the 60 days
        n = 3 * r + ("fingerprints", "named", "named_fresh").index(kind)
        return str(np.datetime64("2026-01-05") + n)

    try:
        db = work / "water.duckdb"
        scan = prepare(db, args.rows, args.days)
        api = in_process(db, args.k, args.repeat, day_of, categorical)
        cli = None if args.no_commands else as_commands(db, args.k, args.repeat, day_of, categorical)
        fp_target, named_target = targets_for(args.rows)
        b, i, f, n = (median(api[x]) for x in ("build", "idle", "fingerprints", "named"))
        kept = f", categorical {', '.join(categorical)}" if categorical else ""
        print(f"\n{args.rows:,} meter-days in {args.days} daily partitions, k={args.k}{kept}; medians of {args.repeat}")
        print(f"{'plain sum scan':<46}{scan:>9.3f} s")
        print("in process (the store's own work):")
        print(f"  {'full store build':<44}{b:>9.3f} s   ({b / scan:.1f} plain scans)")
        print(f"  {'refresh, no partition changed':<44}{i:>9.3f} s   ratio {i / b:.3f}")
        print(f"  {'refresh, one changed, fingerprints':<44}{f:>9.3f} s   ratio {f / b:.3f}")
        print(f"  {'refresh, one changed, --partitions':<44}{n:>9.3f} s   ratio {n / b:.3f}")
        nf = median(api["named_fresh"])
        print(f"  {'  the same, fresh seeding every refresh':<44}{nf:>9.3f} s   ratio {nf / b:.3f}   (as before the reseeding rule)")
        for name, key in (("fingerprints", "stages"), ("--partitions", "named_stages")):
            keys = sorted({k for st in api[key] for k in st})
            print(f"  stages, {name} (median s): " + ", ".join(f"{k} {median([st.get(k, 0.0) for st in api[key]]):.3f}" for k in keys))
        if cli is None:
            return
        cb, cf, cn, cv = (median(cli[x]) for x in ("build", "fingerprints", "named", "version"))
        print("as commands (fresh process each, start-up included, bytecode cached as when installed):")
        print(f"  {'tillite --version (start-up alone)':<44}{cv:>9.3f} s")
        print(f"  {'tillite store build':<44}{cb:>9.3f} s")
        print(f"  {'tillite refresh (fingerprints)':<44}{cf:>9.3f} s")
        print(f"  {'tillite refresh --partitions day=...':<44}{cn:>9.3f} s")
        print("\nratios, one changed partition of 60, as commands:")
        print(f"  refresh with fingerprints / build:     {cf / cb:.3f}  (target <= {fp_target})  {'met' if cf / cb <= fp_target else 'MISSED'}")
        print(f"  refresh --partitions / build:          {cn / cb:.3f}  (target <= {named_target})  {'met' if cn / cb <= named_target else 'MISSED'}")
        print(f"  the same less start-up (--version):    {(cf - cv) / (cb - cv):.3f} and {(cn - cv) / (cb - cv):.3f}")
        ub, uf, un = (median(COMMAND_CPU[x]) for x in ("build", "fingerprints", "named"))
        print(f"  in CPU seconds (all threads; build {ub:.3f} s): {uf / ub:.3f} and {un / ub:.3f}")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
