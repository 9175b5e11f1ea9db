"""`tillite segment|label|show|sql|demo`: segmenting and labelling from the command line."""

from __future__ import annotations

import dataclasses
import json
import time
import warnings
from pathlib import Path

import click

from ..lazy import lazy_module, lazy_name
from ..outputs import MODEL_FILE, REPORT
from .shared import (
    check_output, columns_option, open_with_options, progress_printer, refuse_table_for_files, settings_from_options, settings_options, source_argument,
    source_inputs, split_columns, table_option, parameter_option, user_errors,
)

# imported when a command first uses them, so --version and show start fast
sqlgen = lazy_module("tillite.sqlgen")
open_source = lazy_name("tillite.engines", "open_source")
Model = lazy_name("tillite.model", "Model")
Settings = lazy_name("tillite.settings", "Settings")
label, segment = (lazy_name("tillite.pipeline", n) for n in ("label", "segment"))
run_profile = lazy_name("tillite.stages", "run_profile")

STAGES = ("profile", "cells", "refine", "label")

__all__ = ["segment_command", "label_command", "show_command", "sql_command", "demo_command"]


def _check_dialect(ctx, param, value: str) -> "sqlgen.Target":
    """The target of a sqlglot dialect name (targets.target_for); a usage error naming an unknown one."""
    try:
        return sqlgen.target_for(value)
    except ValueError as err:
        raise click.BadParameter(str(err)) from None


#: segment's --columns: optional when --categorical names the columns to segment on.
segment_columns_option = click.option(
    "--columns", "-c", multiple=True,
    help="Numeric columns to segment on, comma-separated (repeatable; may be left out with --categorical).",
)


@click.command("segment")
@source_argument
@table_option
@segment_columns_option
@settings_options
@click.option("--out", "-o", default=None, help="Model file to write [default: SOURCE's table or file name + .model.json, "
              "e.g. meter_days.model.json, in the current folder].")
@click.option("--quiet", "-q", is_flag=True, help="No progress lines on stderr.")
@click.option("--json", "as_json", is_flag=True, help="Print the model summary as JSON (with the model file's path as model_file).")
def segment_command(source, table, columns, out, quiet, as_json, **kw) -> None:
    """Segment SOURCE's rows on the chosen columns and write a model file.

    SOURCE is a DuckDB database file (with --table) or a Parquet/CSV path or glob.
    The model file's path is printed on stderr (not with --quiet; in the --json output
    as model_file); replacing a file that held the
    model of another source or column list is said in a warning line. --out never
    replaces SOURCE, nor an existing file that is not a tillite model file.
    """
    from ..model import default_model_path, replaced_model_note

    with user_errors():
        settings = settings_from_options(**kw)
        if not columns and not settings.categorical:
            raise click.UsageError("give --columns (numeric columns) or --categorical (or both)")
        out = out or default_model_path(source, table)
        check_output(out, "--out", MODEL_FILE, source_inputs(source))
        with open_with_options(source, table) as (engine, src):
            model = segment(engine, src, split_columns(columns), settings, progress=progress_printer(quiet))
        note = replaced_model_note(out, model)
        model.write(out)
        if note:
            warnings.warn(note, UserWarning)
        if not quiet:
            click.echo(f"[tillite] model: written to {out} ({model.timings['total']:.2f} s in all)", err=True)
        click.echo(json.dumps({**model.summary(), "model_file": str(out)}, indent=2) if as_json else model.describe())


@click.command("label")
@source_argument
@table_option
@click.option("--model", "-m", "model_path", help="Model file written by `tillite segment`.")
@click.option("--store", "store_name", help="Instead of --model: a summary store's current model; "
              "the labels are then re-created by every `tillite refresh`.")
@click.option("--into", required=True, help="View (or table) to create; for file sources, a .parquet/.csv file.")
@click.option("--materialize", is_flag=True, help="Create a table instead of a view.")
@click.option("--replace", is_flag=True, help="Allow replacing an existing table of that name, or a view or table "
              "tillite did not make (a view tillite made is replaced without it).")
