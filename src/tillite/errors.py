"""The base of tillite's user-facing errors, in a module that imports nothing heavy.

The command line catches it before it knows whether any engine will be opened;
``tillite.engines`` re-exports it, so ``tillite.engines.TilliteError`` is the same class.
"""

from __future__ import annotations

__all__ = ["TilliteError"]


class TilliteError(Exception):
    """An error whose message is meant for the user as it is."""
