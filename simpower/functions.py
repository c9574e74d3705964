"""Wrappers that give user callables the component contract.

A user process ``f(rng, **params)`` or analysis ``g(data, **params)`` is wrapped
so it has parameters (for sweeps), a spec (for the fingerprint and reports), and
pickles by *reference* when it came from ``module:function`` or
``path/file.py:function``, so worker processes re-import it rather than rely on
pickling code.

A reference names code, and resolving it runs that code, as any Python import
does. Two settings of the current context govern references (both read by
:func:`simpower.registry.resolve_reference`, the one place they are resolved):

* :func:`reference_folder` -- the folder a relative ``path/file.py`` is taken
  from: the scenario file's, set while a scenario file is loaded, so a
  reference means the same file wherever it sits (``[process]``,
  ``[analyses.x]``, inside ``multiple.tests``, in ``--set``) and whatever the
  current folder;
* :func:`no_user_code` -- refuse every reference, e.g. while rebuilding a run
  from a run store, which is data and never names code to run.
"""

from __future__ import annotations

import inspect
from pathlib import Path
from typing import Any, Callable

from .analyses.base import Analysis, as_test_result
from .components import source_hash, to_plain
from .errors import ParameterError, nearest
from .processes.base import Process
from .registry import (check_code_allowed, current_reference_folder, no_user_code,  # noqa: F401 (public here)
                       reference_folder, register_wrapper, resolve_reference)


class _FunctionMixin:
    def _init_function(self, fn, params, ref, base_dir):
        object.__setattr__(self, "_fn", fn)
        object.__setattr__(self, "_ref", ref)
        object.__setattr__(self, "_base_dir", None if base_dir is None else str(base_dir))
        self._set_params(params or {})
        self._check_signature()

    def _check_signature(self):
        try:
            sig = inspect.signature(self._fn)
        except (TypeError, ValueError):
            return
        ps = list(sig.parameters.values())
        if any(p.kind is p.VAR_KEYWORD for p in ps):
            return
        accepted = {p.name for p in ps[1:] if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)}
        for key in self._p:
            if key not in accepted:
                raise ParameterError(
                    f"`{key}` is not a parameter of {self.label}.{nearest(key, accepted)}"
                )

    @property
    def label(self) -> str:
        return self._ref or f"{getattr(self._fn, '__module__', '?')}:{getattr(self._fn, '__qualname__', '?')}"

    def get_params(self, deep: bool = True):
        return dict(self._p)

    def replace(self, **changes):
        unknown = [k for k in changes if k not in self._p]
        if unknown:
            raise ParameterError(
                f"`{unknown[0]}` is not a parameter of {self.label}.{nearest(unknown[0], self._p)}"
            )
        return type(self)(self._fn, {**self._p, **changes}, ref=self._ref, base_dir=self._base_dir)

    def spec(self):
        out = {"type": self.label, **{k: to_plain(v) for k, v in self._p.items()}}
        out["_source"] = source_hash(self._fn)
        return out

    def describe(self) -> str:
        ps = ", ".join(f"{k} = {v}" for k, v in self._p.items())
        return f"user {self.kind} {self.label}" + (f" ({ps})" if ps else "")

    def __repr__(self):
        return f"{type(self).__name__}({self.label!r}, {dict(self._p)!r})"

    def __getstate__(self):
        state = {"_p": dict(self._p), "_ref": self._ref, "_base_dir": self._base_dir}
        if self._ref is None:
            state["_fn"] = self._fn
        return state

    def __setstate__(self, state):
        self._set_params(state["_p"])
        object.__setattr__(self, "_ref", state["_ref"])
        object.__setattr__(self, "_base_dir", state["_base_dir"])
        fn = state.get("_fn")
        if fn is None:
            fn = resolve_reference(state["_ref"], state["_base_dir"])
        object.__setattr__(self, "_fn", fn)


class FunctionProcess(_FunctionMixin, Process):
    """A user function ``f(rng, **params) -> data`` as a process."""

    #: unknown: a user function does not say what its effect measures (a scenario's
    #: ``true_effect`` / ``true_effects`` tell, see Scenario.true_effect_for)
    estimand_label = None

    def __init__(self, fn: Callable, params: dict[str, Any] | None = None, ref: str | None = None,
                 base_dir: str | Path | None = None, effect_param: str | None = None,
                 size_param: str | None = None):
        self._init_function(fn, params, ref, base_dir)
        object.__setattr__(self, "effect_param", effect_param if effect_param in self._p else
                           ("effect" if "effect" in self._p else None))
        object.__setattr__(self, "size_param", size_param if size_param in self._p else
                           ("n" if "n" in self._p else None))

    def __call__(self, rng):
        return self._fn(rng, **self._p)

    def __getstate__(self):
        s = super().__getstate__()
        s["effect_param"], s["size_param"] = self.effect_param, self.size_param
        return s

    def __setstate__(self, state):
        super().__setstate__(state)
        object.__setattr__(self, "effect_param", state.get("effect_param"))
        object.__setattr__(self, "size_param", state.get("size_param"))

    def replace(self, **changes):
        new = super().replace(**changes)
        object.__setattr__(new, "effect_param", self.effect_param)
        object.__setattr__(new, "size_param", self.size_param)
        return new


class FunctionAnalysis(_FunctionMixin, Analysis):
    """A user function ``g(data, **params) -> p-value | result`` as an analysis."""

    def __init__(self, fn: Callable, params: dict[str, Any] | None = None, ref: str | None = None,
                 base_dir: str | Path | None = None):
        self._init_function(fn, params, ref, base_dir)

    def __call__(self, data):
        return as_test_result(self._fn(data, **self._p))


# `registry.build` wraps a `module:function` reference with these (the registry imports no component)
register_wrapper("process", FunctionProcess)
register_wrapper("analysis", FunctionAnalysis)


def as_process(obj, params: dict[str, Any] | None = None) -> Process:
    if isinstance(obj, Process):
        if params:
            return obj.replace(**params)
        return obj
    if callable(obj):
        return FunctionProcess(obj, params)
    raise ParameterError(f"`process` must be a Process or a callable (rng, **params) -> data; got {obj!r}.")


def as_analysis(obj) -> Analysis:
    if isinstance(obj, Analysis):
        return obj
    if callable(obj):
        return FunctionAnalysis(obj)
    raise ParameterError(f"`analysis` must be an Analysis or a callable data -> p-value; got {obj!r}.")
