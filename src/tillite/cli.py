"""The `tillite` command: a thin layer over the Python API (pipeline, model, sqlgen)."""

from __future__ import annotations

import json
import sys
import time
import warnings
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import click

from . import __version__
from .errors import ParameterError, TilliteError
from .lazy import lazy_module, lazy_name

# imported when a command first uses them, so --version and show start fast
sqlgen = lazy_module("tillite.sqlgen")
open_source = lazy_name("tillite.engines", "open_source")
Model = lazy_name("tillite.model", "Model")
Settings, label, run_profile, segment = (lazy_name("tillite.pipeline", n) for n in ("Settings", "label", "run_profile", "segment"))

STAGES = ("profile", "cells", "refine", "label")


def _split_columns(values: tuple[str, ...]) -> list[str]:
    out: list[str] = []
    for v in values:
        out.extend(p.strip() for p in v.split(",") if p.strip())
    return out


def _parse_weights(text: str | None) -> dict[str, float]:
    if not text:
        return {}
    out: dict[str, float] = {}
    for part in text.split(","):
        name, sep, value = part.rpartition("=")
        if not sep or not name.strip():
            raise click.BadParameter(f"expected column=number, got {part!r}", param_hint="--weights")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            raise click.BadParameter(f"weight of {name.strip()} is not a number: {value!r}", param_hint="--weights") from None
    return out


#: API parameter -> CLI option, where the option is not just the parameter with dashes.
OPTION_NAMES = {"n_init": "--restarts", "drift_threshold": "--drift-warn", "replace": "--replace", "partition": "--partition-by"}


class _OptionNames(dict):
    """--option spelling of any API parameter."""

    def __missing__(self, key: str) -> str:
        return OPTION_NAMES.get(key, "--" + key.replace("_", "-"))


def cli_message(err: Exception, options: dict[str, str] | None = None) -> str:
    """One line for the terminal: parameters spelled as options (``options`` for a command whose
    option differs from the usual one, e.g. ``store build --regrid`` for ``replace``)."""
    text = err.text(_OptionNames(options or {})) if isinstance(err, ParameterError) else str(err)
    return " ".join(text.split()) if "\n" in text.strip() else text


