"""`tillite store build|status` and `tillite refresh`: the summary store from the command line."""

from __future__ import annotations

import json

import click

from typing import TYPE_CHECKING

from ..errors import DatabaseLocked
from ..lazy import lazy_module, lazy_name
from ..outputs import MODEL_FILE, check_duckdb_file
from ..settings import STORE_METHODS
from .shared import check_output, source_inputs, categorical_columns, parameter_option, parse_weights, progress_printer, refuse_table_for_files, split_columns, user_errors

if TYPE_CHECKING:
    from ..engines import Engine

# imported when a store command runs
store_api = lazy_module("tillite.store")
open_database, open_source, is_file_source = (
    lazy_name("tillite.engines", n) for n in ("open_database", "open_source", "is_file_source")
)

__all__ = ["store_group", "refresh_command", "open_store_database"]


def _store_k(ctx: click.Context, param: click.Parameter, value: str | None) -> int | None:
    """--k of a store: one number.  'auto' and ranges are refused: a store keeps k fixed so that every refresh
    matches its segments to the last ones and keeps their ids."""
    if value is None:
        return None
    text = value.strip().lower()
    if text == "auto" or ".." in text:
        raise click.BadParameter(f"a store takes one number, not {value!r}: it keeps k fixed so refreshes keep segment ids; "
                                 "choose k first with `tillite segment --k auto` on the table, then give that number")
    try:
        return int(text)
    except ValueError:
        raise click.BadParameter(f"expected a whole number, got {value!r}") from None


@click.group("store")
def store_group() -> None:
    """Keep per-partition summaries in the database and segments current as partitions change."""


@store_group.command("build")
@click.argument("source", metavar="SOURCE")
@click.option("--table", "-t", help="Table to read (for a database SOURCE).")
@click.option("--columns", "-c", multiple=True,
              help="Numeric columns to segment on, comma-separated (may be left out with --categorical).")
@click.option("--partition-by", "partition_by", multiple=True,
              help="Partition column(s), comma-separated; for a Parquet/CSV SOURCE each file is a partition.")
@click.option("--store", "store_name", help="Store name (default: the table name, or the folder of the files).")
@click.option("--db", "database", help="For a Parquet/CSV SOURCE: the DuckDB file that keeps the store (created if missing).")
@parameter_option("k", type=str, callback=_store_k, required=True,
                  help="Number of segments (one number: a store keeps it, so refreshes keep segment ids).")
@parameter_option("method", type=click.Choice(STORE_METHODS),
                  help="Second phase on the merged cells, as in `tillite segment`; refreshes keep it. (A store takes no "
                       "density-connected segments: their cell map would miss rows arriving in new cells.)")
@parameter_option("scaling", help="Put columns on a common scale (z-scores) before measuring distances, or use them as they are.")
@parameter_option("weights", help="Column multipliers after scaling, e.g. litres=2.")
@parameter_option("cell_budget", help="About how many grid cells the frozen grid aims for.")
@parameter_option("refine_passes", default=0,
                  help="Row-level refine passes at build and refresh (each scans every partition; 0 keeps refresh cost "
                       "proportional to changed partitions).")
@parameter_option("n_init", help="k-means++ restarts on the cells (at build, and for each refresh's fresh seeding).")
@parameter_option("seed", help="Seed of the profile sample and k-means++ (0 to 2147483647).")
@click.option("--regrid", is_flag=True, help="Replace an existing store of that name, with a new grid.")
@click.option("--many-partitions", is_flag=True,
              help="Build even when the partition column gives more partitions than the hard limit "
                   "(the refusal names it).")
@click.option("--out", "-o", help="Also write the model file here (never over SOURCE or --db, nor over a file that is "
              "not a tillite model file).")
@click.option("--quiet", "-q", is_flag=True, help="No progress lines.")
@click.option("--json", "as_json", is_flag=True, help="Print the model summary as JSON.")
@parameter_option("categorical", help="Categorical columns, comma-separated (repeatable), as in `tillite segment`: "
                                      "the categories listed at build are kept by refreshes; values first seen later "
                                      "count as '(other)'. Not with --within.")
@parameter_option("max_categories")
@parameter_option("within", help="Segment each group of this column separately, as `tillite segment --within` does (k per "
                                 "group; NULL is a group of its own); the store keeps cells per (partition, group, cell), and a "
                                 "refresh re-segments only the groups with rows in new, changed or vanished partitions, keeping "
                                 "segment ids stable per group.")
