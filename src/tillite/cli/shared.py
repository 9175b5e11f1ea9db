"""What every command module of the CLI shares: error handling, engine options, the settings options.

Imports only click and light modules of ours (errors, settings, lazy), so that
`tillite --version` and `tillite show` start without numpy, sqlglot or duckdb.
"""

from __future__ import annotations

import warnings
from contextlib import contextmanager
from typing import Any, Callable, Iterator

import click

from ..errors import ParameterError, TilliteError
from ..lazy import lazy_name
from ..outputs import check_output
from ..settings import OPTION_NAMES, PARAMETERS, REFRESH_PARAMETERS, Parameter, Settings

open_source = lazy_name("tillite.engines", "open_source")
is_file_source = lazy_name("tillite.engines", "is_file_source")

__all__ = [
    "OPTION_NAMES",
    "cli_message",
    "user_errors",
    "open_with_options",
    "progress_printer",
    "split_columns",
    "parse_weights",
    "parse_k",
    "source_argument",
    "table_option",
    "engine_options",
    "columns_option",
    "parameter_option",
    "settings_options",
    "settings_from_options",
    "check_output",
    "source_inputs",
]


def split_columns(values: tuple[str, ...]) -> list[str]:
    """Repeatable, comma-separated option values as one list."""
    return [p.strip() for v in values for p in v.split(",") if p.strip()]


def parse_weights(text: str | None) -> dict[str, float]:
    """--weights litres=2,zero_hours=0.5 as a dict."""
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


def parse_k(text: str | None) -> tuple[int, tuple[int, ...]]:
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


def progress_printer(quiet: bool) -> Callable[[str, str], None]:
    """The progress callback of the API: one `[tillite] stage: message` line on stderr per call."""
    def report(stage: str, message: str) -> None:
        if not quiet:
            click.echo(f"[tillite] {stage}: {message}", err=True)

    return report


# ----------------------------------------------------------------------------- SOURCE, --table and the engine


def _parse_spark_conf(values: tuple[str, ...]) -> dict[str, str]:
    out: dict[str, str] = {}
    for item in values:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise click.BadParameter(f"expected key=value, got {item!r}", param_hint="--spark-conf")
        out[key.strip()] = value.strip()
    return out


def _remember_engine_option(ctx: click.Context, param: click.Parameter, value: Any) -> Any:
    """--engine and --spark-conf are read by open_with_options, so commands keep their signatures."""
    ctx.meta[f"tillite.{param.name}"] = value
    return value


def open_with_options(source: str, table: str | None, writable: bool = False) -> Any:
    """engines.open_source with this command's --engine/--spark-conf, a malformed --table as a usage error."""
    ctx = click.get_current_context(silent=True)
    meta = ctx.meta if ctx is not None else {}
    refuse_table_for_files(source, table)
    try:
        if table is not None:  # a malformed --table is said before a missing database
            from ..sqlgen import Source

            Source.of_table(table)
        return open_source(
            source, table, writable=writable,
            engine=meta.get("tillite.engine"), spark_conf=_parse_spark_conf(meta.get("tillite.spark_conf", ())),
        )
    except ValueError as err:
        raise click.BadParameter(str(err), param_hint="--table") from None


def refuse_table_for_files(source: str, table: str | None) -> None:
    """--table names a table of a database SOURCE; with Parquet/CSV files it would be ignored, so it is refused."""
    if table is not None and is_file_source(source):
        raise click.BadParameter(f"{source} is a file source (Parquet/CSV), which has no tables; leave --table out",
                                 param_hint="--table")


def source_inputs(source: str) -> list[tuple[str, str | None]]:
    """SOURCE as an input of the run, for outputs.check_output: a source file (or glob, or folder), or the database."""
    return [("a source file" if is_file_source(source) else "the database", source)]


source_argument = click.argument("source", metavar="SOURCE")


