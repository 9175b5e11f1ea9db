"""Side-by-side cost of a tillite `segment` run, printed as ratios measured in one run.

    python benchmarks/bench_pipeline.py                 # 10M rows x 8 columns (the target)
    python benchmarks/bench_pipeline.py --rows 2000000  # quicker

Prints: one plain aggregate scan over the columns (median of --repeat); tillite
profile, cell pass, second phase, each refine pass and total; exporting the rows
to numpy plus scikit-learn KMeans(n_init=1); peak memory of both (process RSS
and Python-side allocations traced by tracemalloc), and tillite's Python-side
peak at a tenth of the rows to show it does not grow with the row count.
Each measured job runs in its own fresh process so peaks do not mix.
Also runs `tillite segment` as a command (fresh process, start-up included).
The command is also measured in CPU seconds of all threads against the plain
scan's, which hold steadier than wall clocks when other jobs share the cores.
Targets: the segment command <= 10 plain scans (start-up included) and <= 1/8
of export-and-cluster; the API run's total <= 6 plain scans.
Not a pass/fail test: read the ratios.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def build(db: Path, rows: int, cols: int, centers: int, seed: int) -> None:
    """Blob data (scikit-learn make_blobs) in a DuckDB file, built in chunks."""
    import duckdb
    import numpy as np
    from sklearn.datasets import make_blobs

    rng = np.random.default_rng(seed)
    centers = rng.uniform(-10, 10, size=(centers, cols))
    con = duckdb.connect(str(db))
    names = [f"c{j}" for j in range(cols)]
    con.execute("CREATE TABLE blobs (" + ", ".join(f"{n} DOUBLE" for n in names) + ")")
    chunk = 2_000_000
    done = 0
    while done < rows:
        m = min(chunk, rows - done)
        x, _ = make_blobs(n_samples=m, centers=centers, cluster_std=1.5, random_state=seed + done)
        frame = {n: x[:, j] for j, n in enumerate(names)}  # noqa: F841 (scanned by name)
        con.execute("INSERT INTO blobs SELECT * FROM frame")
        done += m
    con.execute(f"CREATE TABLE blobs_tenth AS SELECT * FROM blobs LIMIT {rows // 10}")
    con.close()


def child(kind: str, db: str, table: str, cols: int, k: int) -> None:
    """Run one measured job and print a JSON line (in a fresh process)."""
    import resource
    import tracemalloc

    tracemalloc.start()
    t0 = time.perf_counter()
    out: dict = {}
    if kind in ("tillite", "tillite-bernoulli"):
        from tillite import DuckDBEngine, Settings, Source, segment, stages

        if kind == "tillite-bernoulli":  # the profile as before the block sample: BERNOULLI REPEATABLE over every row
            stages.block_sample_pays = lambda *a, **k: False

        engine = DuckDBEngine(db, read_only=True)
        model = segment(engine, Source.of_table(table), [f"c{j}" for j in range(cols)], Settings(k=k))
        out["timings"] = model.timings
        out["sse"] = model.sse
        out["cells"] = model.grid["cells"]
    elif kind == "export":
        import duckdb
        import numpy as np
        from sklearn.cluster import KMeans

        con = duckdb.connect(db, read_only=True)
        names = [f"c{j}" for j in range(cols)]
        got = con.execute("SELECT " + ", ".join(names) + f" FROM {table}").fetchnumpy()
        x = np.column_stack([got[n] for n in names])
        del got
        t_export = time.perf_counter() - t0
        z = (x - x.mean(axis=0)) / x.std(axis=0)
        del x
        km = KMeans(n_clusters=k, n_init=1, random_state=0).fit(z)
        out["timings"] = {"export": t_export, "kmeans": time.perf_counter() - t0 - t_export}
        out["sse"] = float(km.inertia_)
    elif kind == "scan":
        import duckdb

        con = duckdb.connect(db, read_only=True)
        q = "SELECT " + ", ".join(f"sum(c{j})" for j in range(cols)) + f" FROM {table}"
        con.execute(q).fetchall()  # warm
        times, cpus = [], []
        for _ in range(5):
            t, c = time.perf_counter(), process_cpu()
            con.execute(q).fetchall()
            times.append(time.perf_counter() - t)
            cpus.append(process_cpu() - c)
        out["timings"] = {"scan": statistics.median(times)}
        out["scan_cpu"] = statistics.median(cpus)
    out["wall"] = time.perf_counter() - t0
    usage = resource.getrusage(resource.RUSAGE_SELF)
    out["cpu"] = usage.ru_utime + usage.ru_stime  # every thread's CPU seconds: steadier than wall time on a loaded machine
    out["python_peak_mb"] = tracemalloc.get_traced_memory()[1] / 2**20
    out["rss_peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps(out))


def process_cpu() -> float:
    """CPU seconds of this process, every thread (DuckDB's included)."""
    import resource

    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def children_cpu() -> float:
    """CPU seconds of the finished child processes so far."""
    import resource

    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def measure_command(db: Path, table: str, cols: int, k: int, repeat: int) -> tuple[list[float], list[float]]:
    """Wall clock and CPU seconds of `tillite segment` as a command, start-up included (each run a fresh process).

    CPU seconds (all threads) hold steadier than the wall clock when other jobs share the cores.
    """
    import os
    import tempfile

    env = dict(os.environ)
    env.pop("PYTHONDONTWRITEBYTECODE", None)  # bytecode cached, as for an installed package (the first run writes it)
    src = str(HERE.parent / "src")
    env["PYTHONPATH"] = src + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    out = Path(tempfile.gettempdir()) / "tillite-bench-command-model.json"
    cmd = [sys.executable, "-m", "tillite.cli", "segment", str(db), "-t", table,
           "-c", ",".join(f"c{j}" for j in range(cols)), "--k", str(k), "-q", "-o", str(out)]
    subprocess.run([sys.executable, "-m", "tillite.cli", "--version"], check=True, capture_output=True, env=env)
    subprocess.run([sys.executable, "-c", "import tillite.cli, tillite.pipeline, tillite.engines, tillite.model"],
                   check=True, capture_output=True, env=env)
    walls, cpus = [], []
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), children_cpu()
        subprocess.run(cmd, check=True, capture_output=True, env=env)
        walls.append(time.perf_counter() - t0)
        cpus.append(children_cpu() - c0)
    return walls, cpus


