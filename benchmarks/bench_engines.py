"""The same `segment` + `label` run on DuckDB, PostgreSQL and Spark (local), stage by stage.

    python benchmarks/bench_engines.py                      # 2,000,000 rows x 5 columns
    python benchmarks/bench_engines.py --rows 200000 --engines duckdb,postgres

For each engine it prints the seconds of each stage (profile, cells, second
phase, each refine pass, label as a table or file) next to one plain
aggregate scan of the columns on that engine, and the bytes that came back to
Python per stage (numpy columns as returned by the engine: the profile sample,
then CFs only).  The same run on a tenth of the rows shows the bytes do not
grow with the row count.  Not a pass/fail test: read the side-by-side figures.

PostgreSQL is a throwaway server (initdb/pg_ctl in a temporary directory, as
tests/throwaway_servers.py makes it); Spark is a local[2] session reading a
Parquet copy of the rows in place.  Everything runs on this machine.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests"))

COLUMNS = [f"c{j}" for j in range(5)]


def build(folder: Path, rows: int, seed: int = 0) -> tuple[Path, Path, Path]:
    """make_blobs rows in a DuckDB file (tables blobs, blobs_tenth), with Parquet and CSV copies of each."""
    import duckdb
    from sklearn.datasets import make_blobs

    db = folder / "blobs.duckdb"
    centers = np.random.default_rng(seed).uniform(-10, 10, size=(6, len(COLUMNS)))
    x, _ = make_blobs(n_samples=rows, centers=centers, cluster_std=1.5, random_state=seed)
    con = duckdb.connect(str(db))
    frame = {n: x[:, j] for j, n in enumerate(COLUMNS)}  # noqa: F841 (scanned by name)
    con.execute("CREATE TABLE blobs AS SELECT * FROM frame")
    con.execute(f"CREATE TABLE blobs_tenth AS SELECT * FROM blobs LIMIT {rows // 10}")
    for table in ("blobs", "blobs_tenth"):
        con.execute(f"COPY {table} TO '{folder / table}.parquet' (FORMAT PARQUET)")
        con.execute(f"COPY {table} TO '{folder / table}.csv' (HEADER false)")
    con.close()
    return db, folder / "blobs.parquet", folder / "blobs.csv"


def load_postgres(conninfo: str, folder: Path) -> None:
    """The two tables into PostgreSQL with COPY, streamed from the CSV copies."""
    import psycopg
    from psycopg import sql

    with psycopg.connect(conninfo, autocommit=True) as con:
        for table in ("blobs", "blobs_tenth"):
            cols = sql.SQL(", ").join(sql.SQL("{} DOUBLE PRECISION").format(sql.Identifier(c)) for c in COLUMNS)
            con.execute(sql.SQL("CREATE TABLE {} ({})").format(sql.Identifier(table), cols))
            with con.cursor().copy(sql.SQL("COPY {} FROM STDIN (FORMAT csv)").format(sql.Identifier(table))) as copy:
                with open(folder / f"{table}.csv", "rb") as f:
                    while chunk := f.read(1 << 20):
                        copy.write(chunk)
            con.execute(sql.SQL("ANALYZE {}").format(sql.Identifier(table)))


def plain_scan(engine, source) -> float:
    """Seconds of one SELECT sum(c) per column: the unit the stages are compared with."""
    from sqlglot import exp

    from tillite import sqlgen

    stmt = exp.select(*[exp.Sum(this=sqlgen.col(c)) for c in COLUMNS]).from_(source.relation())
    engine.query(stmt)  # warm
    t0 = time.perf_counter()
    engine.query(stmt)
    return time.perf_counter() - t0


def run(engine, source, label_into: str) -> dict[str, tuple[float, int]]:
    """segment + label with per-stage (seconds, bytes back to Python)."""
    from tillite.pipeline import Settings, label, segment

    marks: list[tuple[str, int]] = []

    def progress(stage: str, message: str) -> None:
        marks.append((stage, engine.bytes_fetched))

    start = engine.bytes_fetched
    model = segment(engine, source, COLUMNS, Settings(k=6, refine_passes=3, tolerance=0.0, seed=0), progress=progress)
    out: dict[str, tuple[float, int]] = {}
    before = start
    refine = 0
    for stage, fetched in marks:
        if stage == "refine":
            refine += 1
            name, seconds = f"refine {refine}", model.timings[f"refine_{refine}"]
        else:
            name, seconds = stage, model.timings["second_phase" if stage == "second phase" else stage]
        out[name] = (seconds, fetched - before)
        before = fetched
    t0 = time.perf_counter()
    b0 = engine.bytes_fetched
    label(engine, source, model, label_into, materialize=not source.files, replace=True)
    out["label"] = (time.perf_counter() - t0, engine.bytes_fetched - b0)
    return out


def open_engines(names: list[str], folder: Path, db: Path):
    """(name, engine, source for the full table, source for the tenth, label target) per engine."""
    from tillite.engines import DuckDBEngine, PostgresEngine, SparkEngine
    from tillite.sqlgen import Source

    cleanup = []
    out = []
    if "duckdb" in names:
        e = DuckDBEngine(str(db))
        out.append(("duckdb", e, Source.of_table("blobs"), Source.of_table("blobs_tenth"), "bench_labels"))
        cleanup.append(e.close)
    if "postgres" in names:
        from throwaway_servers import ThrowawayPostgres, find_pg_bin

        bin_dir = find_pg_bin()
        if bin_dir is None:
            print("postgres: no initdb/pg_ctl found; skipped", file=sys.stderr)
        else:
            server = ThrowawayPostgres(bin_dir).start()
            cleanup.append(server.stop)
            t0 = time.perf_counter()
            load_postgres(server.conninfo, folder)
            print(f"[bench] loaded PostgreSQL in {time.perf_counter() - t0:.1f} s", file=sys.stderr)
            e = PostgresEngine(server.conninfo)
            cleanup.insert(0, e.close)
            out.append(("postgres", e, Source.of_table("blobs"), Source.of_table("blobs_tenth"), "bench_labels"))
    if "spark" in names:
        e = SparkEngine(master="local[2]", conf={"spark.sql.shuffle.partitions": "4", "spark.driver.memory": "2g",
                                                 "spark.sql.warehouse.dir": str(folder / "warehouse")})
        cleanup.insert(0, e.close)
        out.append(("spark", e, Source.of_files(str(folder / "blobs.parquet"), "parquet"),
                    Source.of_files(str(folder / "blobs_tenth.parquet"), "parquet"), str(folder / "labels.parquet")))
    return out, cleanup


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, default=2_000_000)
    parser.add_argument("--engines", default="duckdb,postgres,spark")
    args = parser.parse_args()
    names = [n.strip() for n in args.engines.split(",") if n.strip()]

    with tempfile.TemporaryDirectory(prefix="tillite-bench-") as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        db, _, _ = build(folder, args.rows)
        print(f"[bench] built {args.rows:,} rows x {len(COLUMNS)} in {time.perf_counter() - t0:.1f} s", file=sys.stderr)
        engines, cleanup = open_engines(names, folder, db)
        try:
            for name, engine, full, tenth, into in engines:
                scan = plain_scan(engine, full)
                big = run(engine, full, into)
                small = run(engine, tenth, into.replace("labels", "labels_tenth"))
                print(f"\n{name}: {args.rows:,} rows; one plain sum scan {scan:.2f} s")
                print(f"  {'stage':<13}{'seconds':>9}{'scans':>8}{'bytes to Python':>17}{'at 1/10 rows':>14}")
                for stage, (seconds, fetched) in big.items():
                    tenth_bytes = small.get(stage, (0.0, 0))[1]
                    print(f"  {stage:<13}{seconds:>9.2f}{seconds / scan:>8.1f}{fetched:>17,}{tenth_bytes:>14,}")
                total = sum(s for s, _ in big.values())
                print(f"  {'total':<13}{total:>9.2f}{total / scan:>8.1f}{sum(b for _, b in big.values()):>17,}"
                      f"{sum(b for _, b in small.values()):>14,}")
        finally:
            for close in cleanup:
                close()


if __name__ == "__main__":
    main()
