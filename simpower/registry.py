"""Names -> built-in classes, and ``module:function`` / ``path/file.py:function`` references.

Built-in modules register their classes by setting a class attribute ``name``
(see :class:`simpower.components.Component`).  All modules inside
``simpower.processes`` and ``simpower.analyses`` are imported on first lookup, so
a new module needs no edit here.  Nothing is ever evaluated from a string:
references are resolved by import only.

This module imports no other part of simpower but the errors: components
register themselves here, and so do the classes that wrap a user function as a
process or an analysis (``simpower.functions``, :func:`register_wrapper`).
"""

from __future__ import annotations

import importlib
import importlib.util
import pkgutil
import sys
from contextlib import contextmanager
from contextvars import ContextVar
from pathlib import Path
from typing import Any, Callable, Iterator

from .errors import ParameterError, UnknownNameError, nearest

_REGISTRY: dict[str, dict[str, type]] = {}
#: kind -> the class that wraps a user function as a component of that kind
_WRAPPERS: dict[str, type] = {}
_LOADED = False
#: the component base class, set by :mod:`simpower.components` when it loads (the registry
#: imports nothing of simpower's but the errors, so it cannot import that class itself)
_COMPONENT_BASE: list[type] = []
BUILTIN_PACKAGES = ("simpower.processes", "simpower.analyses")
#: modules that register the wrappers of user functions
BUILTIN_MODULES = ("simpower.functions",)
#: prefix of the private module names under which ``path/file.py`` references are loaded
USER_MODULE_PREFIX = "simpower_user_"


# -- where references resolve, and whether user code may run here ------------------------
_FOLDER: ContextVar[str | None] = ContextVar("simpower_reference_folder", default=None)
_NO_CODE: ContextVar[str | None] = ContextVar("simpower_no_user_code", default=None)


@contextmanager
def reference_folder(folder: str | Path | None) -> Iterator[None]:
    """Resolve relative ``path/file.py:function`` references against ``folder`` inside the block."""
    token = _FOLDER.set(None if folder is None else str(folder))
    try:
        yield
    finally:
        _FOLDER.reset(token)


def current_reference_folder() -> str | None:
    """The folder set by the innermost :func:`reference_folder` (None: the current folder)."""
    return _FOLDER.get()


@contextmanager
def no_user_code(reason: str) -> Iterator[None]:
    """Refuse every ``module:function`` / ``path/file.py:function`` reference inside the block.

    ``reason`` ends the one-line error, e.g. how else to reach the same result.
    """
    token = _NO_CODE.set(reason)
    try:
        yield
    finally:
        _NO_CODE.reset(token)


def check_code_allowed(ref: str) -> None:
    """Raise ParameterError when references are refused here (see :func:`no_user_code`)."""
    reason = _NO_CODE.get()
    if reason is not None:
        raise ParameterError(f"the scenario names user code {ref!r}, which is not run from here: {reason}")



def set_component_base(cls: type) -> None:
    """Record the component base class (called once by :mod:`simpower.components`)."""
    _COMPONENT_BASE[:] = [cls]


def register(cls: type) -> None:
    table = _REGISTRY.setdefault(cls.kind, {})
    prev = table.get(cls.name)
    if prev is not None and prev.__qualname__ != cls.__qualname__:
        raise RuntimeError(f"two {cls.kind}s named {cls.name!r}: {prev} and {cls}")
    table[cls.name] = cls


def register_wrapper(kind: str, cls: type) -> None:
    """Register ``cls(fn, params, ref=..., base_dir=...)`` as the wrapper of user functions of ``kind``."""
    _WRAPPERS[kind] = cls


def wrap_callable(kind: str, fn: Callable, params: dict[str, Any] | None = None, ref: str | None = None,
                  base_dir: str | Path | None = None):
    """A user function as a component of ``kind`` (a process or an analysis)."""
    load_builtins()
    cls = _WRAPPERS.get(kind)
    if cls is None:
        raise ParameterError(f"a user function cannot serve as a {kind}; give a built-in {kind} name.")
    return cls(fn, params, ref=ref, base_dir=base_dir)


def load_builtins() -> None:
    global _LOADED
    if _LOADED:
        return
    _LOADED = True
    for mod_name in BUILTIN_MODULES:
        importlib.import_module(mod_name)
    for pkg_name in BUILTIN_PACKAGES:
        pkg = importlib.import_module(pkg_name)
        for mod in pkgutil.iter_modules(pkg.__path__):
            if not mod.name.startswith("_"):
                importlib.import_module(f"{pkg_name}.{mod.name}")


def names(kind: str) -> list[str]:
    load_builtins()
    return sorted(_REGISTRY.get(kind, {}))


def lookup(kind: str, name: str) -> type:
    load_builtins()
    table = _REGISTRY.get(kind, {})
    if name in table:
        return table[name]
    raise UnknownNameError(f"unknown {kind} {name!r}.{nearest(name, table)}")