def build_command(source, table, columns, partition_by, store_name, database, k, method, scaling, weights, cell_budget, refine_passes,
                  n_init, seed, regrid, many_partitions, out, quiet, as_json, categorical, max_categories, within) -> None:
    """Build a summary store for SOURCE: frozen grid, per-partition cells, first segments."""
    with user_errors(options={"replace": "--regrid"}):
        named = categorical_columns(categorical)
        if not columns and not named:
            raise click.UsageError("give --columns (numeric columns) or --categorical (or both)")
        settings = store_api.Settings(
            k=k, method=method, scaling=scaling, weights=parse_weights(weights), cell_budget=cell_budget,
            refine_passes=refine_passes, n_init=n_init, seed=seed, within=within, categorical=named,
            max_categories=max_categories,
        )
        refuse_table_for_files(source, table)
        if is_file_source(source) and not database:
            raise click.UsageError("a store over files needs --db, the DuckDB file that keeps it")
        if database:
            check_duckdb_file(database, "--db")
        if out:
            check_output(out, "--out", MODEL_FILE, [*source_inputs(source), ("the database that keeps the store (--db)", database)])
        with open_source(source, table, writable=True, database=database) as (engine, src):
            spec = store_api.PartitionSpec(files=True) if src.files else store_api.PartitionSpec(tuple(split_columns(partition_by)))
            info, model = store_api.build(engine, src, split_columns(columns), spec, settings, store=store_name,
                                          progress=progress_printer(quiet), replace=regrid, many_partitions=many_partitions)
            tables = store_api.store_tables(engine, info.name)
        if out:
            model.write(out)
        for w in info.warnings:
            click.echo(f"warning: {w}", err=True)
        if as_json:
            click.echo(json.dumps({**model.summary(), "store": info.name, "tables": tables}, indent=2))
            return
        click.echo(f"store {info.name}: cells in {info.cells_table}; registry in {', '.join(t for t in tables if t != info.cells_table)}")
        click.echo(model.describe())


def open_store_database(location: str, writable: bool = False) -> Engine:
    """The database keeping a store (engines.open_database: a DuckDB file, or PostgreSQL by its
    postgresql:// URL). A DuckDB file another process holds open for writing (a refresh running, a duckdb
    shell, any program) gives StoreBusy.
    """
    try:
        return open_database(location, writable=writable)
    except DatabaseLocked:
        if not writable:
            raise
        raise store_api.StoreBusy(f"the database file {location} is locked by another process (maybe a refresh, or a "
                                  "program such as a duckdb shell holding it open); nothing was changed: run again "
                                  "once it is closed") from None


@store_group.command("status")
@click.argument("source", metavar="DATABASE")
@click.option("--store", "store_name", required=True, help="Store name.")
@parameter_option("outside_warn")
@click.option("--json", "as_json", is_flag=True, help="Print the status as JSON.")
def status_command(source, store_name, outside_warn, as_json) -> None:
    """Partitions, rows, when summarised, and the grid in use."""
    with user_errors():
        with open_store_database(source) as engine:
            st = store_api.status(engine, store_name, outside_warn=outside_warn)
        if as_json:
            click.echo(json.dumps(st, indent=2, default=str))
            return
        click.echo(f"store {st['store']} on {st['source']} ({', '.join(_shown_columns(st))})")
        click.echo(f"partitions: {st['partitions']:,}; rows: {st['rows']:,} ({st['skipped_rows']:,} skipped); cells: {st['cells']:,}"
                   + (f" {st['cells_counted']}" if st.get("cells_counted", "grid cells") != "grid cells" else ""))
        found = {False: " (found no change)", True: "", None: ""}[st["last_refresh_found_change"]]
        click.echo(f"built {st['built_at']}; last refresh {st['last_refresh'] or 'never'}{found}; last summarised {st['last_summarised']}")
        click.echo(f"grid: width {st['grid']['width']:.4g} on {st['grid']['axes_count']} {'axis' if st['grid']['axes_count'] == 1 else 'axes'}; "
                   f"{100 * st['outside_share']:.2f}% of rows outside the built range")
        if st.get("within"):
            click.echo(f"segments within each {st['within']}: " + "; ".join(
                f"{g['group']} k={g['k']} (ids {', '.join(map(str, g['segment_ids']))})" for g in st["groups"]))
        else:
            click.echo(f"segments: k={st['k']}, ids {', '.join(map(str, st['segment_ids']))}")
        for c in st.get("categorical", []):
            click.echo(f"categories of {c['column']} fixed at build: {', '.join(c['categories']) or '(none)'}; "
                       "any other value counts as (other), NULL as (NULL)")
        kept = st["settings"]
        click.echo(f"settings kept by refreshes: k={kept.get('k')}, method {kept.get('method', 'kmeans')}, refine passes {kept.get('refine_passes')}, "
                   f"restarts {kept.get('n_init')}, seed {kept.get('seed')}, scaling {kept.get('scaling')}"
                   + (f", within {kept['within']}" if kept.get("within") else ""))
        click.echo(f"store {st['store']}: cells in {st['cells_table']}; registry in "
                   f"{', '.join(t for t in st['tables'] if t != st['cells_table'])}")
        _echo_history(source, store_name)
        for w in st["warnings"]:
            click.echo(f"warning: {w}", err=True)


