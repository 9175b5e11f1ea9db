"""The `tillite` command: a thin layer over the Python API.

The group lives here; each command family is a module of its own
(segment.py: segment, label, show, sql, demo; store.py: store, refresh;
report.py: report, name; macros.py: macros) built on shared.py (error
handling, engine options, the settings options generated from
tillite.settings). The command modules import shared.py, never this
package, so there is no import cycle.
"""

from __future__ import annotations

import sys

import click

from .. import __version__
from .macros import macros as macros_group
from .report import name_command, report_command
from .segment import demo_command, label_command, segment_command, show_command, sql_command
from .shared import OPTION_NAMES, cli_message, user_errors
from .store import refresh_command, store_group

__all__ = ["main", "cli_message", "user_errors", "OPTION_NAMES"]


class UsageErrorInOneLine(click.ClickException):
    """A usage error shown as every other error is: one `Error: ...` line (naming the option), exit 2."""

    exit_code = 2


#: click >= 8.2 shows a group's help through a UsageError subclass when no command is given: kept as it is.
_HELP_AS_ERROR = getattr(click.exceptions, "NoArgsIsHelpError", ())


def _one_line(err: click.UsageError) -> click.ClickException:
    return err if isinstance(err, _HELP_AS_ERROR) else UsageErrorInOneLine(err.format_message())


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


for _command in (segment_command, label_command, show_command, sql_command, demo_command,
                 report_command, name_command, store_group, refresh_command, macros_group):
    main.add_command(_command)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
