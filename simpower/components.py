"""The one object contract shared by processes, outcomes, missingness and analyses.

A component is a *value*, like a frozen ``scipy.stats`` distribution: it stores
its parameters under the names the constructor takes, validates them once at
construction against a declared table (``params``), shows only non-default
parameters in its repr, and can be copied with changes (``replace``), also of
nested components through dotted names (``"outcome.cv"``).

Subclasses declare::

    class MyThing(Process):
        name = "my_thing"                       # registry name (TOML ``type``)
        params = {"n": Int(low=2), "sd": Real(low=0, low_open=True)}
        defaults = {"sd": 1.0}

and may override :meth:`_check` for cross-field rules.
"""

from __future__ import annotations

import hashlib
import json
import math
from typing import Any, ClassVar

import numpy as np

from ._validation import Anything, Constraint, check_params
from .errors import ParameterError, nearest
from .registry import build, register

REQUIRED = object()


class Nested(Anything):
    """A parameter holding another component of a given kind (or ``None`` if optional).

    Accepts a component instance or a spec mapping ``{"type": name, ...}``.
    """

    def __init__(self, kind: str, optional: bool = False):
        object.__setattr__(self, "kind", kind)
        object.__setattr__(self, "optional", optional)

    def describe(self) -> str:
        return f"a {self.kind} (object or {{type = ...}} table)"

    def clean(self, name: str, value: Any) -> Any:
        if value is None:
            if self.optional:
                return None
            raise ParameterError(f"`{name}` is required: give {self.describe()}.")
        if isinstance(value, Component):
            if value.kind != self.kind:
                raise ParameterError(f"`{name}` must be a {self.kind}; got a {value.kind} ({value!r}).")
            return value
        if isinstance(value, dict):
            return build(self.kind, value, where=name)
        # frozen scipy distributions are accepted where an outcome is expected
        if self.kind == "outcome" and hasattr(value, "rvs") and hasattr(value, "dist"):
            return build("outcome", {"type": "scipy", "dist": value}, where=name)
        raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")


class Component:
    """Base class of all configurable building blocks."""

    kind: ClassVar[str] = "component"
    name: ClassVar[str | None] = None
    params: ClassVar[dict[str, Constraint]] = {}
    defaults: ClassVar[dict[str, Any]] = {}

    def __init_subclass__(cls, **kw):
        super().__init_subclass__(**kw)
        if cls.__dict__.get("name"):
            register(cls)

    def __init__(self, **kwargs: Any):
        values = {**self.defaults, **kwargs}
        owner = self.name or type(self).__name__
        for key, con in self.params.items():
            if key not in values and not getattr(con, "optional", False):
                raise ParameterError(f"`{key}` is required for {owner}: give {con.describe()}.")
        cleaned = check_params(self.params, values, owner=owner)
        object.__setattr__(self, "_p", cleaned)
        self._check()

    # -- contract -------------------------------------------------------
    def _check(self) -> None:
        """Cross-field validation; raise ParameterError naming the field."""

    def __getattr__(self, key: str) -> Any:
        p = self.__dict__.get("_p")
        if p is not None and key in p:
            return p[key]
        raise AttributeError(f"{type(self).__name__!s} has no attribute {key!r}")

    def __setattr__(self, key, value):
        if key in self.params:
            raise AttributeError(f"{type(self).__name__} is immutable; use .replace({key}=...)")
        object.__setattr__(self, key, value)

    def __getstate__(self):
        return {"_p": self._p}

    def __setstate__(self, state):
        object.__setattr__(self, "_p", state["_p"])

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        """Parameters by name; with ``deep`` nested components appear as dotted keys."""
        out: dict[str, Any] = {}
        for k, v in self._p.items():
            if deep and isinstance(v, Component):
                out[k] = v
                for kk, vv in v.get_params(deep=True).items():
                    out[f"{k}.{kk}"] = vv
            else:
                out[k] = v
        return out

    def replace(self, **changes: Any) -> "Component":
        """A copy with some parameters changed; dotted names reach nested components."""
        direct: dict[str, Any] = {}
        nested: dict[str, dict[str, Any]] = {}
        for key, value in changes.items():
            head, _, rest = key.partition(".")
            if rest:
                nested.setdefault(head, {})[rest] = value
            else:
                direct[key] = value
        new = dict(self._p)
        new.update(direct)
        for head, sub in nested.items():
            child = new.get(head)
            if not isinstance(child, Component):
                raise ParameterError(
                    f"`{head}` of {self.name or type(self).__name__} is not a nested component."
                    + nearest(head, self._p)
                )
            new[head] = child.replace(**sub)
        for key in direct:
            if key not in self.params:
                raise ParameterError(
                    f"`{key}` is not a parameter of {self.name or type(self).__name__}." + nearest(key, self.params)
                )
        return type(self)(**new)

    def spec(self) -> dict[str, Any]:
        """A data-only description (JSON/TOML-able) from which the registry rebuilds it."""
        out: dict[str, Any] = {"type": self.name or f"{type(self).__module__}:{type(self).__qualname__}"}
        for k, v in self._p.items():
            if v is not None:  # an unset optional parameter: TOML has no null, and rebuilding restores it
                out[k] = to_plain(v)
        return out

    def fingerprint(self) -> str:
        return fingerprint(self.spec())

    def describe(self) -> str:
        """Assumptions in words, for reports. Subclasses give a better sentence."""
        ps = ", ".join(f"{k} = {_short(v)}" for k, v in self._p.items() if v is not None)
        return f"{self.name or type(self).__name__} ({ps})"

    def __repr__(self) -> str:
        shown = []
        for k, v in self._p.items():
            if k in self.defaults and _same(self.defaults[k], v):
                continue
            if v is None and getattr(self.params.get(k), "optional", False):
                continue
            shown.append(f"{k}={v!r}")
        return f"{type(self).__name__}({', '.join(shown)})"

    def __eq__(self, other):
        return type(self) is type(other) and self.spec() == other.spec()

    def __hash__(self):
        return hash(self.fingerprint())


def _same(a, b) -> bool:
    try:
        return bool(a == b)
    except Exception:
        return a is b


def _short(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:g}"
    if isinstance(v, Component):
        return v.describe()
    return str(v)


def to_plain(v: Any) -> Any:
    """Convert a parameter value to plain JSON-able data."""
    if isinstance(v, Component):
        return v.spec()
    if isinstance(v, dict):
        return {str(k): to_plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [to_plain(x) for x in v]
    if isinstance(v, np.ndarray):
        return [to_plain(x) for x in v.tolist()]
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, float) and not math.isfinite(v):
        return str(v)
    if v is None or isinstance(v, (bool, int, float, str)):
        return v
    if hasattr(v, "dist") and hasattr(v, "args"):  # frozen scipy distribution
        return {"scipy": v.dist.name, "args": to_plain(list(v.args)), "kwds": to_plain(dict(v.kwds))}
    if callable(v):
        return f"{getattr(v, '__module__', '?')}:{getattr(v, '__qualname__', repr(v))}"
    return repr(v)


def fingerprint(spec: Any) -> str:
    """SHA-256 (hex, first 16 chars) of the canonical JSON of a spec."""
    blob = json.dumps(spec, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]
