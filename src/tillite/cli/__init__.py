"""The `tillite` command: a thin layer over the Python API.

The group lives here; each command family is a module of its own
(segment.py: segment, label, show, sql, demo; store.py: store, refresh;
report.py: report, name; macros.py: macros) built on shared.py (error
handling, engine options, the settings options generated from
tillite.settings). The command modules import shared.py, never this
package, so there is no import cycle.  A command's module is imported only
when that command runs (or --help lists them all), so `tillite refresh`
does not build the options of every other command first.
"""

from __future__ import annotations

import importlib
import sys
from collections.abc import Iterator, MutableMapping

import click

from .. import __version__
from .shared import OPTION_NAMES, cli_message, user_errors

__all__ = ["main", "cli_message", "user_errors", "OPTION_NAMES"]


class UsageErrorInOneLine(click.ClickException):
    """A usage error shown as every other error is: one `Error: ...` line (naming the option), exit 2."""

    exit_code = 2


#: click >= 8.2 shows a group's help through a UsageError subclass when no command is given: kept as it is.
_HELP_AS_ERROR = getattr(click.exceptions, "NoArgsIsHelpError", ())


def _one_line(err: click.UsageError) -> click.ClickException:
    return err if isinstance(err, _HELP_AS_ERROR) else UsageErrorInOneLine(err.format_message())


#: Each command of the group: its name, and the module of this package and the name it is defined as.
COMMANDS = {
    "segment": ("segment", "segment_command"),
    "label": ("segment", "label_command"),
    "show": ("segment", "show_command"),
    "sql": ("segment", "sql_command"),
    "demo": ("segment", "demo_command"),
    "report": ("report", "report_command"),
    "name": ("report", "name_command"),
    "store": ("store", "store_group"),
    "refresh": ("store", "refresh_command"),
    "macros": ("macros", "macros"),
}


class LazyCommands(MutableMapping):
    """The group's commands by name (click's ``Group.commands``), each module imported on first look-up."""

    def __init__(self, where: dict[str, tuple[str, str]]) -> None:
        self._where = dict(where)
        self._loaded: dict[str, click.Command] = {}

    def __getitem__(self, name: str) -> click.Command:
        if name not in self._loaded:
            module, attr = self._where[name]
            self._loaded[name] = getattr(importlib.import_module(f".{module}", __name__), attr)
        return self._loaded[name]

    def __setitem__(self, name: str, command: click.Command) -> None:
        self._where.pop(name, None)
        self._loaded[name] = command

    def __delitem__(self, name: str) -> None:
        self._where.pop(name, None)
        self._loaded.pop(name, None)

    def __iter__(self) -> Iterator[str]:
        return iter({**dict.fromkeys(self._where), **dict.fromkeys(self._loaded)})

    def __len__(self) -> int:
        return len(set(self._where) | set(self._loaded))

    def __contains__(self, name: object) -> bool:
        return name in self._where or name in self._loaded


class OneLineErrorsGroup(click.Group):
    """The main group: click's usage errors (bad option value, missing option, unknown option or
    command) come out as one `Error:` line instead of click's Usage/Try/Error block; --help is untouched."""

    def make_context(self, *args, **kwargs):  # type: ignore[override]
        try:
            return super().make_context(*args, **kwargs)
        except click.UsageError as err:
            raise _one_line(err) from None

    def invoke(self, ctx: click.Context):  # type: ignore[override]
        try:
            return super().invoke(ctx)
        except click.UsageError as err:
            raise _one_line(err) from None


@click.group(cls=OneLineErrorsGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="tillite")
def main() -> None:
    """Segment warehouse tables where they live.

    Row-level work runs in the database as SQL aggregates; only clustering
    features (count, linear sum, square sum per cell) come back to Python.
    """


main.commands = LazyCommands(COMMANDS)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
