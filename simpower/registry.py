"""Names -> built-in classes, and ``module:function`` / ``path/file.py:function`` references.

Built-in modules register their classes by setting a class attribute ``name``
(see :class:`simpower.components.Component`).  All modules inside
``simpower.processes`` and ``simpower.analyses`` are imported on first lookup, so
a new module needs no edit here.  Nothing is ever evaluated from a string:
references are resolved by import only.
"""

from __future__ import annotations

import importlib
import importlib.util
import pkgutil
import sys
from pathlib import Path
from typing import Any, Callable

from .errors import ParameterError, UnknownNameError, nearest

_REGISTRY: dict[str, dict[str, type]] = {}
_LOADED = False
BUILTIN_PACKAGES = ("simpower.processes", "simpower.analyses")


def register(cls: type) -> None:
    table = _REGISTRY.setdefault(cls.kind, {})
    prev = table.get(cls.name)
    if prev is not None and prev.__qualname__ != cls.__qualname__:
        raise RuntimeError(f"two {cls.kind}s named {cls.name!r}: {prev} and {cls}")
    table[cls.name] = cls


def load_builtins() -> None:
    global _LOADED
    if _LOADED:
        return
    _LOADED = True
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
    from .functions import check_code_allowed, current_reference_folder

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
        mod_name = "simpower_user_" + "".join(c if c.isalnum() else "_" for c in str(path))
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
    from .functions import current_reference_folder, reference_folder

    if base_dir is None:
        base_dir = current_reference_folder()
    spec = dict(spec)
    type_name = spec.pop("type", None)
    label = f"`{where}.type`" if where else "`type`"
    if type_name is None:
        raise ParameterError(f"{label} is missing: name a {kind}. Valid: {', '.join(names(kind))}.")
    if is_reference(type_name):
        from .functions import wrap_callable

        fn = resolve_reference(type_name, base_dir)
        return wrap_callable(kind, fn, params=spec, ref=type_name, base_dir=base_dir)
    try:
        cls = lookup(kind, type_name)
    except UnknownNameError as exc:
        raise UnknownNameError(f"{label}: {exc}") from None
    try:
        with reference_folder(base_dir):
            return cls(**spec)
    except ParameterError as exc:
        if where:
            msg = str(exc)
            raise ParameterError("`" + where + "." + msg[1:] if msg.startswith("`") else f"{where}: {msg}") from None
        raise
