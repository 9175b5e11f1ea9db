"""`tillite report` and `tillite name`: see and name segments from the command line.

A thin layer over tillite.report and tillite.naming; registered on the main
command in tillite.cli.
"""

from __future__ import annotations

import json
from pathlib import Path

import click

from ..lazy import lazy_module
from ..outputs import REPORT
from .shared import check_output, engine_options, open_with_options, progress_printer, source_inputs, user_errors
from .store import open_store_database

# imported when a command runs, so the command line starts without numpy or sqlglot
naming = lazy_module("tillite.naming")
R = lazy_module("tillite.report")

#: The same as report.FORMATS (a test checks), written here so building the options imports nothing heavy.
REPORT_FORMATS = ("html", "md", "json")

__all__ = ["report_command", "name_command"]


def _split(values: tuple[str, ...]) -> list[str]:
    return [p.strip() for v in values for p in v.split(",") if p.strip()]


def _default_out(fmt: str) -> str:
    return {"html": "segments.html", "md": "segments.md", "json": "segments.json"}[fmt]


def _engine_options(f):
    return engine_options(f, engine_help="Where the SQL runs (as for `tillite segment`).",
                          spark_help="Spark setting for the session tillite starts (repeatable).")


@click.command("report")
@click.argument("source", metavar="SOURCE")
@click.option("--table", "-t", help="Table to read (for a database SOURCE; may be schema.table).")
@_engine_options
@click.option("--model", "-m", "model_path", help="Model file written by `tillite segment`.")
@click.option("--store", "store_name", help="Instead of --model and --table: a summary store in the database SOURCE "
              "(adds its refresh history; the map uses the store's kept cells).")
@click.option("--by", "by", multiple=True, help="Breakdown column(s), comma-separated (repeatable): the share of each "
              "category per segment (top 20 categories, the rest as 'other').")
@click.option("--labels", "labels", metavar="TABLE", help="A labels table made by `tillite label --materialize` with "
              "this model: the report reads its segment column instead of assigning every row again (faster).")
@click.option("--out", "-o", "out", help="File to write (default: segments.html, .md or .json by --format); an existing "
              "file is replaced only when it is a report tillite wrote.")
@click.option("--format", "fmt", type=click.Choice(list(REPORT_FORMATS)), default="html", show_default=True,
              help="html: one self-contained page with inline SVG; md and json: the same content as text.")
@click.option("--quiet", "-q", is_flag=True, help="No progress lines on stderr.")
def report_command(source, table, model_path, store_name, by, labels, out, fmt, quiet) -> None:
    """Write a report of the segments: sizes, profile, spread, map, breakdowns (and a store's refresh history).

    Every figure is computed in the database as an aggregate; no row is exported.
    A model of segments within groups (segment --within) gives a table of the groups, then
    one report per group; the table must hold the model's group column too.
    """
    if bool(model_path) == bool(store_name):
        raise click.UsageError("give exactly one of --model and --store")
    if store_name and table:
        raise click.UsageError("--table is not needed with --store: the store knows its source")
    if store_name and labels:
        raise click.UsageError("--labels goes with --model, not --store")
    out = out or _default_out(fmt)
    progress = progress_printer(quiet)
    with user_errors():
        check_output(out, "--out", REPORT, [*source_inputs(source), ("the model file (--model)", model_path)])
        if store_name:
            with open_store_database(source) as engine:
                content = R.report_of_store(engine, store_name, _split(by), progress)
        else:
            from ..model import Model

            model = Model.read(model_path)
            with open_with_options(source, table) as (engine, src):
                _check_model_fits(engine, src, model, model_path)
                content = R.report_of_model(engine, src, model, _split(by), progress, labels=labels)
        path = R.write_report(content, out, fmt)
    click.echo(f"report written to {path}")


def _check_model_fits(engine, src, model, model_path: str) -> None:
    """The model's columns are in the table (one line naming a missing one), and a warning line when the model was
    built on another source (the report would mix its figures with the table's)."""
    import warnings

    from ..stages import check_model_columns, other_source_note

    check_model_columns(engine, src, model, f"model {model_path}")
    note = other_source_note(model, src, f"model {model_path}")
    if note:
        warnings.warn(note, UserWarning, stacklevel=2)


@click.command("name", context_settings={"ignore_unknown_options": True})  # so segment -1 (noise/outliers) is an ID, not an option
@click.argument("target", metavar="MODEL")
@click.argument("pairs", nargs=-1, metavar="[ID NAME]...")
@click.option("--names", "names_file", type=click.Path(dir_okay=False), help='JSON file of names: {"4": "probable leak", ...}.')
@click.option("--store", "store_name", help="Name the segments of a summary store instead: MODEL is then its database.")
@click.option("--group", "group", metavar="GROUP", help="For a model or store of segments within groups (--within): the "
              "group whose segments are named, as `tillite show` or `store status` lists it (NULL for the NULL group).")
def name_command(target, pairs, names_file, store_name, group) -> None:
    """Give segments names: `tillite name model.json 4 "probable leak"`.

    Ids never change; an empty name removes one; -1 names the rows in no segment
    (density noise, the outlier group): `tillite name model.json -1 "unusual"`. Names are stored in the model
    file (written atomically) or in the store, and shown by `show`, `report`, the
    segment_name column of label views made afterwards (a store's views are
    re-created at once) and the <name>_segment_name macro. A model of segments within groups
    (segment --within) is named one group at a time: `tillite name model.json --group north 0 "steady"`.
    """
    if len(pairs) % 2:
        raise click.UsageError("give segment ids and names in pairs: ID NAME [ID NAME ...]")
    if not pairs and not names_file:
        raise click.UsageError("give ID NAME, or --names FILE")
    with user_errors():
        given = naming.read_names_file(names_file) if names_file else {}
        given.update({pairs[i]: pairs[i + 1] for i in range(0, len(pairs), 2)})
        if store_name:
            with open_store_database(target, writable=True) as engine:
                model = naming.name_store_segments(engine, store_name, given, group)
            where = f"store {store_name} (label views re-created)"
        else:
            model = naming.name_model_file(Path(target), given, group)
            where = f"{target} (re-run `tillite label` to add segment_name to existing views)"
    if model.within:
        from ..model import group_models

        model = next(one for g, one in group_models(model) if g["name"] == group)
        where += f", group {group}"
    click.echo(f"names written to {where}:")
    shown_ids = list(model.segment_ids()) + ([-1] if -1 not in model.segment_ids() and model.segment_name(-1) is not None else [])
    for sid in shown_ids:
        click.echo(f"  {sid}: {json.dumps(model.segment_name(sid), ensure_ascii=False) if model.segment_name(sid) is not None else '(no name)'}")