@contextmanager
def user_errors(quiet: bool = False, options: dict[str, str] | None = None) -> Iterator[None]:
    """Turn our errors (the engines wrap the database's) into clean messages and warnings into stderr lines.

    ``options``: API parameter -> this command's option, where it differs from OPTION_NAMES.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield
        except TilliteError as err:  # the engines' EngineError included: "database error: " and the driver's first line
            raise click.ClickException(cli_message(err, options)) from None
        finally:
            for w in caught:
                if issubclass(w.category, UserWarning):
                    click.echo(f"warning: {w.message}", err=True)


def _open(source: str, table: str | None, writable: bool = False):
    """open_source with --engine/--spark-conf, and a malformed --table reported as a usage error."""
    ctx = click.get_current_context(silent=True)
    meta = ctx.meta if ctx is not None else {}
    try:
        return open_source(
            source, table, writable=writable,
            engine=meta.get("tillite.engine"), spark_conf=_parse_spark_conf(meta.get("tillite.spark_conf", ())),
        )
    except ValueError as err:
        raise click.BadParameter(str(err), param_hint="--table") from None


def _parse_spark_conf(values: tuple[str, ...]) -> dict[str, str]:
    out: dict[str, str] = {}
    for item in values:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise click.BadParameter(f"expected key=value, got {item!r}", param_hint="--spark-conf")
        out[key.strip()] = value.strip()
    return out


def _remember_engine_option(ctx, param, value):
    """--engine and --spark-conf are read by _open, so commands keep their signatures."""
    ctx.meta[f"tillite.{param.name}"] = value
    return value


def _check_dialect(ctx, param, value: str) -> str:
    from sqlglot.dialects.dialect import Dialect

    try:
        Dialect.get_or_raise(value)
    except ValueError as err:
        raise click.BadParameter(str(err)) from None
    return value


def _progress(quiet: bool):
    def report(stage: str, message: str) -> None:
        if not quiet:
            click.echo(f"[tillite] {stage}: {message}", err=True)

    return report


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="tillite")
def main() -> None:
    """Segment warehouse tables where they live.

    Row-level work runs in the database as SQL aggregates; only clustering
    features (count, linear sum, square sum per cell) come back to Python.
    """


source_argument = click.argument("source", metavar="SOURCE")
def table_option(f):
    """--table, plus the engine options: --engine and --spark-conf (repeatable)."""
    f = click.option("--spark-conf", "spark_conf", multiple=True, metavar="KEY=VALUE", expose_value=False,
                     callback=_remember_engine_option,
                     help="Spark setting for the session tillite starts, e.g. spark.executor.memory=4g (repeatable).")(f)
    f = click.option("--engine", type=click.Choice(["auto", "duckdb", "postgres", "spark"]), default="auto",
                     show_default=True, expose_value=False, callback=_remember_engine_option,
                     help="Where the SQL runs. auto: postgresql://... is PostgreSQL; spark://..., local[N], yarn "
                          "are Spark masters; a file is DuckDB. With --engine spark a Parquet path is read by Spark.")(f)
    return click.option("--table", "-t", help="Table to read (for a database SOURCE; may be schema.table).")(f)
columns_option = click.option(
    "--columns", "-c", multiple=True, required=True, help="Numeric columns to segment on, comma-separated (repeatable)."
)


def _parse_k(text: str | None) -> tuple[int, tuple[int, ...]]:
    """--k: a number, 'auto' (1..12) or a range 'lo..hi' chosen on the CFs."""
    if text is None:
        return 0, ()
    text = text.strip().lower()
    if text == "auto":
        return 0, tuple(range(1, 13))
    lo, sep, hi = text.partition("..")
    try:
        if sep:
            a, b = int(lo), int(hi)
            if not 1 <= a <= b:
                raise ValueError
            return 0, tuple(range(a, b + 1))
        return int(text), ()
    except ValueError:
        raise click.BadParameter(f"expected a number, 'auto' or a range like 2..12, got {text!r}", param_hint="--k") from None


def _settings_options(f):
    opts = [
        click.option("--k", "-k", "k", help="Number of segments, 'auto' (1..12, one segment when no split beats it) or a range like 2..8 chosen on the CFs "
                     "(not needed for --method density)."),
        click.option("--method", type=click.Choice(["kmeans", "ward", "density"]), default="kmeans", show_default=True,
                     help="Second phase: k-means++, Ward agglomeration, or density-connected cells (non-convex shapes)."),
        click.option("--k-rule", type=click.Choice(["calinski_harabasz", "bic"]), default="calinski_harabasz", show_default=True,
                     help="How --k auto/range picks k: largest Calinski-Harabasz, or smallest spherical-Gaussian BIC."),
        click.option("--scaling", type=click.Choice(["zscore", "none"]), default="zscore", show_default=True,
                     help="zscore: columns in standard deviations; none: original units (still centred)."),
        click.option("--weights", help="Column multipliers after scaling, e.g. litres=2,zero_hours=0.5."),
        click.option("--cell-budget", type=int, default=20_000, show_default=True, help="About how many grid cells to aim for."),
        click.option("--width", type=float, default=None, help="Force the grid width (scaled units) instead of choosing it."),
        click.option("--refine-passes", type=int, default=3, show_default=True, help="Most refine passes over the rows (0 for none)."),
        click.option("--tolerance", type=float, default=1e-4, show_default=True, help="Stop refining when a pass improves SSE by less than this share."),
        click.option("--restarts", type=int, default=10, show_default=True, help="k-means++ restarts on the cells."),
        click.option("--seed", type=int, default=0, show_default=True,
                     help="Seed of the profile sample, k-means++ and the CF tree (0 to 2147483647); the same data, "
                          "options and seed give the same model."),
        click.option("--sample-rows", type=int, default=50_000, show_default=True, help="Rows the profile sample aims for."),
        click.option("--tree-budget", type=int, default=None,
                     help="Condense the cells with a CF tree when there are more than this (default: the cell budget; 0: never)."),
        click.option("--threshold", type=float, default=None, help="CF tree threshold T (default: chosen from the cells)."),
        click.option("--branching", type=int, default=50, show_default=True, help="CF tree branching factor B."),
        click.option("--leaf-capacity", type=int, default=50, show_default=True, help="CF tree leaf capacity L."),
        click.option("--criterion", type=click.Choice(["diameter", "radius"]), default="diameter", show_default=True,
                     help="What the threshold T bounds."),
        click.option("--keep-outliers", is_flag=True, help="Keep every cell; no outlier group (segment -1)."),
        click.option("--min-count", type=float, default=None, help="density: rows a cell needs to be dense (default from the data)."),
        click.option("--adjacency", type=click.Choice(["face", "distance"]), default="face", show_default=True,
                     help="density: join cells sharing a grid face, or with centroids within --radius."),
        click.option("--radius", type=float, default=None, help="density: joining distance for --adjacency distance."),
        click.option("--noise", type=click.Choice(["attach", "drop"]), default="attach", show_default=True,
                     help="density: sparse cells join the nearest segment, or stay noise (segment -1)."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def _settings(k, method, k_rule, scaling, weights, cell_budget, width, refine_passes, tolerance, restarts, seed, sample_rows,
              tree_budget, threshold, branching, leaf_capacity, criterion, keep_outliers, min_count, adjacency, radius,
              noise) -> Settings:
    k_value, candidates = _parse_k(k)
    if method != "density" and k is None:
        raise click.UsageError("give --k (a number, 'auto' or a range like 2..12)")
    return Settings(
        k=k_value, scaling=scaling, weights=_parse_weights(weights), cell_budget=cell_budget, width=width,
        refine_passes=refine_passes, tolerance=tolerance, n_init=restarts, seed=seed, sample_rows=sample_rows,
        method=method, k_candidates=candidates, k_rule=k_rule, tree_budget=tree_budget, threshold=threshold,
        branching=branching, leaf_capacity=leaf_capacity, criterion=criterion, keep_outliers=keep_outliers,
        min_count=min_count, adjacency=adjacency, radius=radius, noise=noise,
    )


#: segment's --columns: optional when --categorical names the columns to segment on.
segment_columns_option = click.option(
    "--columns", "-c", multiple=True,
    help="Numeric columns to segment on, comma-separated (repeatable; may be left out with --categorical).",
)


def _categorical_options(f):
    f = click.option("--max-categories", type=int, default=20, show_default=True,
                     help="Categories kept per --categorical column (the most rows in the profile sample, 1 to 200); "
                          "the rest count as '(other)', NULL as '(NULL)'.")(f)
    return click.option("--categorical", multiple=True,
                        help="Categorical columns, comma-separated (repeatable): each becomes indicators of its top "
                             "categories, weighing as much as one scaled numeric column (--weights COLUMN=w applies).")(f)


@main.command("segment")
@source_argument
@table_option
@segment_columns_option
@_categorical_options
@_settings_options
@click.option("--out", "-o", default=None, help="Model file to write [default: SOURCE's table or file name + .model.json, "
              "e.g. meter_days.model.json, in the current folder].")
@click.option("--quiet", "-q", is_flag=True, help="No progress lines on stderr.")
@click.option("--json", "as_json", is_flag=True, help="Print the model summary as JSON.")
def segment_command(source, table, columns, categorical, max_categories, out, quiet, as_json, **kw) -> None:
    """Segment SOURCE's rows on the chosen columns and write a model file.

    SOURCE is a DuckDB database file (with --table) or a Parquet/CSV path or glob.
    The model file's path is printed on stderr; replacing a file that held the
    model of another source or column list is said in a warning line.
    """
    from .model import default_model_path, replaced_model_note

    with user_errors():
        settings = _settings(**kw)
        settings.categorical = tuple(_split_columns(categorical))
        settings.max_categories = max_categories
        if not columns and not settings.categorical:
            raise click.UsageError("give --columns (numeric columns) or --categorical (or both)")
        out = out or default_model_path(source, table)
        with _open(source, table) as (engine, src):
            model = segment(engine, src, _split_columns(columns), settings, progress=_progress(quiet))
        note = replaced_model_note(out, model)
        model.write(out)
        if note:
            warnings.warn(note, UserWarning)
        if not quiet:
            click.echo(f"[tillite] model: written to {out} ({model.timings['total']:.2f} s in all)", err=True)
        click.echo(json.dumps(model.summary(), indent=2) if as_json else model.describe())


@main.command("label")
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
    """
    if bool(model_path) == bool(store_name):
        raise click.UsageError("give exactly one of --model and --store")
    _check_into(into)
    with user_errors():
        if store_name:
            from . import store as store_api
            from .cli_store import open_store_database

            with open_store_database(source, writable=True) as engine:
                made = store_api.label(engine, store_name, into, materialize=materialize, replace=replace)
            _progress(quiet)("label", f"{made} from store {store_name}")
            click.echo(made)
            return
        model = Model.read(model_path)
        with _open(source, table, writable=True) as (engine, src):
            t0 = time.perf_counter()
            made = _label_explained(engine, src, model, into, materialize, replace)
        _progress(quiet)("label", f"{made} from {src.label}, {time.perf_counter() - t0:.2f} s")
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
    from .errors import EngineError

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