@click.option("--quiet", "-q", is_flag=True, help="No progress line on stderr.")
def label_command(source, table, model_path, store_name, into, materialize, replace, quiet) -> None:
    """Add segment and distance to every row of SOURCE as a view, table or file.

    The source itself is never written; rows skipped for NULL/NaN/Inf get NULL.
    With a model of segments within groups (segment --within) each row gets its group's
    nearest segment (ids count per group); rows of a group the model does not know get
    NULL, said in a warning line.
    """
    if bool(model_path) == bool(store_name):
        raise click.UsageError("give exactly one of --model and --store")
    _check_into(into)
    refuse_table_for_files(source, table)
    with user_errors():
        if store_name:
            from .. import store as store_api
            from .store import open_store_database

            with open_store_database(source, writable=True) as engine:
                made = store_api.label(engine, store_name, into, materialize=materialize, replace=replace)
            progress_printer(quiet)("label", f"{made} from store {store_name}")
            click.echo(made)
            return
        model = Model.read(model_path)
        with open_with_options(source, table, writable=True) as (engine, src):
            from ..stages import check_model_columns

            check_model_columns(engine, src, model, f"model {model_path}")
            t0 = time.perf_counter()
            made = _label_explained(engine, src, model, into, materialize, replace)
        progress_printer(quiet)("label", f"{made} from {src.label}, {time.perf_counter() - t0:.2f} s")
        click.echo(made)


def _check_into(into: str) -> None:
    """--into must be a name (schema.name) or a file path; an empty part is a usage error."""
    if "/" in into or "\\" in into or into.lower().endswith((".parquet", ".csv")):
        return
    try:
        parts = sqlgen.split_table_name(into)
    except ValueError as err:
        raise click.BadParameter(str(err), param_hint="--into") from None
    if not all(p.strip() for p in parts):
        raise click.BadParameter(f"not a view or table name: {into!r}", param_hint="--into")


def _label_explained(engine, src, model, into: str, materialize: bool, replace: bool) -> str:
    """label(), with a database error while replacing an object the source reads through a view
    said as such (the transaction has rolled back: nothing changed)."""
    from ..errors import EngineError

    existed = engine.relation_kind(into) if not src.files else None
    try:
        return label(engine, src, model, into, materialize=materialize, replace=replace)
    except EngineError:
        if existed and engine.relation_kind(src.label) == "view":
            raise click.ClickException(
                f"--into {into} cannot replace the {existed} {into}: the source {src.label} is a view that reads it; "
                f"nothing was changed (choose another --into)"
            ) from None
        raise


@click.command("show")
@click.argument("model_path", metavar="MODEL")
@click.option("--json", "as_json", is_flag=True, help="Machine-readable output.")
def show_command(model_path, as_json) -> None:
    """Segment sizes, centroids in original units, radius and SSE of a model file.

    A model of segments within groups (segment --within) is shown as a line per group
    (rows, k, sizes), then each group's own model.
    """
    with user_errors():
        model = Model.read(model_path)
        click.echo(json.dumps(model.summary(), indent=2) if as_json else model.describe())


@click.command("sql")
@click.argument("source", metavar="[SOURCE]", required=False)
@table_option
@click.option("--columns", "-c", multiple=True, help="Columns (not needed with --model).")
@click.option("--stage", type=click.Choice(STAGES), required=True, help="Which statement to print.")
@click.option("--model", "-m", "model_path", help="Model file (needed for refine and label; cells then use its grid).")
@click.option("--dialect", "target", default="duckdb", show_default=True, callback=_check_dialect,
              help="SQL dialect to render (any sqlglot dialect name).")
@parameter_option("cell_budget", help="About how many grid cells the cells stage aims for (without --model).")
@parameter_option("seed", default=None, show_default=False,
                  help="Seed of the profile sample, as `segment --seed` [default: the model's, else 0].")
@parameter_option("sample_rows", default=None, show_default=False,
                  help="Rows the profile sample aims for, as `segment --sample-rows` [default: the model's, else 50000].")
def sql_command(source, table, columns, stage, model_path, target, cell_budget, seed, sample_rows) -> None:
    """Print the SQL a stage would run, without running it.

    Without SOURCE nothing is connected to: give --table, and --model for the
    cells, refine and label stages (the label select then lists the model's
    columns only, as the source's other columns are unknown).

    --stage profile prints what `segment` runs: the row count, then the seeded sample
    that the count calls for (the whole table up to twice --sample-rows; else a
    TABLESAMPLE of about 150 x --sample-rows / rows percent). Without SOURCE the count is
    unknown, and the sample is shown for a table of 100 x --sample-rows rows.
    """
    with user_errors():
        model = Model.read(model_path) if model_path else None
        profile = _profile_settings(model, seed, sample_rows)
        cols = list(model.columns) if model else split_columns(columns)
        if not cols:
            raise click.UsageError("give --columns or --model")
        if source is None:
            if not table:
                raise click.UsageError("without SOURCE, give --table (the statements are only printed)")
            if stage != "profile" and model is None:
                raise click.UsageError(f"without SOURCE, --stage {stage} needs --model (its grid and centroids)")
            try:
                src = sqlgen.Source.of_table(table)
            except ValueError as err:
                raise click.BadParameter(str(err), param_hint="--table") from None
            src = _model_source(src, model, target)
            if stage == "profile":
                click.echo(f"-- without SOURCE the row count is unknown: the sample shown is for a table of "
                           f"{PRINTED_ROWS_PER_SAMPLE * profile.sample_rows:,} rows")
            statements = _stage_statements(None, src, cols, cols, stage, model, target, cell_budget, profile)
        else:
            from ..stages import check_columns, resolve_columns

            with open_with_options(source, table) as (engine, src):
                cols = cols if model else resolve_columns(engine, src, cols)  # as the engine reads typed names
                src = _model_source(src, model, target)
                source_columns = [c for c in check_columns(engine, src, cols) if c not in src.derived_names()]
                statements = _stage_statements(engine, src, cols, source_columns, stage, model, target, cell_budget, profile)
        for st in statements:
            click.echo(sqlgen.render(st, target, pretty=True) + ";")


