"""Names bound at import time whose module is imported on first use.

The command starts in well under a second only if it does not import numpy,
sqlglot, duckdb and the engines' drivers before it knows which command runs
(`tillite --version` and `tillite show` need none of them).  A module's
top-level ``from .pipeline import segment`` becomes
``segment = lazy_name("tillite.pipeline", "segment")``: calling it or reading
an attribute imports the module then.  Classes used in ``except`` or
``isinstance`` must be real classes, so those stay ordinary imports from light
modules (``tillite.errors``).
"""

from __future__ import annotations

import importlib
from typing import Any

__all__ = ["lazy_module", "lazy_name"]


class _LazyModule:
    """A module imported on its first attribute access."""

    def __init__(self, module: str) -> None:
        self.__dict__["_module_name"] = module

    def _target(self) -> Any:
        return importlib.import_module(self._module_name)

    def __getattr__(self, attr: str) -> Any:
        return getattr(self._target(), attr)

    def __repr__(self) -> str:
        return f"<lazy module {self._module_name}>"


class _LazyName(_LazyModule):
    """One name of a module: a function or class, imported when called or inspected."""

    def __init__(self, module: str, name: str) -> None:
        super().__init__(module)
        self.__dict__["_name"] = name

    def _target(self) -> Any:
        return getattr(importlib.import_module(self._module_name), self._name)

    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        return self._target()(*args, **kwargs)

    def __repr__(self) -> str:
        return f"<lazy {self._module_name}.{self._name}>"


def lazy_module(module: str) -> Any:
    """``module`` (absolute dotted name), imported when one of its attributes is first read."""
    return _LazyModule(module)


def lazy_name(module: str, name: str) -> Any:
    """``module.name``, imported when first called or when one of its attributes is read."""
    return _LazyName(module, name)
