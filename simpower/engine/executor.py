"""Executors: run chunk tasks serially, on local cores (joblib/loky) or on dask.

We write no scheduler: each chunk is one joblib task. The backend is joblib's
(``loky`` by default), or whatever the caller set with
``joblib.parallel_config``; ``backend="dask"`` connects to a dask.distributed
scheduler (imported lazily). ``n_jobs=1`` runs in this process.
"""

from __future__ import annotations

import os
from contextlib import contextmanager, nullcontext
from typing import Callable, Iterable, Iterator

from ..errors import ParameterError


def effective_jobs(n_jobs: int | None) -> int:
    cpus = os.cpu_count() or 1
    if n_jobs is None or n_jobs == 0:
        return cpus
    if n_jobs < 0:
        return max(1, cpus + 1 + n_jobs)
    return n_jobs


@contextmanager
def dask_backend(address: str | None):
    """joblib's dask backend on the dask.distributed scheduler at ``address`` (a new LocalCluster if None)."""
    try:
        from dask.distributed import Client
    except ImportError:
        raise ParameterError("`backend = 'dask'` needs dask.distributed: pip install 'simpower[dask]'.") from None
    import joblib

    client = Client(address) if address else Client(processes=True, dashboard_address=None)
    try:
        with joblib.parallel_config(backend="dask"):
            yield client
    finally:
        client.close()


def execute(fn: Callable, tasks: list[tuple], n_jobs: int | None = -1, backend: str | None = None,
            address: str | None = None) -> Iterator:
    """Yield ``fn(*task)`` for each task, in completion order.

    Parameters
    ----------
    fn : callable
        A module-level function (picklable).
    tasks : list of tuples
        Positional arguments of each call.
    n_jobs : int
        Workers; -1 means all cores. 1 runs serially in this process.
    backend : None, 'loky', 'threading', 'serial' or 'dask'
    address : str, optional
        The dask scheduler address (``tcp://host:8786``) for ``backend='dask'``.
    """
    if backend not in (None, "loky", "threading", "serial", "dask"):
        raise ParameterError(f"`backend` must be 'loky', 'threading', 'serial' or 'dask'; got {backend!r}.")
    if not tasks:
        return
    jobs = effective_jobs(n_jobs)
    if backend == "serial" or (backend != "dask" and (jobs == 1 or len(tasks) == 1)):
        for t in tasks:
            yield fn(*t)
        return
    from joblib import Parallel, delayed

    ctx = dask_backend(address) if backend == "dask" else nullcontext()
    with ctx:
        kw = {} if backend in (None, "dask") else {"backend": backend}
        par = Parallel(n_jobs=jobs if backend != "dask" else -1, return_as="generator_unordered", **kw)
        yield from par(delayed(fn)(*t) for t in tasks)