#: `sql --stage profile` without SOURCE: the sample shown is for a table of this many times --sample-rows rows.
PRINTED_ROWS_PER_SAMPLE = 100


def _profile_settings(model, seed, sample_rows) -> Settings:
    """The profile's seed and sample size: the options, else the model's, else segment's defaults."""
    params = model.params if model is not None else {}
    given = {"seed": params.get("seed") if seed is None else seed,
             "sample_rows": params.get("sample_rows") if sample_rows is None else sample_rows}
    settings = Settings(k=1, **{name: value for name, value in given.items() if value is not None})
    settings.check([])
    return settings


def _model_source(src, model, target):
    """The source with the model's category indicators, if it has categorical columns."""
    if model is None or not model.categorical:
        return src
    from ..categorical import specs_of, with_indicators

    return with_indicators(src, specs_of(model.categorical), target)


def _within_partition(model):
    """A --within model's cell pass groups by (group, cell), as `segment --within` runs it."""
    if model is None or not model.within:
        return None
    return sqlgen.Partitioning.of_columns([model.within["column"]])


def _stage_statements(engine, src, cols, source_columns, stage, model, target, cell_budget, profile):
    from ..stages import grid_for_profile, profile_statements

    if stage == "profile":  # the statements segment runs, for the rows there are (or PRINTED_ROWS_PER_SAMPLE x)
        rows = None if engine is not None else PRINTED_ROWS_PER_SAMPLE * profile.sample_rows
        return profile_statements(engine, src, cols, profile, target, rows=rows)
    if stage == "cells":
        if model is not None and model.grid:
            grid = sqlgen.Grid.from_dict(model.grid)
        else:
            settings = dataclasses.replace(profile, cell_budget=cell_budget)  # the grid segment would choose
            settings.check(cols)
            grid = grid_for_profile(run_profile(engine, src, cols, settings), settings)
        if model is not None and model.categorical:  # keyed by the numeric grid and each category, as segment runs it
            from ..categorical import code_names, indicator_positions, specs_of
            from ..stages import cells_statement_with_codes

            specs = specs_of(model.categorical)
            statement, _, _ = cells_statement_with_codes(src, cols, grid, indicator_positions(cols, specs), code_names(specs), target,
                                                         partition=_within_partition(model))
            return [statement]
        return [sqlgen.cells_statement(src, cols, grid, target, partition=_within_partition(model))]
    if model is None:
        raise click.UsageError(f"--stage {stage} needs --model")
    model.refuse_within(f"tillite sql --stage {stage}")
    if stage == "refine" and model.method == "density":
        from ..model import ModelError

        raise ModelError("--stage refine: a --method density model runs no refine pass (its segments come from "
                         "its cells); --stage label prints how its rows are labelled")
    assign, lookups = model.assignment(), []
    if model.categorical:  # the numeric columns' scores plus one lookup per categorical column, as segment and label run them
        from ..categorical import code_names, indicator_positions, specs_of
        from ..stages import code_assignment

        specs = specs_of(model.categorical)
        source_columns = [c for c in source_columns if c not in model.columns or c in model.input_columns()]
        cols, assign, lookups = code_assignment(cols, assign, indicator_positions(cols, specs), code_names(specs))
    if stage == "refine":
        return [sqlgen.refine_statement(src, cols, assign, target, cell_map=model.cell_map_spec(), lookups=lookups)]
    return [sqlgen.label_select(src, cols, source_columns, assign, target, cell_map=model.cell_map_spec(), lookups=lookups)]


#: `demo --rows` range: demo.MIN_ROWS and demo.MAX_ROWS, written here so building the options imports nothing heavy
#: (a test checks they agree).
DEMO_ROWS = (1_000, 100_000_000)

