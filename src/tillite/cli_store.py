"""`tillite store build|status` and `tillite refresh`: the summary store from the command line."""

from __future__ import annotations

import json

import click

from typing import TYPE_CHECKING

from .lazy import lazy_module, lazy_name

if TYPE_CHECKING:
    from .engines import Engine

# imported when a store command runs
store_api = lazy_module("tillite.store")
PostgresEngine, engine_kind, open_database, open_source, is_file_source = (
    lazy_name("tillite.engines", n) for n in ("PostgresEngine", "engine_kind", "open_database", "open_source", "is_file_source")
)


def _cli():
    """The shared helpers of the main command module (imported late: it registers us)."""
    from . import cli

    return cli


@click.group("store")
def store_group() -> None:
    """Keep per-partition summaries in the database and segments current as partitions change."""


@store_group.command("build")
@click.argument("source", metavar="SOURCE")
@click.option("--table", "-t", help="Table to read (for a database SOURCE).")
@click.option("--columns", "-c", multiple=True, required=True, help="Numeric columns to segment on, comma-separated.")
@click.option("--partition-by", "partition_by", multiple=True,
              help="Partition column(s), comma-separated; for a Parquet/CSV SOURCE each file is a partition.")
@click.option("--store", "store_name", help="Store name (default: the table name).")
@click.option("--db", "database", help="For a Parquet/CSV SOURCE: the DuckDB file that keeps the store (created if missing).")
@click.option("--k", "-k", "k", type=int, required=True, help="Number of segments.")
@click.option("--scaling", type=click.Choice(["zscore", "none"]), default="zscore", show_default=True)
@click.option("--weights", help="Column multipliers after scaling, e.g. litres=2.")
@click.option("--cell-budget", type=int, default=20_000, show_default=True)
@click.option("--refine-passes", type=int, default=0, show_default=True,
              help="Row-level refine passes at build and refresh (each scans every partition; 0 keeps refresh cost "
                   "proportional to changed partitions).")
@click.option("--restarts", type=int, default=10, show_default=True)
@click.option("--seed", type=int, default=0, show_default=True)
@click.option("--regrid", is_flag=True, help="Replace an existing store of that name, with a new grid.")
@click.option("--out", "-o", help="Also write the model file here.")
@click.option("--quiet", "-q", is_flag=True)
@click.option("--json", "as_json", is_flag=True)
def build_command(source, table, columns, partition_by, store_name, database, k, scaling, weights, cell_budget, refine_passes,
                  restarts, seed, regrid, out, quiet, as_json) -> None:
    """Build a summary store for SOURCE: frozen grid, per-partition cells, first segments."""
    cli = _cli()
    with cli.user_errors():
        settings = store_api.Settings(
            k=k, scaling=scaling, weights=cli._parse_weights(weights), cell_budget=cell_budget,
            refine_passes=refine_passes, n_init=restarts, seed=seed,
        )
        if is_file_source(source) and not database:
            raise click.UsageError("a store over files needs --db, the DuckDB file that keeps it")
        engine, src = open_source(source, table, writable=True, database=database)
        try:
            spec = store_api.PartitionSpec(files=True) if src.files else store_api.PartitionSpec(tuple(cli._split_columns(partition_by)))
            _, model = store_api.build(engine, src, cli._split_columns(columns), spec, settings, store=store_name,
                                       progress=cli._progress(quiet), replace=regrid)
        finally:
            engine.close()
        if out:
            model.write(out)
        click.echo(json.dumps(model.summary(), indent=2) if as_json else model.describe())


def open_store_database(location: str, writable: bool = False) -> Engine:
    """The database keeping a store: a DuckDB file, or PostgreSQL by its postgresql:// URL."""
    if engine_kind(location) == "postgres":
        return PostgresEngine(location, read_only=not writable)
    return open_database(location, writable=writable)


@store_group.command("status")
@click.argument("source", metavar="DATABASE")
@click.option("--store", "store_name", required=True, help="Store name.")
@click.option("--outside-warn", type=float, default=0.01, show_default=True,
              help="Warn when more than this share of rows falls outside the grid's built range.")
@click.option("--json", "as_json", is_flag=True)
def status_command(source, store_name, outside_warn, as_json) -> None:
    """Partitions, rows, when summarised, and the grid in use."""
    cli = _cli()
    with cli.user_errors():
        engine = open_store_database(source)
        try:
            st = store_api.status(engine, store_name, outside_warn=outside_warn)
        finally:
            engine.close()
        if as_json:
            click.echo(json.dumps(st, indent=2, default=str))
            return
        click.echo(f"store {st['store']} on {st['source']} ({', '.join(st['columns'])})")
        click.echo(f"partitions: {st['partitions']:,}; rows: {st['rows']:,} ({st['skipped_rows']:,} skipped); cells: {st['cells']:,}")
        click.echo(f"built {st['built_at']}; last refresh {st['refreshed_at'] or 'never'}; last summarised {st['last_summarised']}")
        click.echo(f"grid: width {st['grid']['width']:.4g} on {st['grid']['axes_count']} axes; "
                   f"{100 * st['outside_share']:.2f}% of rows outside the built range")
        click.echo(f"segments: k={st['k']}, ids {st['segment_ids']}")
        for w in st["warnings"]:
            click.echo(f"warning: {w}", err=True)


@click.command("refresh")
@click.argument("source", metavar="DATABASE")
@click.option("--store", "store_name", required=True, help="Store name.")
@click.option("--k", "-k", "k", type=int, default=None, help="Change the number of segments.")
@click.option("--drift-warn", type=float, default=0.5, show_default=True,
              help="Warn when a segment's centroid moves more than this many standard deviations.")
@click.option("--new-segment-shift", type=float, default=3.0, show_default=True,
              help="A segment farther than this (sd) from every old one gets a new id.")
@click.option("--force", is_flag=True, help="Re-segment even when no partition changed.")
@click.option("--regrid", is_flag=True, help="Rebuild every partition on a new grid (when `store status` warns "
              "that rows fall outside the built range); segment ids are kept where segments match.")
@click.option("--quiet", "-q", is_flag=True)
@click.option("--json", "as_json", is_flag=True)
def refresh_command(source, store_name, k, drift_warn, new_segment_shift, force, regrid, quiet, as_json) -> None:
    """Scan only new and changed partitions, re-segment, and report drift."""
    cli = _cli()
    with cli.user_errors():
        engine = open_store_database(source, writable=True)
        try:
            if regrid:
                model = store_api.regrid(engine, store_name, progress=cli._progress(quiet), new_segment_shift=new_segment_shift)
                click.echo(json.dumps(model.summary(), indent=2) if as_json else model.describe())
                return
            report = store_api.refresh(engine, store_name, progress=cli._progress(quiet), drift_threshold=drift_warn,
                                       new_segment_shift=new_segment_shift, k=k, force=force)
        finally:
            engine.close()
        click.echo(json.dumps(report.to_dict(), indent=2, default=str) if as_json else report.describe())
        if not as_json:
            for w in report.warnings:
                click.echo(f"warning: {w}", err=True)
