"""Cost of choosing each row's nearest centroid in SQL, form by form, in one run.

    python benchmarks/bench_assignment.py [--rows 5000000] [--k 5,8] [--repeat 5]

Every refine pass, label and report statement scores each row against the k
centroids (b_i + sum_j a_ij v_j) and then picks the least score and its segment
(first position on ties).  This times the refine statement on DuckDB with each
way of picking, swapped into ``sqlgen.nearest_layers``:
  - least:      LEAST(s_0..s_k-1), then a CASE of k equality tests (the form used before,
                still used above sqlgen.PAIRWISE_MAX_K centroids);
  - pairs:      one CASE: the first i whose score is <= every later one, then its score by a
                CASE on the id (used up to PAIRWISE_MAX_K);
  - chain:      k-1 layers, each carrying the best score so far (LEAST of two) and its id
                (a CASE on s_i < best);
  - tournament: ceil(log2 k) layers of pairwise matches, the left (lower) side winning ties;
  - nested:     one layer: LEAST for the score, the tournament's id as nested CASEs;
  - sqlgen now: what sqlgen.nearest_layers picks for this k.
Each form's segment counts must equal the first form's (they pick the same rows).
Printed: median wall and CPU seconds per pass (CPU of all DuckDB threads: steadier on a loaded
machine), and each in plain scans (sum of the columns).
Uses the blob table of bench_pipeline.py (built there if missing).  Not a pass/fail test.

    python benchmarks/bench_assignment.py --postgres 1000000

instead starts a throwaway PostgreSQL server (tests/throwaway_servers.py), loads that many
blob rows and times, for "least" and "pairs", the refine pass (fenced) and a read of the
label select as a view would run it (unfenced), median of 3.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from sqlglot import exp

from tillite import sqlgen
from tillite.engines import DuckDBEngine
from tillite.sqlgen import col, internal, least_of, num, scan_fence, subquery

HERE = Path(__file__).resolve().parent


def chain_form(scored, score, ids, best, nearest, dialect, fence):
    """k-1 layers carrying (best so far, its id)."""
    k = len(score)
    b_prev, n_prev = col(score[0]), num(ids[0])
    layer = scored
    for i in range(1, k):
        b_name = best if i == k - 1 else internal(f"cb{i}")
        n_name = nearest if i == k - 1 else internal(f"cn{i}")
        better = exp.LT(this=col(score[i]), expression=b_prev.copy())
        layer = exp.select(
            exp.Star(),
            exp.alias_(least_of([col(score[i]), b_prev.copy()]), b_name, quoted=True),
            exp.alias_(exp.Case(ifs=[exp.If(this=better, true=num(ids[i]))], default=n_prev), n_name, quoted=True),
        ).from_(subquery(layer, internal(f"l{i}")))
        if fence and i < k - 1:
            layer = scan_fence(layer, dialect)
        b_prev, n_prev = col(b_name), col(n_name)
    if k == 1:
        layer = exp.select(exp.Star(), exp.alias_(col(score[0]), best, quoted=True), exp.alias_(num(ids[0]), nearest, quoted=True)).from_(
            subquery(scored, internal("l0")))
    return layer


def tournament_form(scored, score, ids, best, nearest, dialect, fence):
    """Pairwise matches in ceil(log2 k) layers; the left side (lower positions) wins ties."""
    players = [(col(s), num(sid)) for s, sid in zip(score, ids)]
    layer, depth = scored, 0
    while len(players) > 1 or depth == 0:
        depth += 1
        last = len(players) <= 2
        nxt, items = [], []
        for m in range(0, len(players), 2):
            if m + 1 == len(players):
                w, idx = players[m]
            else:
                (wl, il), (wr, ir) = players[m], players[m + 1]
                w = least_of([wl.copy(), wr.copy()])
                idx = exp.Case(ifs=[exp.If(this=exp.LT(this=wr.copy(), expression=wl.copy()), true=ir.copy())], default=il.copy())
            wn = best if last else internal(f"tw{depth}_{m}")
            inn = nearest if last else internal(f"ti{depth}_{m}")
            items += [exp.alias_(w, wn, quoted=True), exp.alias_(idx, inn, quoted=True)]
            nxt.append((col(wn), col(inn)))
        layer = exp.select(exp.Star(), *items).from_(subquery(layer, internal(f"t{depth}")))
        if fence and not last:
            layer = scan_fence(layer, dialect)
        players = nxt
    return layer


def nested_form(scored, score, ids, best, nearest, dialect, fence):
    """One layer: LEAST for the score; the id by a nested CASE tournament (LEASTs of the halves)."""

    def least(lo, hi):
        return col(score[lo]) if hi - lo == 1 else least_of([col(n) for n in score[lo:hi]])

    def winner(lo, hi):
        if hi - lo == 1:
            return num(ids[lo])
        mid = (lo + hi + 1) // 2
        return exp.Case(ifs=[exp.If(this=exp.LT(this=least(mid, hi), expression=least(lo, mid)), true=winner(mid, hi))],
                        default=winner(lo, mid))

    k = len(score)
    return exp.select(exp.Star(), exp.alias_(least(0, k), best, quoted=True), exp.alias_(winner(0, k), nearest, quoted=True)).from_(
        subquery(scored, internal("b")))


FORMS = {"least": sqlgen._first_least_by_least, "pairs": sqlgen._first_least_pairwise, "chain": chain_form, "tournament": tournament_form, "nested": nested_form,
         "sqlgen now": sqlgen.nearest_layers}


def assignment(engine: DuckDBEngine, cols: list[str], k: int, seed: int) -> sqlgen.Assignment:
    """Centroids at k sampled rows, standardised by the table's mean and sd."""
    stats = engine.query(exp.select(*[exp.alias_(exp.func("avg", col(c)), f"m{j}") for j, c in enumerate(cols)],
                                    *[exp.alias_(exp.func("stddev_pop", col(c)), f"s{j}") for j, c in enumerate(cols)]).from_("blobs"))
    mean = np.array([float(stats[f"m{j}"][0]) for j in range(len(cols))])
    sd = np.array([float(stats[f"s{j}"][0]) for j in range(len(cols))])
    rows = engine.query(exp.select(*[col(c) for c in cols]).from_("blobs").limit(200_000))
    x = np.column_stack([np.asarray(rows[c], dtype=np.float64) for c in cols])
    pick = np.random.default_rng(seed).choice(len(x), size=k, replace=False)
    cents = (x[pick] - mean) / sd
    return sqlgen.Assignment(center=tuple(mean), inv_scale=tuple(1.0 / sd), weights=(1.0,) * len(cols),
                             centroids=tuple(map(tuple, cents)))


