"""How a study runs, as one validated value: :class:`Execution`.

Seed, workers and executor, run store, progress bar, the fit-trouble policy,
the failure limit, the per-replicate time limit, record keeping and the chunk
size are settings of *how* a plan is executed; they are checked here, in one
place, against a declared table (:data:`EXECUTION_CONSTRAINTS`), and passed
through the engine and the planning code as this one frozen value instead of a
dozen keyword arguments. Of them only the seed and the chunk size shape the
numbers (see :mod:`simpower.engine.runner`); the others never do.

``run``, ``run_many``, ``sweep``, ``null_check``, ``required_n``,
``detectable_effect`` and ``run_to_mcse`` accept ``execution=Execution(...)``;
their keyword arguments (``seed=``, ``n_jobs=``...) keep working and build
one (:func:`resolve`); a keyword that contradicts a given ``execution`` is
refused.

The executor. ``backend=None`` (the default) takes joblib's current context:
inside ``with joblib.parallel_config(backend="threading"):`` chunks run on
threads, under ``"sequential"`` in this process, under ``"dask"`` on the
current dask client; outside any context, on loky worker processes with crash
isolation (:mod:`simpower.engine.guard`). An explicit ``backend`` wins over
the context.

Examples
--------
>>> ex = Execution(seed=7, n_jobs=1)
>>> ex.replace(n_jobs=2).n_jobs, ex.n_jobs
(2, 1)
>>> Execution(timeout="soon")
Traceback (most recent call last):
...
simpower.errors.ParameterError: `timeout` must be a number > 0; got 'soon'.
"""

from __future__ import annotations

import dataclasses
import numbers
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._validation import Bool, Choice, Int, Jobs, Real
from .errors import ParameterError

#: executors simpower runs chunks on (see :mod:`simpower.engine.executor`)
BACKENDS = ("loky", "threading", "serial", "dask")


def check_address(address: Any, name: str = "address") -> Any:
    """A dask scheduler address as given, once it looks like SCHEME://HOST:PORT (or HOST:PORT)."""
    if address is None or not isinstance(address, str):
        return address  # None, or a dask Client object
    text = address.strip()
    scheme, sep, rest = text.partition("://")
    if not sep:
        scheme, rest = "tcp", text
    if scheme in ("tcp", "tls"):
        host, colon, port = rest.rstrip("/").rpartition(":")
        if not (colon and host.strip("[]") and port.isdigit() and 0 < int(port) < 65536):
            raise ParameterError(f"`{name}` must look like tcp://HOST:PORT (e.g. tcp://10.0.0.5:8786), with the "
                                 f"scheduler's port; got {address!r}.")
    return text


@dataclass(frozen=True)
class Seed:
    """A run's seed: an integer >= 0, a root ``numpy.random.SeedSequence``, or None (fresh entropy)."""

    optional: bool = True

    def describe(self) -> str:
        return "an integer >= 0"

    def clean(self, name: str, value: Any) -> Any:
        if value is None:
            return None
        if isinstance(value, np.random.SeedSequence):
            if value.spawn_key:
                raise ParameterError(f"`{name}` must be a root SeedSequence (no spawn_key) or an integer >= 0.")
            return value
        if isinstance(value, str) and value.strip().isdigit():
            return int(value.strip())
        if isinstance(value, numbers.Integral) and not isinstance(value, bool) and value >= 0:
            return int(value)
        raise ParameterError(f"`{name}` must be an integer >= 0; got {value!r}.")


@dataclass(frozen=True)
class Address:
    """A dask scheduler address (tcp://HOST:PORT) or a ``dask.distributed.Client``; None for none."""

    optional: bool = True

    def describe(self) -> str:
        return "a scheduler address tcp://HOST:PORT"

    def clean(self, name: str, value: Any) -> Any:
        if isinstance(value, str) and not value.strip():
            return None
        return check_address(value, name)


@dataclass(frozen=True)
class Store:
    """A run store: a file path, or an object with ``load`` and ``save``; None for none."""

    optional: bool = True

    def describe(self) -> str:
        return "a file path or a store with load/save"

    def clean(self, name: str, value: Any) -> Any:
        if value is None or hasattr(value, "load") or isinstance(value, (str, bytes)) \
                or hasattr(value, "__fspath__"):
            return value
        raise ParameterError(f"`{name}` must be a file path or a store with load/save; got {value!r}.")


#: every setting of an Execution and what it accepts (the one place they are checked)
EXECUTION_CONSTRAINTS = {
    "seed": Seed(),
    "n_jobs": Jobs(),
    "backend": Choice(BACKENDS, optional=True),
    "address": Address(),
    "store": Store(),
    "progress": Bool(optional=True),
    "fit_trouble": Choice(("failure", "nonrejection")),
    "max_failure_rate": Real(0.0, 1.0, low_open=True),
    "timeout": Real(0.0, low_open=True, optional=True),
    "keep_records": Bool(optional=True),
    "chunk_size": Int(low=1, optional=True),
}


