"""Declared parameter constraints, checked by one helper with one message shape.

A component declares a table ``{name: Constraint}``; :func:`check_params`
returns the cleaned values or raises :class:`~simpower.errors.ParameterError`
whose message starts with the parameter's name, e.g.
"`icc` must be in [0, 1); got 1.2."
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from .errors import ParameterError


def _fmt(v: Any) -> str:
    if isinstance(v, str):
        return repr(v)
    if isinstance(v, float):
        return f"{v:g}"
    return f"{v}"


@dataclass(frozen=True)
class Real:
    """A real number in an interval; ``None`` bounds are open-ended."""

    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    optional: bool = False

    def describe(self) -> str:
        if self.low is not None and self.high is not None:
            lb = "(" if self.low_open else "["
            hb = ")" if self.high_open else "]"
            return f"in {lb}{_fmt(self.low)}, {_fmt(self.high)}{hb}"
        if self.low is not None:
            return f"{'>' if self.low_open else '>='} {_fmt(self.low)}"
        if self.high is not None:
            return f"{'<' if self.high_open else '<='} {_fmt(self.high)}"
        return "a finite number"

    def describe_number(self) -> str:
        """The constraint as a noun phrase: "a number >= 0", "a number in (0, 1)", "a finite number"."""
        rule = self.describe()
        return rule if rule.startswith("a ") else f"a number {rule}"

    def clean(self, name: str, value: Any) -> Any:
        if value is None and self.optional:
            return None
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise ParameterError(f"`{name}` must be {self.describe_number()}; got {value!r}.")
        v = float(value)
        bad = not math.isfinite(v)
        if self.low is not None:
            bad |= v <= self.low if self.low_open else v < self.low
        if self.high is not None:
            bad |= v >= self.high if self.high_open else v > self.high
        if bad:
            raise ParameterError(f"`{name}` must be {self.describe()}; got {_fmt(value)}.")
        return v


@dataclass(frozen=True)
class Int:
    """An integer >= ``low`` (and <= ``high`` when given)."""

    low: int | None = None
    high: int | None = None
    optional: bool = False

    def describe(self) -> str:
        if self.low is not None and self.high is not None:
            return f"an integer in [{self.low}, {self.high}]"
        if self.low is not None:
            return f"an integer >= {self.low}"
        return "an integer"

    def clean(self, name: str, value: Any) -> Any:
        if value is None and self.optional:
            return None
        ok = isinstance(value, numbers.Integral) and not isinstance(value, bool)
        if not ok and isinstance(value, float) and value.is_integer():
            value, ok = int(value), True
        if not ok:
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
        v = int(value)
        if (self.low is not None and v < self.low) or (self.high is not None and v > self.high):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {v}.")
        return v


@dataclass(frozen=True)
class Jobs:
    """A worker count: -1 (all cores) or an integer >= 1.

    joblib also reads -2, -3... as "all cores but 1, 2...", and 0 as nothing
    sensible; simpower refuses both, so a typo never silently picks a count.
    ``None`` (optional) means all cores, like -1.
    """

    optional: bool = True

    def describe(self) -> str:
        return "-1 (all cores) or an integer >= 1"

    def clean(self, name: str, value: Any) -> Any:
        if value is None and self.optional:
            return None
        ok = isinstance(value, numbers.Integral) and not isinstance(value, bool)
        if not ok and isinstance(value, float) and value.is_integer():
            value, ok = int(value), True
        if not ok or not (int(value) == -1 or int(value) >= 1):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
        return int(value)


@dataclass(frozen=True)
class Choice:
    """One of a fixed set of strings."""

    options: tuple[str, ...]
    optional: bool = False

    def describe(self) -> str:
        return "one of " + ", ".join(repr(o) for o in self.options)

    def clean(self, name: str, value: Any) -> Any:
        if value is None and self.optional:
            return None
        if value not in self.options:
            from .errors import nearest

            hint = nearest(str(value), self.options)
            raise ParameterError(
                f"`{name}` must be {self.describe()}; got {value!r}.{hint if 'Did' in hint else ''}"
            )
        return value


@dataclass(frozen=True)
class Bool:
    optional: bool = False

    def describe(self) -> str:
        return "true or false"

    def clean(self, name: str, value: Any) -> Any:
        if value is None and self.optional:
            return None
        if not isinstance(value, (bool, np.bool_)):
            raise ParameterError(f"`{name}` must be true or false; got {value!r}.")
        return bool(value)


@dataclass(frozen=True)
class Anything:
    """No check (objects validated elsewhere, e.g. nested components)."""

    optional: bool = True

    def describe(self) -> str:
        return "any value"

    def clean(self, name: str, value: Any) -> Any:
        return value


@dataclass(frozen=True)
class _Typed:
    """A value of one Python type (``kind``), described to users as ``label``."""

    optional: bool = False
    kind: ClassVar[type] = object
    label: ClassVar[str] = "a value"

    def describe(self) -> str:
        return self.label

    def clean(self, name: str, value: Any) -> Any:
        if value is None and self.optional:
            return None
        if not isinstance(value, self.kind):
            raise ParameterError(f"`{name}` must be {self.label}; got {value!r}.")
        return value


@dataclass(frozen=True)
class Text(_Typed):
    """A string (e.g. a parameter name, a path, a title)."""

    kind: ClassVar[type] = str
    label: ClassVar[str] = "a string"


@dataclass(frozen=True)
class Table(_Typed):
    """A table of named values (a TOML table, a Python dict); its entries are checked by its reader."""

    kind: ClassVar[type] = dict
    label: ClassVar[str] = "a table (name = value, ...)"


@dataclass(frozen=True)
class OneOrMore:
    """One value or a non-empty list of values, each meeting ``item``; with ``sep``, a string is split on it.

    Cleans to a tuple.
    """

    item: Any
    sep: str | None = None
    optional: bool = False

    def describe(self) -> str:
        return f"{self.item.describe()}, or a list of them"

    def clean(self, name: str, value: Any) -> Any:
        if value is None and self.optional:
            return None
        if isinstance(value, str) and self.sep is not None:
            value = [v.strip() for v in value.split(self.sep) if v.strip()]
        values = list(value) if isinstance(value, (list, tuple)) else [value]
        if not values:
            raise ParameterError(f"`{name}` must be {self.describe()}; got an empty list.")
        return tuple(self.item.clean(name, v) for v in values)


Constraint = Real | Int | Jobs | Choice | Bool | Anything | Text | Table | OneOrMore


def check_params(constraints: dict[str, Constraint], values: dict[str, Any], owner: str = "") -> dict[str, Any]:
    """Validate ``values`` against ``constraints`` and return the cleaned dict.

    Unknown keys raise with the nearest valid name.
    """
    from .errors import nearest

    out = {}
    for key in values:
        if key not in constraints:
            where = f" for {owner}" if owner else ""
            raise ParameterError(f"`{key}` is not a parameter{where}.{nearest(key, constraints)}")
    for key, con in constraints.items():
        out[key] = con.clean(key, values.get(key))
    return out
