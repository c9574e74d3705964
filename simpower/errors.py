"""Exception hierarchy of simpower.

Every error a user can cause derives from :class:`SimpowerError`, mixed with the
builtin type it resembles, so ``except ValueError`` keeps working.  Messages
put the offending field first and say how to fix it, on one line.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable


class SimpowerError(Exception):
    """Root of all simpower errors."""


class ParameterError(SimpowerError, ValueError):
    """A parameter is missing, of the wrong type, or outside its valid range."""


class DefinitionError(SimpowerError, TypeError):
    """A component class breaks the contract when it is defined (e.g. a parameter named like a method)."""


class ScenarioFileError(SimpowerError, ValueError):
    """A scenario file cannot be read: TOML syntax, unknown block or field."""


class UnknownNameError(SimpowerError, KeyError):
    """A process, analysis or parameter name that simpower does not know."""

    def __str__(self) -> str:  # KeyError would quote the message
        return str(self.args[0]) if self.args else ""


class RunError(SimpowerError, RuntimeError):
    """A run could not complete (too many failures, an interrupted executor...)."""


class StoreError(SimpowerError, RuntimeError):
    """A run store is unreadable, corrupted, or belongs to another scenario."""


def nearest(name: str, choices: Iterable[str]) -> str:
    """Return a ' Did you mean ...?' hint naming the closest valid choice, or ''."""
    choices = list(choices)
    hits = difflib.get_close_matches(name, choices, n=1, cutoff=0.5)
    if hits:
        return f" Did you mean {hits[0]!r}?"
    if choices and len(choices) <= 12:
        return " Valid: " + ", ".join(sorted(map(str, choices))) + "."
    return ""