@dataclass(frozen=True)
class Execution:
    """How a study runs: seed, workers, executor, store, progress, failure policy, limits, records, chunks.

    Parameters
    ----------
    seed : int >= 0, SeedSequence or None
        None draws fresh entropy (or reuses a run store's seed when resuming).
    n_jobs : int or None
        -1 (default) all cores, or a count >= 1; None: all cores.
    backend : {None, 'loky', 'threading', 'serial', 'dask'}
        None takes joblib's current context (``joblib.parallel_config``), else
        loky worker processes with crash isolation; see the module docstring.
    address : str or dask.distributed.Client, optional
        The dask scheduler; implies ``backend='dask'`` (another backend is refused).
    store : path or store object, optional
        Finished chunks are saved there and reused (resume).
    progress : bool, optional
        Progress bar on stderr (default: when stderr is a terminal).
    fit_trouble : {'failure', 'nonrejection'}
        What replicates whose fit warned count as.
    max_failure_rate : float in (0, 1]
        Stop once more than this share of an analysis' replicates fail hard.
    timeout : float > 0, optional
        Per-replicate time limit (seconds) of per-replicate analyses.
    keep_records : bool, optional
        Per-replicate records in memory (None: automatic by size).
    chunk_size : int >= 1, optional
        Replicates per chunk; None leaves it to the plan (part of the
        reproducibility promise: same seed and chunk size, same numbers).
    """

    seed: Any = None
    n_jobs: int | None = -1
    backend: str | None = None
    address: Any = None
    store: Any = None
    progress: bool | None = None
    fit_trouble: str = "failure"
    max_failure_rate: float = 0.5
    timeout: float | None = None
    keep_records: bool | None = None
    chunk_size: int | None = None

    def __post_init__(self):
        values = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        if values["backend"] == "local":  # an old spelling of the default
            values["backend"] = None
        for name, con in EXECUTION_CONSTRAINTS.items():
            object.__setattr__(self, name, con.clean(name, values[name]))
        if self.address is not None:
            if self.backend is None:
                object.__setattr__(self, "backend", "dask")
            elif self.backend != "dask":
                raise ParameterError(f"`address` is a dask scheduler's; it cannot be used with "
                                     f"backend={self.backend!r} (drop `address`, or use backend='dask').")

    def replace(self, **changes) -> "Execution":
        """A copy with ``changes`` applied and checked (unknown names are refused with the nearest one)."""
        from .errors import nearest

        for key in changes:
            if key not in EXECUTION_CONSTRAINTS:
                raise ParameterError(f"`{key}` is not an execution setting.{nearest(key, EXECUTION_CONSTRAINTS)}")
        return dataclasses.replace(self, **changes)

    def __repr__(self) -> str:
        shown = [f"{f.name}={getattr(self, f.name)!r}" for f in dataclasses.fields(self)
                 if getattr(self, f.name) != f.default]
        return f"Execution({', '.join(shown)})"


#: the defaults of the keyword arguments that stand for execution settings
DEFAULTS = {f.name: f.default for f in dataclasses.fields(Execution)}


def resolve(execution: Execution | None = None, **keywords) -> Execution:
    """The one Execution of a call: ``execution`` (or the defaults) with its keyword arguments applied.

    A keyword left at its default changes nothing; one that differs from its
    default and from the given ``execution`` is refused, naming both.

    Examples
    --------
    >>> resolve(None, seed=3, n_jobs=1) == Execution(seed=3, n_jobs=1)
    True
    >>> resolve(Execution(seed=3), seed=4)
    Traceback (most recent call last):
    ...
    simpower.errors.ParameterError: `seed` = 4 contradicts `execution.seed` = 3; give it in one place.
    """
    if execution is None:
        changes = {k: v for k, v in keywords.items() if not _same(v, DEFAULTS[k])}
        return Execution(**changes) if changes else Execution()
    if not isinstance(execution, Execution):
        raise ParameterError(f"`execution` must be a simpower.Execution; got {type(execution).__name__}.")
    for key, value in keywords.items():
        if _same(value, DEFAULTS[key]) or _same(value, getattr(execution, key)):
            continue
        raise ParameterError(f"`{key}` = {value!r} contradicts `execution.{key}` = {getattr(execution, key)!r}; "
                             f"give it in one place.")
    return execution


def _same(a, b) -> bool:
    if a is b:
        return True
    try:
        return bool(type(a) is type(b) and a == b) or (
            isinstance(a, numbers.Number) and isinstance(b, numbers.Number) and not isinstance(a, bool)
            and not isinstance(b, bool) and a == b)
    except Exception:
        return False


__all__ = ["Execution", "EXECUTION_CONSTRAINTS", "resolve", "check_address"]
