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

Parameter values live in a private slot (``_Component__params``, read through
the read-only view ``self._p`` or ``get_params()``), and are reached as
attributes (``obj.sd``) only where the class defines no attribute of that
name. A declared parameter whose name is already an attribute of the class (a
method, a property, a class setting such as ``name``) would be hidden by it,
so the class is refused when it is defined, unless it lists the parameter in
``shadows`` (its attribute then deliberately stands for the parameter, e.g. an
outcome's ``mean`` property that resolves ``median``/``mean`` inputs).
"""

from __future__ import annotations

import hashlib
import inspect
import json
import math
from types import MappingProxyType
from typing import Any, ClassVar, Mapping

import numpy as np

from ._validation import Anything, Constraint, check_params
from .errors import DefinitionError, ParameterError, nearest
from .registry import build, register, set_component_base

REQUIRED = object()
#: the instance slot holding the parameter values (``Component.__params``, name-mangled so a
#: subclass cannot reuse it by accident)
_STORE = "_Component__params"
#: the instance slot holding the reference (text as written, folder it is relative to) of a
#: component built from ``type = "module:Class"`` or ``"path/file.py:Class"``
_REF = "_Component__ref"
#: names a subclass may not define: the store, its read-only view and its setter
RESERVED = frozenset({_STORE, _REF, "_p", "_set_params"})
_MISSING = object()


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
    #: parameters whose attribute the class defines itself on purpose (see the module notes)
    shadows: ClassVar[tuple[str, ...]] = ()

    def __init_subclass__(cls, **kw):
        super().__init_subclass__(**kw)
        _check_names(cls)
        if cls.__dict__.get("name"):
            register(cls)

    def __init__(self, **kwargs: Any):
        values = {**self.defaults, **kwargs}
        owner = self.name or type(self).__name__
        for key, con in self.params.items():
            if key not in values and not getattr(con, "optional", False):
                raise ParameterError(f"`{key}` is required for {owner}: give {con.describe()}.")
        cleaned = check_params(self.params, values, owner=owner)
        self._set_params(cleaned)
        self._check()
        hidden = (self.__dict__.keys() & self.params.keys()) - set(self.shadows)
        if hidden:
            key = sorted(hidden)[0]
            raise DefinitionError(f"{type(self).__name__} set an instance attribute `{key}`, which hides the "
                                  f"parameter `{key}`; store derived values under another name.")

    # -- contract -------------------------------------------------------
    def _check(self) -> None:
        """Cross-field validation; raise ParameterError naming the field."""

    @property
    def _p(self) -> Mapping[str, Any]:
        """The parameter values by name (a read-only view)."""
        return MappingProxyType(self.__dict__[_STORE])

    def _set_params(self, values: Mapping[str, Any]) -> None:
        """Replace the stored parameter values (for ``_check`` methods that normalise them)."""
        object.__setattr__(self, _STORE, dict(values))

    def __getattr__(self, key: str) -> Any:
        p = self.__dict__.get(_STORE)
        if p is not None and key in p:
            return p[key]
        raise AttributeError(f"{type(self).__name__!s} has no attribute {key!r}")

    def __setattr__(self, key, value):
        if key in self.params:
            raise AttributeError(f"{type(self).__name__} is immutable; use .replace({key}=...)")
        object.__setattr__(self, key, value)

    def __getstate__(self):
        state = {"params": dict(self.__dict__[_STORE])}
        if _REF in self.__dict__:
            state["ref"] = self.__dict__[_REF]
        return state

    def __setstate__(self, state):
        self._set_params(state["params"])
        if state.get("ref") is not None:
            object.__setattr__(self, _REF, tuple(state["ref"]))

    def __reduce_ex__(self, protocol):
        # a class loaded from a user's file lives in a module that cannot be imported by name:
        # pickle it by its file path, so a worker process loads the file again
        path = _user_file(type(self))
        if path is None:
            return super().__reduce_ex__(protocol)
        return (_restore_from_file, (path, type(self).__qualname__, self.__getstate__()))

    def _set_reference(self, ref: str, base_dir: str | None) -> None:
        """Remember the ``module:Class`` / ``path/file.py:Class`` text this component was built from."""
        object.__setattr__(self, _REF, (ref, None if base_dir is None else str(base_dir)))

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
        out = type(self)(**new)
        if _REF in self.__dict__:
            object.__setattr__(out, _REF, self.__dict__[_REF])
        return out

    def spec(self) -> dict[str, Any]:
        """A data-only description (JSON/TOML-able) from which the registry rebuilds it.

        ``type`` is the registry name; for a class built from a reference it is the
        reference as written, and ``_source`` fingerprints the class's code (so a stored
        run is not resumed with changed code); for another unregistered class it is
        ``module:Class`` (or ``/abs/path/file.py:Class`` for a class loaded from a file).
        """
        ref = self.__dict__.get(_REF)
        if ref is not None:
            out: dict[str, Any] = {"type": ref[0]}
        elif self.name:
            out = {"type": self.name}
        else:
            path = _user_file(type(self))
            out = {"type": f"{path or type(self).__module__}:{type(self).__qualname__}"}
        for k, v in self._p.items():
            if v is not None:  # an unset optional parameter: TOML has no null, and rebuilding restores it
                out[k] = to_plain(v)
        if ref is not None:
            out["_source"] = source_hash(type(self))
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


def _check_names(cls: type) -> None:
    """Refuse a class whose declared parameter would be hidden by (or hide) an attribute."""
    for key in RESERVED:
        if key in cls.__dict__:
            raise DefinitionError(f"{cls.__name__} defines `{key}`, a name Component keeps for its parameter "
                                  "store; rename it.")
    params = cls.__dict__.get("params", cls.params)
    shadows = set(cls.shadows)
    for key in params:
        if key in shadows:
            continue
        attr = inspect.getattr_static(cls, key, _MISSING)
        if attr is _MISSING:
            continue
        owner = next(k for k in cls.__mro__ if key in k.__dict__)
        what = "method" if inspect.isfunction(attr) else type(attr).__name__
        raise DefinitionError(f"{cls.__name__}: parameter `{key}` has the name of the {what} "
                              f"{owner.__name__}.{key}, which would hide it; rename the parameter (or list it "
                              f"in `shadows` if that attribute deliberately stands for it).")


def _user_file(cls: type) -> str | None:
    """The file of a class loaded from ``path/file.py:Class`` (its module has no importable name)."""
    import sys

    from .registry import USER_MODULE_PREFIX

    if not cls.__module__.startswith(USER_MODULE_PREFIX):
        return None
    return getattr(sys.modules.get(cls.__module__), "__file__", None)


def _restore_from_file(path: str, qualname: str, state: dict) -> "Component":
    from .registry import resolve_reference

    cls = resolve_reference(f"{path}:{qualname.split('.')[0]}")
    for part in qualname.split(".")[1:]:
        cls = getattr(cls, part)
    obj = cls.__new__(cls)
    obj.__setstate__(state)
    return obj


def source_hash(obj: Any) -> str:
    """First 12 hex digits of the SHA-256 of ``obj``'s source ('' when it has none): marks which code a spec came from."""
    try:
        src = inspect.getsource(obj)
    except (OSError, TypeError):
        return ""
    return hashlib.sha256(src.encode()).hexdigest()[:12]


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


set_component_base(Component)