def is_reference(text: str) -> bool:
    return isinstance(text, str) and ":" in text


def resolve_reference(ref: str, base_dir: str | Path | None = None) -> Callable[..., Any]:
    """Import ``module:attr`` or ``path/to/file.py:attr`` and return the attribute.

    A file path is taken relative to ``base_dir``, else to the folder of the
    scenario file being loaded (:func:`simpower.functions.reference_folder`),
    else to the current folder. The file's module is loaded under a private
    name derived from its absolute path, so workers can load it again from the
    same reference. Importing runs the module's code, as any import does;
    inside :func:`simpower.functions.no_user_code` every reference is refused.
    """
    check_code_allowed(ref)
    if base_dir is None:
        base_dir = current_reference_folder()
    target, _, attr = ref.rpartition(":")
    if not target or not attr:
        raise ParameterError(f"reference {ref!r} must look like 'module:function' or 'path/file.py:function'.")
    if target.endswith(".py") or "/" in target or "\\" in target:
        path = Path(target)
        if not path.is_absolute() and base_dir is not None:
            path = Path(base_dir) / path
        path = path.resolve()
        if not path.is_file():
            raise ParameterError(f"reference {ref!r}: file {str(path)!r} not found.")
        mod_name = USER_MODULE_PREFIX + "".join(c if c.isalnum() else "_" for c in str(path))
        module = sys.modules.get(mod_name)
        if module is None:
            spec = importlib.util.spec_from_file_location(mod_name, path)
            module = importlib.util.module_from_spec(spec)
            sys.modules[mod_name] = module
            try:
                spec.loader.exec_module(module)
            except Exception as exc:
                del sys.modules[mod_name]
                raise ParameterError(f"reference {ref!r}: importing {path.name} raised {type(exc).__name__}: {exc}") from None
    else:
        try:
            module = importlib.import_module(target)
        except ImportError as exc:
            raise ParameterError(f"reference {ref!r}: cannot import module {target!r} ({exc}).") from None
    try:
        obj = getattr(module, attr)
    except AttributeError:
        public = [n for n in dir(module) if not n.startswith("_")]
        raise ParameterError(f"reference {ref!r}: {target!r} has no attribute {attr!r}.{nearest(attr, public)}") from None
    if not callable(obj):
        raise ParameterError(f"reference {ref!r} is not callable.")
    return obj


def build(kind: str, spec: dict[str, Any], where: str = "", base_dir: str | Path | None = None):
    """Build a component of ``kind`` from a spec mapping with a ``type`` key.

    ``base_dir`` (default: the current :func:`~simpower.functions.reference_folder`)
    resolves relative references, also those inside nested tables (``multiple.tests``).
    """
    if base_dir is None:
        base_dir = current_reference_folder()
    spec = dict(spec)
    type_name = spec.pop("type", None)
    label = f"`{where}.type`" if where else "`type`"
    if type_name is None:
        raise ParameterError(f"{label} is missing: name a {kind}. Valid: {', '.join(names(kind))}.")
    if is_reference(type_name):
        obj = resolve_reference(type_name, base_dir)
        spec.pop("_source", None)  # a record of the code a spec() came from, not a parameter
        base = _COMPONENT_BASE[0] if _COMPONENT_BASE else None
        if base is not None and isinstance(obj, type) and issubclass(obj, base):
            if obj.kind != kind:
                raise ParameterError(f"{label} = {type_name!r} is a {obj.kind} class; give a {kind} here.")
            component = _construct(obj, spec, where, base_dir)
            component._set_reference(type_name, base_dir)
            return component
        return wrap_callable(kind, obj, params=spec, ref=type_name, base_dir=base_dir)
    try:
        cls = lookup(kind, type_name)
    except UnknownNameError as exc:
        raise UnknownNameError(f"{label}: {exc}") from None
    return _construct(cls, spec, where, base_dir)


def _construct(cls: type, spec: dict[str, Any], where: str, base_dir=None):
    """``cls(**spec)``, with a parameter error's field prefixed by ``where`` (e.g. `process.n`);
    references in nested tables resolve against ``base_dir``."""
    try:
        with reference_folder(base_dir):
            return cls(**spec)
    except ParameterError as exc:
        if where:
            msg = str(exc)
            raise ParameterError("`" + where + "." + msg[1:] if msg.startswith("`") else f"{where}: {msg}") from None
        raise


def rebuild(obj):
    """Build a new object from ``obj.spec()`` (relative references resolved as when ``obj`` was built)."""
    base_dir = getattr(obj, "_base_dir", None)
    ref = getattr(obj, "__dict__", {}).get("_Component__ref")  # components._REF
    if ref is not None:
        base_dir = ref[1]
    return build(obj.kind, obj.spec(), base_dir=base_dir)
