"""The base of tillite's user-facing errors, in a module that imports nothing heavy.

The command line catches it before it knows whether any engine will be opened;
``tillite.engines`` re-exports it, so ``tillite.engines.TilliteError`` is the same class.
"""

from __future__ import annotations

__all__ = ["TilliteError", "InputError", "ParameterError"]


class TilliteError(Exception):
    """An error whose message is meant for the user as it is."""


class InputError(TilliteError):
    """The request cannot be met with this data (empty table, k too large, ...)."""


class ParameterError(InputError):
    """A parameter value no run can use.

    The message is a template: ``{name}`` stands for the parameter, spelled as
    the API names it (``str(err)``) or as the CLI names its option (``err.text(names)``).
    """

    def __init__(self, template: str, *parameters: str, spelled: dict[str, str] | None = None) -> None:
        self.template = template
        self.parameters = parameters
        self.spelled = spelled or {}
        super().__init__(self.text({}))

    def text(self, names: dict[str, str]) -> str:
        """The message with each parameter spelled by ``names`` (else as the API spells it)."""
        def spell(p: str) -> str:
            return names[p] if p in names or hasattr(type(names), "__missing__") else self.spelled.get(p, p)

        out = self.template  # replace, not str.format: values in the message may hold braces
        for p in self.parameters:
            out = out.replace("{" + p + "}", spell(p))
        return out