def measure(kind: str, db: Path, table: str, cols: int, k: int) -> dict:
    cmd = [sys.executable, __file__, "--child", kind, "--db", str(db), "--table", table, "--cols", str(cols), "--k", str(k)]
    res = subprocess.run(cmd, capture_output=True, text=True, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--cols", type=int, default=8)
    ap.add_argument("--k", type=int, default=8)
    ap.add_argument("--repeat", type=int, default=3, help="tillite runs (median reported)")
    ap.add_argument("--db", default=None, help="DuckDB file to build or reuse")
    ap.add_argument("--table", default="blobs")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--skip-export", action="store_true", help="skip the export-and-cluster comparison")
    ap.add_argument("--compare-sample", action="store_true",
                    help="also run the API with the profile's old BERNOULLI sample, alternating with the block sample")
    args = ap.parse_args()
    if args.child:
        child(args.child, args.db, args.table, args.cols, args.k)
        return
    db = Path(args.db or f"/tmp/tillite-bench-{args.rows}x{args.cols}.duckdb")
    if not db.exists():
        t = time.perf_counter()
        build(db, args.rows, args.cols, args.k, seed=11)
        print(f"built {db} in {time.perf_counter() - t:.1f} s")

    scanned = measure("scan", db, "blobs", args.cols, args.k)
    scan, scan_cpu = scanned["timings"]["scan"], scanned["scan_cpu"]
    command_walls, command_cpus = measure_command(db, "blobs", args.cols, args.k, args.repeat)
    command, command_cpu = statistics.median(command_walls), statistics.median(command_cpus)
    runs = [measure("tillite", db, "blobs", args.cols, args.k) for _ in range(args.repeat)]
    tenth = measure("tillite", db, "blobs_tenth", args.cols, args.k)
    run = sorted(runs, key=lambda r: r["timings"]["total"])[len(runs) // 2]
    if args.compare_sample:
        pairs = [(measure("tillite-bernoulli", db, "blobs", args.cols, args.k), measure("tillite", db, "blobs", args.cols, args.k))
                 for _ in range(args.repeat)]
        print("\nprofile sample, side by side (alternating fresh processes; medians, in plain scans):")
        for name, pick in (("BERNOULLI over every row", 0), ("block sample (now)", 1)):
            for stage in ("profile", "cells", "total"):
                v = statistics.median(p[pick]["timings"][stage] for p in pairs)
                print(f"  {name:<26}{stage:<9}{v:>8.3f} s{v / scan:>8.2f}")
            cpu = statistics.median(p[pick]["cpu"] for p in pairs)
            print(f"  {name:<26}CPU s of the whole process (all threads, imports included): {cpu:.2f}")
            print(f"  {name:<26}same SSE in every run: {len({p[pick]['sse'] for p in pairs}) == 1}")
    print(f"\n{args.rows:,} rows x {args.cols} doubles, k={args.k}, DuckDB file {db}")
    print(f"{'stage':<22}{'seconds':>10}{'plain scans':>13}")
    print(f"{'plain sum scan':<22}{scan:>10.3f}{1.0:>13.2f}")
    for stage, secs in run["timings"].items():
        print(f"{'tillite ' + stage:<22}{secs:>10.3f}{secs / scan:>13.2f}")
    print(f"tillite totals over {len(runs)} runs: " + ", ".join(f"{r['timings']['total']:.3f}" for r in runs) + " s (median shown)")
    print(f"cells: {run['cells']:,}")
    print(f"tillite peak memory: process RSS {run['rss_peak_mb']:.0f} MB, Python-side {run['python_peak_mb']:.1f} MB"
          f" (at a tenth of the rows: Python-side {tenth['python_peak_mb']:.1f} MB)")
    print(f"{'tillite segment command':<22}{command:>10.3f}{command / scan:>13.2f}   (wall clock, start-up included; runs: "
          + ", ".join(f"{w:.3f}" for w in command_walls) + ")")
    print(f"{'  the same in CPU s':<22}{command_cpu:>10.3f}{command_cpu / scan_cpu:>13.2f}   (all threads, against the plain scan's "
          f"{scan_cpu:.3f} CPU s; steadier on a shared machine; runs: " + ", ".join(f"{c:.3f}" for c in command_cpus) + ")")
    if not args.skip_export:
        exp = measure("export", db, "blobs", args.cols, args.k)
        ex_total = exp["timings"]["export"] + exp["timings"]["kmeans"]
        print(f"{'export to numpy':<22}{exp['timings']['export']:>10.3f}{exp['timings']['export'] / scan:>13.2f}")
        print(f"{'sklearn KMeans n_init=1':<22}{exp['timings']['kmeans']:>10.3f}{exp['timings']['kmeans'] / scan:>13.2f}")
        print(f"export-and-cluster peak memory: process RSS {exp['rss_peak_mb']:.0f} MB, Python-side {exp['python_peak_mb']:.1f} MB")
        print(f"SSE: tillite {run['sse']:.6g}, sklearn n_init=1 {exp['sse']:.6g} (ratio {run['sse'] / exp['sse']:.5f})")
        print(f"\nratio tillite total / export-and-cluster: {run['timings']['total'] / ex_total:.3f}  (target <= 0.125)")
        print(f"ratio segment command / export-and-cluster: {command / ex_total:.3f}  (target <= 0.125)")
    print(f"ratio tillite total / plain scan:         {run['timings']['total'] / scan:.2f}  (target <= 6)")
    print(f"ratio segment command / plain scan:       {command / scan:.2f}  (target <= 10, start-up included)")
    print(f"the same in CPU seconds:                  {command_cpu / scan_cpu:.2f}")


if __name__ == "__main__":
    main()