@main.command("show")
@click.argument("model_path", metavar="MODEL")
@click.option("--json", "as_json", is_flag=True, help="Machine-readable output.")
def show_command(model_path, as_json) -> None:
    """Segment sizes, centroids in original units, radius and SSE of a model file."""
    with user_errors():
        model = Model.read(model_path)
        click.echo(json.dumps(model.summary(), indent=2) if as_json else model.describe())


@main.command("sql")
@click.argument("source", metavar="[SOURCE]", required=False)
@table_option
@click.option("--columns", "-c", multiple=True, help="Columns (not needed with --model).")
@click.option("--stage", type=click.Choice(STAGES), required=True, help="Which statement to print.")
@click.option("--model", "-m", "model_path", help="Model file (needed for refine and label; cells then use its grid).")
@click.option("--dialect", default="duckdb", show_default=True, callback=_check_dialect,
              help="SQL dialect to render (any sqlglot dialect name).")
@click.option("--cell-budget", type=int, default=20_000, show_default=True,
              help="About how many grid cells the cells stage aims for (without --model).")
def sql_command(source, table, columns, stage, model_path, dialect, cell_budget) -> None:
    """Print the SQL a stage would run, without running it.

    Without SOURCE nothing is connected to: give --table, and --model for the
    cells, refine and label stages (the label select then lists the model's
    columns only, as the source's other columns are unknown).
    """
    with user_errors():
        model = Model.read(model_path) if model_path else None
        cols = list(model.columns) if model else _split_columns(columns)
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
            src = _model_source(src, model, dialect)
            statements = _stage_statements(None, src, cols, cols, stage, model, dialect, cell_budget)
        else:
            from .pipeline import check_columns

            with _open(source, table) as (engine, src):
                src = _model_source(src, model, dialect)
                source_columns = [c for c in check_columns(engine, src, cols) if c not in src.derived_names()]
                statements = _stage_statements(engine, src, cols, source_columns, stage, model, dialect, cell_budget)
        for st in statements:
            click.echo(sqlgen.render(st, dialect, pretty=True) + ";")