def postgres_run(rows: int, cols: int, ks: list[int]) -> None:
    """The least and pairs forms on a throwaway PostgreSQL server: refine pass and an unfenced label read."""
    import psycopg

    sys.path.insert(0, str(HERE.parent / "tests"))
    from throwaway_servers import start_postgres

    from tillite.engines import PostgresEngine

    server = start_postgres()
    try:
        rng = np.random.default_rng(3)
        centers = rng.uniform(-10, 10, (8, cols))
        x = centers[rng.integers(0, 8, rows)] + rng.normal(0, 1.5, (rows, cols))
        names = [f"c{j}" for j in range(cols)]
        with psycopg.connect(server.conninfo, autocommit=True) as con:
            con.execute("CREATE TABLE blobs (" + ", ".join(f"{c} DOUBLE PRECISION" for c in names) + ")")
            with con.cursor().copy("COPY blobs FROM STDIN") as copy:
                for row in x.tolist():
                    copy.write_row(row)
            con.execute("ANALYZE blobs")
        engine = PostgresEngine(server.conninfo)
        src = sqlgen.Source.of_table("blobs")
        mean, sd = x.mean(axis=0), x.std(axis=0)
        saved = sqlgen.nearest_layers
        print(f"PostgreSQL, {rows:,} rows x {cols} doubles; median of 3, forms interleaved")
        for k in ks:
            assign = sqlgen.Assignment(center=tuple(mean), inv_scale=tuple(1 / sd), weights=(1.0,) * cols,
                                       centroids=tuple(map(tuple, (x[rng.choice(rows, k, replace=False)] - mean) / sd)))
            times: dict[tuple[str, str], list[float]] = {}
            for _ in range(3):
                for f in ("least", "pairs"):
                    sqlgen.nearest_layers = FORMS[f]
                    try:
                        refine = sqlgen.refine_statement(src, names, assign, "postgres")
                        view = sqlgen.label_select(src, names, names, assign, "postgres")
                    finally:
                        sqlgen.nearest_layers = saved
                    read = exp.select("segment", exp.func("count", exp.Star()), exp.func("sum", col("distance"))).from_(
                        subquery(view, "lv")).group_by("segment")
                    for what, st in (("refine pass", refine), ("label view read", read)):
                        t0 = time.perf_counter()
                        engine.query(st)
                        times.setdefault((what, f), []).append(time.perf_counter() - t0)
            for what in ("refine pass", "label view read"):
                least, pairs = statistics.median(times[(what, "least")]), statistics.median(times[(what, "pairs")])
                print(f"  k = {k:<3}{what:<17} least {least:.3f} s, pairs {pairs:.3f} s: {pairs / least:.2f} of least")
        engine.close()
    finally:
        server.stop()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=5_000_000)
    ap.add_argument("--cols", type=int, default=8)
    ap.add_argument("--k", default="5,8")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--forms", default=",".join(FORMS))
    ap.add_argument("--postgres", type=int, default=0, metavar="ROWS", help="time least and pairs on a throwaway PostgreSQL server")
    args = ap.parse_args()
    if args.postgres:
        postgres_run(args.postgres, args.cols, [int(v) for v in args.k.split(",")])
        return
    db = Path(f"/tmp/tillite-bench-{args.rows}x{args.cols}.duckdb")
    if not db.exists():  # bench_pipeline builds it; --k there is the number of blobs
        subprocess.run([sys.executable, str(HERE / "bench_pipeline.py"), "--rows", str(args.rows), "--cols", str(args.cols),
                        "--repeat", "0", "--skip-export"], check=False, capture_output=True)
    engine = DuckDBEngine(str(db))
    cols = [f"c{j}" for j in range(args.cols)]
    src = sqlgen.Source.of_table("blobs")
    plain = exp.select(*[exp.func("sum", col(c)) for c in cols]).from_("blobs")
    forms = args.forms.split(",")
    saved = sqlgen.nearest_layers
    print(f"{args.rows:,} rows x {args.cols} doubles, DuckDB; median of {args.repeat}, forms interleaved")
    for k in [int(v) for v in args.k.split(",")]:
        assign = assignment(engine, cols, k, seed=k)
        times: dict[str, list[float]] = {f: [] for f in forms}
        cpus: dict[str, list[float]] = {f: [] for f in forms}
        scans: list[float] = []
        counts: dict[str, dict] = {}
        cpu_scans: list[float] = []
        for _ in range(args.repeat):
            t0, c0 = time.perf_counter(), time.process_time()
            engine.query(plain)
            scans.append(time.perf_counter() - t0)
            cpu_scans.append(time.process_time() - c0)
            for f in forms:
                sqlgen.nearest_layers = FORMS[f]
                try:
                    t0, c0 = time.perf_counter(), time.process_time()
                    got = engine.query(sqlgen.refine_statement(src, cols, assign, "duckdb"))
                    times[f].append(time.perf_counter() - t0)
                    cpus[f].append(time.process_time() - c0)
                finally:
                    sqlgen.nearest_layers = saved
                seg = np.ma.getdata(got["segment"]).tolist()
                counts[f] = dict(zip(seg, np.asarray(got["n"]).tolist()))
        scan = statistics.median(scans)
        cpu_scan = statistics.median(cpu_scans)
        print(f"\nk = {k}: plain scan {scan:.3f} s wall, {cpu_scan:.3f} s CPU (all threads)")
        base, cpu_base = statistics.median(times[forms[0]]), statistics.median(cpus[forms[0]])
        for f in forms:
            t, c = statistics.median(times[f]), statistics.median(cpus[f])
            same = "same counts" if counts[f] == counts[forms[0]] else "COUNTS DIFFER"
            print(f"  {f:<12} wall {t:>6.3f} s {t / scan:>6.2f} scans {t / base:>6.3f} of {forms[0]} |"
                  f" CPU {c:>6.3f} s {c / cpu_scan:>6.2f} scans {c / cpu_base:>6.3f} of {forms[0]}   {same}")


if __name__ == "__main__":
    main()
