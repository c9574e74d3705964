"""Executors: run chunk tasks serially, on local cores (joblib/loky) or on a dask.distributed cluster.

We write no scheduler: each chunk is one task. Local parallelism is joblib's
(``loky`` worker processes by default, or ``threading``); ``n_jobs=1`` runs in
this process. ``backend="dask"`` submits the same tasks to a dask.distributed
cluster through dask's own API (``Client.submit`` with a bounded window of
tasks in flight, results taken with ``as_completed``), given the scheduler's
address, a ``Client``, or nothing (the current default client, else a
``LocalCluster`` started for the run). dask is imported lazily; its absence
gives an error that says what to install.

Results come back in completion order; the runner puts them in place, so the
numbers never depend on the executor (see :mod:`simpower.engine.chunk`).
"""

from __future__ import annotations

import os
import time
from itertools import islice
from typing import Any, Callable, Iterator

from ..errors import ParameterError, RunError

BACKENDS = ("loky", "threading", "serial", "dask")


def effective_jobs(n_jobs: int | None) -> int:
    """Worker count for ``n_jobs`` (None or 0: all cores; -1: all cores; -k: all but k - 1)."""
    cpus = os.cpu_count() or 1
    if n_jobs is None or n_jobs == 0:
        return cpus
    if n_jobs < 0:
        return max(1, cpus + 1 + n_jobs)
    return n_jobs


def check_backend(backend: str | None) -> str | None:
    if backend in (None, "local"):
        return None
    if backend not in BACKENDS:
        from ..errors import nearest

        raise ParameterError(f"`backend` must be one of 'loky', 'threading', 'serial', 'dask'; got {backend!r}."
                             + (nearest(str(backend), BACKENDS) if "Did" in nearest(str(backend), BACKENDS) else ""))
    return backend


def _import_distributed():
    try:
        import distributed
    except ImportError:
        raise ParameterError("`backend = 'dask'` needs dask.distributed: pip install 'simpower[dask]'.") from None
    return distributed


def dask_client(address: Any = None, n_jobs: int | None = -1):
    """(client, owned): a Client for ``address`` (a string, a Client, or None) and whether we made it."""
    distributed = _import_distributed()
    if isinstance(address, distributed.Client):
        return address, False
    if address:
        try:
            return distributed.Client(address), True  # connect timeout: dask's distributed.comm.timeouts.connect
        except (OSError, TimeoutError) as exc:
            raise RunError(f"cannot reach the dask scheduler at {address!r} ({type(exc).__name__}: {exc}); "
                           f"check the address (tcp://host:8786) and that the scheduler runs.") from None
    try:
        return distributed.get_client(), False
    except ValueError:
        pass
    cluster = distributed.LocalCluster(n_workers=effective_jobs(n_jobs), threads_per_worker=1,
                                       dashboard_address=None)
    client = distributed.Client(cluster)
    client._simpower_cluster = cluster  # closed with the client below
    return client, True


def _dask_results(fn: Callable, tasks: list[tuple], address, n_jobs) -> Iterator:
    distributed = _import_distributed()
    client, owned = dask_client(address, n_jobs)
    pending = []
    try:
        threads = sum(client.nthreads().values()) or 1
        window = max(2, 2 * threads)
        it = iter(tasks)
        pending = [client.submit(fn, *t, pure=False) for t in islice(it, window)]
        done = distributed.as_completed(pending)
        for fut in done:
            res = fut.result()
            pending.remove(fut)
            fut.release()
            nxt = next(it, None)
            if nxt is not None:
                new = client.submit(fn, *nxt, pure=False)
                pending.append(new)
                done.add(new)
            yield res
    finally:
        if pending:
            client.cancel(pending)
        if owned:
            cluster = getattr(client, "_simpower_cluster", None)
            client.close()
            if cluster is not None:
                cluster.close()


#: estimated cost (seconds) of starting a local worker pool and importing simpower in it
POOL_START_SECONDS = 1.0


def execute(fn: Callable, tasks: list[tuple], n_jobs: int | None = -1, backend: str | None = None,
            address: Any = None, probe: bool = False) -> Iterator:
    """Yield ``fn(*task)`` for each task, in completion order.

    Parameters
    ----------
    fn : callable
        A module-level function (picklable).
    tasks : list of tuples
        Positional arguments of each call.
    n_jobs : int
        Workers; -1 means all cores. 1 runs serially in this process (unless ``backend='dask'``).
    backend : None, 'loky', 'threading', 'serial' or 'dask'
    address : str or dask.distributed.Client, optional
        The dask scheduler (``tcp://host:8786``) for ``backend='dask'``.

    probe : bool
        Run the first task in this process and start a worker pool for the
        rest only if that is expected to save time (``POOL_START_SECONDS``
        against the remaining work spread over the workers). The runner asks
        for it for fast vectorised scenarios when ``n_jobs`` was left at its
        default; it changes where tasks run, never their numbers.

    Close the generator (or let it finish) to stop the workers early.
    """
    backend = check_backend(backend)
    if not tasks:
        return
    if backend == "dask":
        yield from _dask_results(fn, tasks, address, n_jobs)
        return
    jobs = effective_jobs(n_jobs)
    if backend == "serial" or jobs == 1 or len(tasks) == 1:
        for t in tasks:
            yield fn(*t)
        return
    if probe:
        t0 = time.perf_counter()
        yield fn(*tasks[0])
        first = time.perf_counter() - t0
        tasks = tasks[1:]
        rest = first * len(tasks)
        if rest - (POOL_START_SECONDS + rest / min(jobs, len(tasks))) <= 0:
            for t in tasks:
                yield fn(*t)
            return
    from joblib import Parallel, delayed

    par = Parallel(n_jobs=min(jobs, len(tasks)), backend=backend or "loky", return_as="generator_unordered")
    gen = par(delayed(fn)(*t) for t in tasks)
    try:
        yield from gen
    finally:
        gen.close()
