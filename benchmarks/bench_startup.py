"""Start-up of the command: `tillite --version` and `tillite show MODEL`, wall clock per fresh process.

    python benchmarks/bench_startup.py [--runs 7]

Builds a small model once (in /tmp), then runs each command --runs times in a
fresh interpreter and prints the median wall time beside its target (0.25 s),
with a bare `python -c pass` for scale and the heavy modules each command
imported; and how long a refresh command's imports take (no target of their
own: they are most of a refresh of one partition on 3M rows).  Not a pass/fail
test: read the figures (the machine may be loaded).
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

SRC = Path(__file__).resolve().parent.parent / "src"
TARGET_SECONDS = 0.25
#: what a refresh command imports before it runs its first statement
REFRESH_IMPORTS = "import tillite.cli, tillite.cli.store, tillite.store, sqlglot.generators.duckdb, duckdb"
HEAVY = ("numpy", "sqlglot", "duckdb", "psycopg", "pyspark", "scipy", "sklearn")


def environment() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(SRC) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def make_model(folder: Path) -> Path:
    model = folder / "startup-model.json"
    if model.exists():
        return model
    import duckdb

    db = folder / "startup.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE OR REPLACE TABLE t AS SELECT random() * 10 AS a, random() AS b, (i % 7)::DOUBLE AS c FROM range(100000) r(i)")
    con.close()
    cmd = [sys.executable, "-m", "tillite.cli", "segment", str(db), "-t", "t", "-c", "a,b,c", "--k", "4", "-q", "-o", str(model)]
    subprocess.run(cmd, check=True, env=environment(), capture_output=True)
    return model


def wall(cmd: list[str], runs: int) -> float:
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        subprocess.run(cmd, check=True, env=environment(), capture_output=True)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def heavy_imports(args: list[str]) -> list[str]:
    code = (
        "import sys\nfrom tillite.cli import main\n"
        f"try:\n    main({args!r}, standalone_mode=False)\nexcept SystemExit:\n    pass\n"
        "print(' '.join(sorted({m.split('.')[0] for m in sys.modules})))"
    )
    out = subprocess.run([sys.executable, "-c", code], check=True, env=environment(), capture_output=True, text=True)
    return sorted(set(out.stdout.split()[-200:]) & set(HEAVY))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--runs", type=int, default=7)
    ap.add_argument("--folder", default="/tmp")
    args = ap.parse_args()
    model = make_model(Path(args.folder))
    py = [sys.executable]
    base = wall(py + ["-c", "pass"], args.runs)
    print(f"{'command':<32}{'median s':>10}{'target s':>10}  heavy modules imported")
    print(f"{'python -c pass':<32}{base:>10.3f}{'':>10}")
    for label, argv in (("tillite --version", ["--version"]), ("tillite show MODEL", ["show", str(model)])):
        secs = wall(py + ["-m", "tillite.cli", *argv], args.runs)
        mark = "ok" if secs <= TARGET_SECONDS else "MISSED"
        print(f"{label:<32}{secs:>10.3f}{TARGET_SECONDS:>10.2f}  {', '.join(heavy_imports(argv)) or 'none'}  ({mark})")
    # what `tillite refresh` and `tillite store build` import before their first statement (no target of its own)
    libraries = wall(py + ["-c", "import numpy, sqlglot, sqlglot.generators.duckdb, duckdb, click"], args.runs)
    store_path = wall(py + ["-c", REFRESH_IMPORTS], args.runs)
    print(f"{'imports of a refresh':<32}{store_path:>10.3f}{'':>10}  of which numpy, sqlglot, duckdb, click alone {libraries:.3f}")


if __name__ == "__main__":
    main()