def _shown_columns(st: dict) -> list[str]:
    """The store's columns as the user named them: numeric ones, then each categorical column once."""
    indicators = {n for c in st.get("categorical", []) for n in c["indicators"]}
    return [c for c in st["columns"] if c not in indicators] + [f"{c['column']} (categorical)" for c in st.get("categorical", [])]


@click.command("refresh")
@click.argument("source", metavar="DATABASE")
@click.option("--store", "store_name", required=True, help="Store name.")
@parameter_option("k", type=str, callback=_store_k, help="Change the number of segments (one number).")
@parameter_option("drift_threshold")
@parameter_option("new_segment_shift")
@click.option("--force", is_flag=True, help="Re-segment even when no partition changed.")
@click.option("--regrid", is_flag=True, help="Rebuild every partition on a new grid (when `store status` warns "
              "that rows fall outside the built range); segment ids are kept where segments match.")
@click.option("--partitions", "partitions", multiple=True,
              help="Refresh only these partitions, skipping the fingerprint pass over the others: COLUMN=VALUE items, "
                   "comma-separated (e.g. day=2026-01-15,day=2026-01-16); values of one column are alternatives, "
                   "different columns must all match. Write values as `store status --json` lists them: NULL is SQL "
                   "NULL, \"NULL\" (or 'NULL') the text. A value that matches no partition is said in a warning.")
@click.option("--where", "where", help="Refresh only the partitions whose rows satisfy this SQL predicate on the "
              "partition columns alone (e.g. \"day >= DATE '2026-01-15'\"); no other column, function or subquery.")
@click.option("--quiet", "-q", is_flag=True, help="No progress lines.")
@click.option("--json", "as_json", is_flag=True, help="Print the refresh report as JSON.")
def refresh_command(source, store_name, k, drift_threshold, new_segment_shift, force, regrid, partitions, where, quiet, as_json) -> None:
    """Scan only new and changed partitions, re-segment, and report drift.

    Options given to a refresh (--k) are kept by later refreshes; `store status` shows them.
    A store built with --within re-segments only the groups whose cells changed and
    reports drift per group.
    """
    with user_errors():
        with open_store_database(source, writable=True) as engine:
            if regrid and (partitions or where):
                raise click.UsageError("--regrid rescans every partition; it takes no --partitions or --where")
            if regrid:
                model = store_api.regrid(engine, store_name, progress=progress_printer(quiet), new_segment_shift=new_segment_shift)
                click.echo(json.dumps(model.summary(), indent=2) if as_json else model.describe())
                return
            report = store_api.refresh(engine, store_name, progress=progress_printer(quiet), drift_threshold=drift_threshold,
                                       new_segment_shift=new_segment_shift, k=k, force=force,
                                       partitions=[p for item in partitions for p in item.split(",") if p] or None,
                                       where=where)
        click.echo(json.dumps(report.to_dict(), indent=2, default=str) if as_json else report.describe(with_warnings=False))
        for w in report.warnings:
            click.echo(f"warning: {w}", err=True)


def _echo_history(source: str, store_name: str, last: int = 5) -> None:
    """The last few builds and refreshes of the store (tillite_store_history)."""
    from .. import store_history

    with open_store_database(source) as engine:
        rows = store_history.history(engine, store_name, last=last)
    if rows:
        click.echo(f"last {len(rows)} build(s)/refresh(es):")
        for line in store_history.describe(rows):
            click.echo(line)


@store_group.command("drop")
@click.argument("source", metavar="DATABASE")
@click.option("--store", "store_name", required=True, help="Store name.")
def drop_command(source, store_name) -> None:
    """Remove a store: its cells table and its rows in tillite's registry tables (the registry tables too
    when no store is left). Tables and views you made stay; the store's label views stay as plain labels
    (no longer re-created by refreshes; `tillite label --model` replaces them without --replace)."""
    with user_errors():
        with open_store_database(source, writable=True) as engine:
            labels = store_api.registered_labels(engine, store_name)
            dropped = store_api.drop(engine, store_name)
        click.echo(f"store {store_name} dropped: {', '.join(dropped)}")
        if labels:
            click.echo(f"its label views/tables stay as plain labels, no longer refreshed: {', '.join(labels)}")
