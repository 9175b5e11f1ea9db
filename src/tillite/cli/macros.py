"""`tillite macros`: put tillite's SQL macros into a DuckDB file, print them, or take them out.

A thin layer over tillite.macros.  Registered on the main command with
``main.add_command(macros)`` in tillite.cli.
"""

from __future__ import annotations

import click

from ..lazy import lazy_module, lazy_name
from .shared import user_errors

M = lazy_module("tillite.macros")  # imports duckdb: only when a macros command runs
Model = lazy_name("tillite.model", "Model")

__all__ = ["macros"]


def _model(model_path: str | None, name: str | None, store: tuple[str, str] | None = None) -> Model | None:
    """The model behind --model/--name (both or neither), or None for the generic macros.
    ``store``: (database, store name) of `install --store`, whose current model is read instead."""
    if model_path is not None and store is not None:
        raise click.UsageError("give --model or --store, not both")
    if model_path is None and store is None and name is None:
        return None
    if model_path is None and store is None:
        raise click.UsageError("--name names the scoring macros of a model: give --model (or --store) too")
    if name is None:
        raise click.UsageError(f"{'--model' if store is None else '--store'} needs --name: the scoring macros are called "
                               "<name>_segment and <name>_distance")
    if store is not None:
        return _store_model(*store)
    return Model.read(model_path)


def _store_model(database: str, store: str) -> Model:
    """A summary store's current model, read from its database (a refresh does not re-install macros)."""
    from .store import open_store_database, store_api

    with open_store_database(database) as engine:
        return store_api.load(engine, store).model


def _definitions(model: Model | None, name: str | None) -> list[M.MacroDefinition]:
    return M.generic_macros() if model is None else M.scoring_macros(model, name or "")


def _example(definitions: list[M.MacroDefinition], model: Model | None) -> str:
    """One line showing how to call what was installed."""
    if model is None:
        return "try: SELECT * FROM tillite_profile('my_table', ['col_a', 'col_b']);"
    call = f"{M.identifier(definitions[0].name).text}({M.identifiers(M.scoring_arguments(model)).text})"
    return f"try: SELECT *, {call} AS segment FROM my_table;"


@click.group("macros")
def macros() -> None:
    """SQL macros so that a SQL console can profile, bin and segment tables and score rows, with no Python.

    \b
    Generic macros (install once per database):
      tillite_profile(table, columns)            per column: rows, usable, skipped, mean, sd, min, max
      tillite_cells(table, columns, width)       the grid cells' CFs: cell, n, ls, ss, centroid
      tillite_segments(table, columns, k)        k-means on the cells: segment, size, centroid, sse
      tillite_rows(table, columns)               the chosen columns of each row as a list, and ok
    Scoring macros of one model (--model, --name NAME):
      NAME_segment(col1, ..., colN)              the nearest segment id, NULL for NULL/NaN/Inf input
      NAME_distance(col1, ..., colN)             the distance to its centroid (scaled units)
    Arguments in the model's order, as `macros show --model` prints them: the numeric columns,
    then any --categorical columns (the category text); a model of segments within groups
    (segment --within) takes the group column first: NAME_segment(group, col1, ..., colN).
    """


@macros.command("install")
@click.argument("database", type=click.Path(dir_okay=False))
@click.option("--model", "model_path", type=click.Path(dir_okay=False), help="Model file: install its scoring macros.")
@click.option("--name", help="Prefix of the scoring macros: NAME_segment and NAME_distance.")
@click.option("--store", "store_name", help="Instead of --model: the current model of this summary store in DATABASE "
              "(install again after a refresh to follow it).")
@click.option("--replace", is_flag=True, help="Also replace macros of the same names that tillite did not install.")
def install_command(database: str, model_path: str | None, name: str | None, store_name: str | None, replace: bool) -> None:
    """Create (or replace) tillite's macros in an existing DuckDB file DATABASE.

    A macro of the same name that tillite did not install is replaced only with --replace.
    """
    with user_errors():
        model = _model(model_path, name, (database, store_name) if store_name else None)
        definitions = _definitions(model, name)
        names = M.install_into(database, definitions, replace=replace)
    hint = _example(definitions, model)
    click.echo(f"installed into {database}: {', '.join(names)}")
    click.echo(hint)


@macros.command("show")
@click.option("--model", "model_path", type=click.Path(dir_okay=False), help="Model file: show its scoring macros.")
@click.option("--name", help="Prefix of the scoring macros: NAME_segment and NAME_distance.")
def show_command(model_path: str | None, name: str | None) -> None:
    """Print the macros' SQL, to paste into any DuckDB console."""
    with user_errors():
        text = M.script(_definitions(_model(model_path, name), name))
    click.echo(text, nl=False)


@macros.command("remove")
@click.argument("database", type=click.Path(dir_okay=False))
@click.option("--name", help="Only the scoring macros installed under this name.")
def remove_command(database: str, name: str | None) -> None:
    """Drop the macros tillite installed in DATABASE (all of them, or one model's); nothing else.

    A recorded macro that someone replaced with their own is left in place, with a warning line.
    """
    with user_errors():
        dropped = M.remove_from(database, name)
    if dropped:
        click.echo(f"removed from {database}: {', '.join(dropped)}")
    else:
        which = f" under the name {name!r}" if name is not None else ""
        click.echo(f"no macro tillite installed{which} is left in {database}; nothing removed")
