"""Cost of a categorical column within groups: `segment --within route --categorical district` beside
`segment --within route` on the same table.

    python benchmarks/bench_within_categorical.py [--rows 2000000] [--groups 50] [--k 4] [--repeat 3]

Builds the demo database once (in /tmp, `tillite demo`'s generator) with a column ``route`` =
meter_id % GROUPS, as benchmarks/bench_within.py does.  Then, in one process, alternating the two,
median of --repeat runs each: --within route on the demo's five numeric columns, and the same plus
--categorical district (6 districts: 8 indicators).  Prints each run's stage times and the ratio.
Not a pass/fail test: the machine is shared.
"""

from __future__ import annotations

import statistics
import time
import warnings


from tillite import demo
from tillite.engines import DuckDBEngine
from tillite.pipeline import Settings, segment
from tillite.sqlgen import Source

from bench_within import build, routed_arguments  # the same routed demo file and options


def main() -> None:
    args = routed_arguments(__doc__)
    path = build(args.rows, args.groups)
    src = Source.of_table("routed")
    columns = list(demo.DEMO_COLUMNS)
    runs = {"within": (), "within + --categorical district": ("district",)}
    times: dict[str, list[float]] = {name: [] for name in runs}
    stages: dict[str, dict] = {}
    with DuckDBEngine(str(path), read_only=True) as engine:
        for _ in range(args.repeat):
            for name, categorical in runs.items():
                t0 = time.perf_counter()
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    model = segment(engine, src, columns, Settings(k=args.k, within="route", categorical=categorical))
                times[name].append(time.perf_counter() - t0)
                stages[name] = model.timings
    print(f"demo table: {args.rows:,} rows x {len(columns)} columns, --within route: {args.groups} groups, k={args.k}, "
          f"median of {args.repeat} (shared, loaded machine)")
    for name in runs:
        parts = ", ".join(f"{stage} {sec:.2f}" for stage, sec in stages[name].items() if stage != "total")
        print(f"  {name:34s} {statistics.median(times[name]):7.2f} s   (last run's stages: {parts})")
    base, cat = (statistics.median(times[name]) for name in runs)
    print(f"with / without the categorical column = {cat / base:.2f}x")


if __name__ == "__main__":
    main()
