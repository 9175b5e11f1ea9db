"""Every speed target of the project, measured in one run: the benchmarks one after another.

    python benchmarks/run_targets.py                 # all of them (about 15 minutes; builds missing data in /tmp)
    python benchmarks/run_targets.py --quick         # smaller tables, for a look (not the targets' sizes)
    python benchmarks/run_targets.py --only store    # the benchmarks whose name holds "store"

Runs each benchmark in its own process, in order, with the load average before
each (the machine may be shared: read ratios within one benchmark's output, not
seconds across machines), keeps each full output in --logs, and ends with the
lines that name a target.  Not a pass/fail test.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent

#: (name, arguments at the targets' sizes, arguments for --quick, what it measures)
BENCHMARKS: list[tuple[str, list[str], list[str], str]] = [
    ("bench_startup", ["--runs", "7"], ["--runs", "3"], "start-up: --version and show"),
    ("bench_second_phase", ["--no-old", "--seeds", "3"], ["--no-old", "--seeds", "1", "--repeat", "1"],
     "second phase, choice of k, Ward"),
    ("bench_cell_map", ["--repeat", "7"], ["--repeat", "3"], "passes through a cell map"),
    ("bench_store", ["--repeat", "3"], ["--rows", "600000", "--repeat", "1"], "refresh against build, 3M rows"),
    ("bench_store_30m", ["--rows", "30000000", "--repeat", "1"], ["--rows", "1200000", "--repeat", "1"],
     "refresh against build, 30M rows"),
    ("bench_pipeline", ["--rows", "20000000", "--repeat", "3"], ["--rows", "1000000", "--repeat", "1", "--skip-export"],
     "whole segment run on 20M x 8"),
]

#: Words that mark a line about a target in the benchmarks' output.
TARGET_WORDS = ("target", "MISSED", " ok", "(ok)", "<=")


def script_of(name: str) -> Path:
    """The benchmark file behind a name (bench_store_30m is bench_store at another size)."""
    return HERE / f"{name.removesuffix('_30m')}.py"


def load_average() -> str:
    one, five, _ = os.getloadavg()
    return f"load average {one:.1f} (1 min), {five:.1f} (5 min)"


def run_one(name: str, args: list[str], logs: Path) -> list[str]:
    """Run one benchmark, echo and keep its output; return its lines about targets."""
    command = [sys.executable, str(script_of(name)), *args]
    print(f"\n=== {name} {' '.join(args)}   [{time.strftime('%H:%M:%S')}, {load_average()}]", flush=True)
    t = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True)
    text = done.stdout + (f"\n[stderr]\n{done.stderr}" if done.returncode else "")
    (logs / f"{name}.txt").write_text(text)
    print(text, end="", flush=True)
    print(f"=== {name}: {time.perf_counter() - t:.0f} s, exit {done.returncode}")
    return [line for line in done.stdout.splitlines() if any(w in line for w in TARGET_WORDS)]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="smaller tables, for a quick look (not the targets' sizes)")
    ap.add_argument("--only", default="", help="run only the benchmarks whose name holds this text")
    ap.add_argument("--logs", default="/tmp/tillite-targets", help="folder for each benchmark's full output")
    args = ap.parse_args()
    logs = Path(args.logs)
    logs.mkdir(parents=True, exist_ok=True)
    summary: list[tuple[str, list[str]]] = []
    for name, full, quick, what in BENCHMARKS:
        if args.only in name:
            summary.append((f"{name} ({what})", run_one(name, quick if args.quick else full, logs)))
    print(f"\n=== lines about targets   [{load_average()}]")
    for title, lines in summary:
        print(title)
        for line in lines:
            print("   ", line.strip())


if __name__ == "__main__":
    main()