def _model_source(src, model, dialect):
    """The source with the model's category indicators, if it has categorical columns."""
    if model is None or not model.categorical:
        return src
    from .categorical import specs_of, with_indicators

    return with_indicators(src, specs_of(model.categorical), dialect)


def _stage_statements(engine, src, cols, source_columns, stage, model, dialect, cell_budget):
    from .pipeline import grid_for_profile

    if stage == "profile":
        return [sqlgen.count_statement(src), sqlgen.sample_statement(src, cols, dialect, percent=1.0, limit=100_000)]
    if stage == "cells":
        if model is not None and model.grid:
            grid = sqlgen.Grid.from_dict(model.grid)
        else:
            settings = Settings(k=1, cell_budget=cell_budget)
            settings.check(cols)
            grid = grid_for_profile(run_profile(engine, src, cols, settings), settings)
        return [sqlgen.cells_statement(src, cols, grid, dialect)]
    if model is None:
        raise click.UsageError(f"--stage {stage} needs --model")
    assign, lookups = model.assignment(), []
    if model.categorical:  # the numeric columns' scores plus one lookup per categorical column, as segment and label run them
        from .categorical import code_names, indicator_positions, specs_of
        from .pipeline import code_assignment

        specs = specs_of(model.categorical)
        source_columns = [c for c in source_columns if c not in model.columns or c in model.input_columns()]
        cols, assign, lookups = code_assignment(cols, assign, indicator_positions(cols, specs), code_names(specs))
    if stage == "refine":
        return [sqlgen.refine_statement(src, cols, assign, dialect, cell_map=model.cell_map_spec(), lookups=lookups)]
    return [sqlgen.label_select(src, cols, source_columns, assign, dialect, cell_map=model.cell_map_spec(), lookups=lookups)]