def engine_options(f: Callable, engine_help: str | None = None, spark_help: str | None = None) -> Callable:
    """--engine and --spark-conf (repeatable), read by open_with_options."""
    f = click.option("--spark-conf", "spark_conf", multiple=True, metavar="KEY=VALUE", expose_value=False,
                     callback=_remember_engine_option,
                     help=spark_help or "Spark setting for the session tillite starts, e.g. spark.executor.memory=4g "
                                        "(repeatable).")(f)
    return click.option("--engine", type=click.Choice(["auto", "duckdb", "postgres", "spark"]), default="auto",
                        show_default=True, expose_value=False, callback=_remember_engine_option,
                        help=engine_help or "Where the SQL runs. auto: postgresql://... is PostgreSQL; spark://..., "
                                            "local[N], yarn are Spark masters; a file is DuckDB. With --engine spark a "
                                            "Parquet path is read by Spark.")(f)


def table_option(f: Callable) -> Callable:
    """--table, plus the engine options: --engine and --spark-conf (repeatable)."""
    f = engine_options(f)
    return click.option("--table", "-t", help="Table to read (for a database SOURCE; may be schema.table).")(f)


columns_option = click.option(
    "--columns", "-c", multiple=True, required=True, help="Numeric columns to segment on, comma-separated (repeatable)."
)


# ----------------------------------------------------------------------------- options from the parameter table


def _click_type(p: Parameter) -> Any:
    if p.choices:
        return click.Choice(list(p.choices))
    return {"int": int, "float": float}.get(p.kind, str)


#: Settings options given more than once add up (each also comma-separated), instead of the last one winning.
REPEATABLE_OPTIONS = frozenset({"categorical"})


def parameter_option(name: str, **override: Any) -> Callable:
    """The click option of one row of the parameter table (settings or refresh); ``override``
    replaces what a command needs differently (its own help text, default or type)."""
    p = PARAMETERS.get(name) or REFRESH_PARAMETERS[name]
    if p.option_name is None:
        raise ValueError(f"parameter {name} has no command-line option")
    names = [p.option_name, *([p.short] if p.short else []), name]
    if p.kind == "bool":
        kw: dict[str, Any] = {"is_flag": True}
    elif p.kind in ("int", "float", "str") and p.default is not None:
        kw = {"type": _click_type(p), "default": p.default, "show_default": True}
    elif p.kind in ("int", "float", "str"):
        kw = {"type": _click_type(p), "default": None}
    else:  # parsed by settings_from_options (--k, --weights)
        kw = {"type": str, "default": None}
    if name in REPEATABLE_OPTIONS:
        kw = {"type": str, "multiple": True}
    return click.option(*names, **{**kw, "help": p.help, **override})


def settings_options(f: Callable) -> Callable:
    """Every Settings parameter that has a command-line option, in the table's order."""
    for p in reversed(list(PARAMETERS.values())):
        if p.option_name is not None:
            f = parameter_option(p.name)(f)
    return f


def categorical_columns(given: tuple[str, ...] | None) -> tuple[str, ...]:
    """--categorical's column names; the option given without any is a usage error, not ignored."""
    named = tuple(split_columns(given or ()))
    if given and not named:
        raise click.BadParameter("give one or more column names, e.g. --categorical district", param_hint="--categorical")
    return named


def settings_from_options(**kw: Any) -> Settings:
    """The Settings of `segment`'s options (keyword arguments named as the Settings fields)."""
    k_text = kw.pop("k")
    k_value, candidates = parse_k(k_text)
    if kw.get("method", "kmeans") != "density" and k_text is None:
        raise click.UsageError("give --k (a number, 'auto' or a range like 2..12)")
    categorical = categorical_columns(kw.pop("categorical", None))
    settings = Settings(k=k_value, k_candidates=candidates, weights=parse_weights(kw.pop("weights")),
                        categorical=categorical, **kw)
    settings.check_methods(given_options() | settings.given() - {"k"})
    return settings


def given_options() -> set[str]:
    """The parameters named on this command's line (or in the environment), even at their defaults."""
    from click.core import ParameterSource

    ctx = click.get_current_context(silent=True)
    if ctx is None:
        return set()
    return {name for name in ctx.params
            if ctx.get_parameter_source(name) in (ParameterSource.COMMANDLINE, ParameterSource.ENVIRONMENT)}