#: The view the demo labels into (the README's store example uses another name).
DEMO_LABELS = "meter_day_segments"


def _demo_takes_back_labels(engine, db_path: str) -> bool:
    """Whether the demo may replace its labels view although it holds a store's labels: yes when that
    store no longer exists (dropped by an earlier version); a live store's labels are refused in one line."""
    from ..pipeline import store_of_comment
    from ..store import StoreError, load

    holder = store_of_comment(engine.relation_comment(DEMO_LABELS)) if engine.relation_kind(DEMO_LABELS) else None
    if holder is None:
        return False
    try:
        load(engine, holder)
    except StoreError:
        return True
    raise click.ClickException(
        f"view {DEMO_LABELS} of {db_path} holds the labels of store {holder}; the demo does not replace them: "
        f"drop the store (`tillite store drop {db_path} --store {holder}`) or give another --db"
    )


@click.command("demo")
@click.option("--db", "db_path", default="tillite-demo.duckdb", show_default=True, help="Demo database file to build or reuse.")
@click.option("--rows", type=click.IntRange(*DEMO_ROWS), default=1_000_000, show_default=True,
              help=f"Meter-day rows to generate ({DEMO_ROWS[0]:,} to {DEMO_ROWS[1]:,}).")
@click.option("--days", type=click.IntRange(min=1), default=60, show_default=True, help="Days of meter readings to generate (1 or more).")
@click.option("--seed", type=click.IntRange(-(2**63), 2**63 - 1), default=7, show_default=True, help="Seed of the invented data.")
@click.option("--k", "-k", "k", type=int, default=5, show_default=True, help="Number of segments.")
@click.option("--out", "-o", default="tillite-demo-model.json", show_default=True,
              help="Model file to write (never over --db, nor over a file that is not a tillite model file).")
@click.option("--rebuild", is_flag=True, help="Regenerate the demo data even if the file exists (only tables the demo "
              "made are replaced).")
@click.option("--report", "report_path", default=None,
              help="Report page to write (segments by district; see `tillite report`) "
                   "[default: tillite-demo-report.html beside the database; never over --db or --out, nor over a "
                   "file that is not a tillite report].")
@click.option("--quiet", "-q", is_flag=True, help="No progress lines on stderr.")
def demo_command(db_path, rows, days, seed, k, out, rebuild, report_path, quiet) -> None:
    """Build the invented water co-operative database and segment it end to end.

    --rebuild replaces only the demo's own tables (they carry tillite's mark; tables of a demo
    database from a version before the mark are recognised by their columns and invented kinds).
    """
    from .. import demo, report

    page = report_path or Path(db_path).with_name("tillite-demo-report.html")
    with user_errors(options={"path": "--db"}):
        check_output(out, "--out", MODEL_FILE, [("the database (--db)", db_path)])
        check_output(page, "--report", REPORT, [("the database (--db)", db_path), ("the model file (--out)", out)])
        demo.check_demo_database_file(db_path)
        progress = progress_printer(quiet)
        if rebuild or not demo.demo_tables_present(db_path):
            t0 = time.perf_counter()
            info = demo.build_demo_database(db_path, rows=rows, days=days, seed=seed, replace=True)
            progress("demo", f"built {db_path}: {info.rows:,} meter-days of {info.meters:,} meters, {time.perf_counter() - t0:.2f} s")
        else:
            progress("demo", f"reusing {db_path} (--rebuild to regenerate)")
        with open_source(db_path, "meter_days", writable=True) as (engine, src):
            model = segment(engine, src, list(demo.DEMO_COLUMNS), Settings(k=k), progress=progress)
            model.write(out)
            made = label(engine, src, model, DEMO_LABELS, replace=_demo_takes_back_labels(engine, db_path))
            progress("label", made)
            click.echo(model.describe())
            click.echo("")
            click.echo(report.crosstab(engine, "meter_day_segments", demo.METERS_TABLE, "meter_id", "kind"))
            click.echo("")
            click.echo(demo.within_district_example(engine, src, progress=progress))
            written = report.write_report(report.report_of_model(engine, src, model, ["district"], progress, caution=demo.REPORT_CAUTION), page)
        click.echo("")
        click.echo(f"model written to {out}; labels in view meter_day_segments of {db_path}.")
        click.echo(f"report written to {Path(written).resolve()} (open it in a browser; no network needed).")
        click.echo("Segments are statistical groupings, not diagnoses: a 'probable leak' segment lists meters")
        click.echo("for the co-operative's usual inspection procedure to confirm.")