@main.command("demo")
@click.option("--db", "db_path", default="tillite-demo.duckdb", show_default=True, help="Demo database file to build or reuse.")
@click.option("--rows", type=int, default=1_000_000, show_default=True, help="Meter-day rows to generate.")
@click.option("--days", type=int, default=60, show_default=True, help="Days of meter readings to generate.")
@click.option("--seed", type=int, default=7, show_default=True, help="Seed of the invented data.")
@click.option("--k", "-k", "k", type=int, default=5, show_default=True, help="Number of segments.")
@click.option("--out", "-o", default="tillite-demo-model.json", show_default=True, help="Model file to write.")
@click.option("--rebuild", is_flag=True, help="Regenerate the demo data even if the file exists.")
@click.option("--report", "report_path", default=None,
              help="Report page to write (segments by district; see `tillite report`) "
                   "[default: tillite-demo-report.html beside the database].")
@click.option("--quiet", "-q", is_flag=True, help="No progress lines on stderr.")
def demo_command(db_path, rows, days, seed, k, out, rebuild, report_path, quiet) -> None:
    """Build the invented water co-operative database and segment it end to end."""
    from . import demo, report

    with user_errors():
        progress = _progress(quiet)
        if rebuild or not Path(db_path).exists():
            t0 = time.perf_counter()
            info = demo.build_demo_database(db_path, rows=rows, days=days, seed=seed, replace=True)
            progress("demo", f"built {db_path}: {info.rows:,} meter-days of {info.meters:,} meters, {time.perf_counter() - t0:.2f} s")
        else:
            progress("demo", f"reusing {db_path} (--rebuild to regenerate)")
        with open_source(db_path, "meter_days", writable=True) as (engine, src):
            model = segment(engine, src, list(demo.DEMO_COLUMNS), Settings(k=k), progress=progress)
            model.write(out)
            made = label(engine, src, model, "meter_day_segments")
            progress("label", made)
            click.echo(model.describe())
            click.echo("")
            click.echo(report.crosstab(engine, "meter_day_segments", demo.METERS_TABLE, "meter_id", "kind"))
            page = report_path or Path(db_path).with_name("tillite-demo-report.html")
            written = report.write_report(report.report_of_model(engine, src, model, ["district"], progress), page)
        click.echo("")
        click.echo(f"model written to {out}; labels in view meter_day_segments of {db_path}.")
        click.echo(f"report written to {Path(written).resolve()} (open it in a browser; no network needed).")
        click.echo("Segments are statistical groupings, not diagnoses: a 'probable leak' segment lists meters")
        click.echo("for the co-operative's usual inspection procedure to confirm.")


def _register_subcommands() -> None:
    from .cli_macros import macros
    from .cli_report import name_command, report_command
    from .cli_store import refresh_command, store_group

    main.add_command(report_command)
    main.add_command(name_command)

    main.add_command(store_group)
    main.add_command(refresh_command)
    main.add_command(macros)


_register_subcommands()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
