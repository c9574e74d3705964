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

Tasks may be a lazy iterable (the runner never lists every chunk). Local
processes come from loky's reusable executor with a bounded window of tasks in
flight, so when a worker dies (a segfault, ``os._exit``: loky's
``TerminatedWorkerError``) the runner knows which chunks were lost: they and
the rest of the run go to ``fallback`` (the crash-isolating helper of
:mod:`simpower.engine.guard`), which finds the replicate that killed its
process and records it as a crash. A dask task that killed its workers
(``KilledWorker``) is redone the same way. Loky workers exit when the main
process dies (:func:`simpower.engine.guard.worker_init`).
"""

from __future__ import annotations

import os
import time
from itertools import chain, islice
from typing import Any, Callable, Iterable, Iterator

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


#: joblib backend classes -> the executor simpower runs chunks on under them (others: joblib's Parallel itself)
_CONTEXT = {"SequentialBackend": "serial", "ThreadingBackend": "threading", "LokyBackend": None,
            "DaskDistributedBackend": "dask"}


def context_backend() -> tuple[str | None, Any, int | None]:
    """(backend, address, n_jobs) of joblib's current context (``joblib.parallel_config``) for ``backend=None``.

    Read with joblib's public ``get_active_backend()``, which returns the
    backend a ``joblib.Parallel`` would use here: outside any context its
    default (loky), mapped to simpower's default (loky workers with crash
    isolation); ``"sequential"`` to 'serial', ``"threading"`` to 'threading',
    ``"dask"`` to 'dask' on the context's client; any other backend (e.g.
    'multiprocessing', or one registered by the caller) to 'joblib', which
    runs the chunks with ``joblib.Parallel`` inside that context. ``n_jobs``
    is the context's, or None when it sets none.
    """
    from joblib.parallel import get_active_backend

    active, n_jobs = get_active_backend()
    name = type(active).__name__
    if name not in _CONTEXT:
        return "joblib", None, n_jobs
    backend = _CONTEXT[name]
    address = getattr(active, "client", None) if backend == "dask" else None
    return backend, address, n_jobs


def check_backend(backend: str | None) -> str | None:
    if backend in (None, "local"):
        return None
    if backend == "joblib":  # internal: the caller's joblib context (see context_backend)
        return backend
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


def _lost(task: tuple, why: str) -> RunError:
    where = f"chunk {task[3]} of grid point {task[2]}" if len(task) >= 5 else "a task"
    return RunError(f"a worker process died ({why}) while running {where}, and crashes cannot be isolated here "
                    f"(it needs Linux); find the replicate with backend='serial' or fix the analysis.")


def _dask_results(fn: Callable, tasks: Iterable[tuple], address, n_jobs, fallback) -> Iterator:
    distributed = _import_distributed()
    client, owned = dask_client(address, n_jobs)
    pending = {}
    try:
        threads = sum(client.nthreads().values()) or 1
        window = max(2, 2 * threads)
        it = iter(tasks)
        pending = {client.submit(fn, *t, pure=False): t for t in islice(it, window)}
        done = distributed.as_completed(list(pending))
        for fut in done:
            task = pending.pop(fut)
            try:
                res = fut.result()
            except distributed.KilledWorker as exc:  # the task killed every worker that ran it
                if fallback is None:
                    raise _lost(task, f"dask KilledWorker: {exc}") from None
                res = None
            fut.release()
            nxt = next(it, None)
            if nxt is not None:
                new = client.submit(fn, *nxt, pure=False)
                pending[new] = nxt
                done.add(new)
            if res is None:
                yield from fallback([task])
            else:
                yield res
    finally:
        if pending:
            client.cancel(list(pending))
        if owned:
            cluster = getattr(client, "_simpower_cluster", None)
            client.close()
            if cluster is not None:
                cluster.close()


#: estimated cost (seconds) of starting a local worker pool and importing simpower in it
POOL_START_SECONDS = 1.0
#: estimated cost (seconds) of handing work to a pool that is already running (warm workers)
WARM_POOL_SECONDS = 0.05
#: seconds an idle loky worker waits for work before it exits (joblib's default)
IDLE_WORKER_SECONDS = 300
#: (workers, time.monotonic() when the pool last finished work) of this process's loky pool
_last_pool: tuple[int, float] | None = None


def pool_start_seconds(jobs: int) -> float:
    """What starting ``jobs`` local workers is expected to cost now: little when the pool of the previous run
    (a search's earlier round, a sweep's earlier point) is still alive with the same size, else a cold start."""
    if _last_pool is not None:
        size, when = _last_pool
        if size == jobs and time.monotonic() - when < IDLE_WORKER_SECONDS - 30:
            return WARM_POOL_SECONDS
    return POOL_START_SECONDS


def _worker_env(jobs: int) -> dict:
    """Thread limits of the workers' numerical libraries, as joblib's loky backend sets them."""
    try:
        from joblib._parallel_backends import LokyBackend

        return LokyBackend()._prepare_worker_env(n_jobs=jobs)
    except Exception:  # a joblib without this helper: the libraries' own defaults
        return {}


def _loky_results(fn: Callable, tasks: Iterator[tuple], jobs: int, fallback) -> Iterator:
    """Run tasks on loky workers, at most ``2 * jobs`` in flight; hand lost ones to ``fallback``."""
    from concurrent.futures import FIRST_COMPLETED, wait

    from joblib.externals.loky import get_reusable_executor
    from joblib.externals.loky.process_executor import BrokenProcessPool

    from .guard import worker_init

    executor = get_reusable_executor(max_workers=jobs, timeout=IDLE_WORKER_SECONDS, initializer=worker_init,
                                     initargs=(os.getpid(),), env=_worker_env(jobs))
    running: dict = {}
    try:
        for t in islice(tasks, 2 * jobs):
            running[executor.submit(fn, *t)] = t
        while running:
            done, _ = wait(list(running), return_when=FIRST_COMPLETED)
            lost = []
            for fut in done:
                t = running.pop(fut)
                try:
                    res = fut.result()
                except BrokenProcessPool as exc:  # a worker died: every chunk in flight is lost
                    lost.append((t, str(exc).splitlines()[-1] if str(exc) else type(exc).__name__))
                    continue
                yield res
            if lost:
                lost += [(running.pop(f), "") for f in list(running)]
                if fallback is None:
                    raise _lost(lost[0][0], lost[0][1] or "worker terminated")
                executor.shutdown(wait=False, kill_workers=True)
                # the lost chunks and the rest of the run go to the crash-isolating helper
                yield from fallback(chain((t for t, _ in lost), tasks))
                return
            for t in islice(tasks, len(done)):
                running[executor.submit(fn, *t)] = t
    finally:
        for fut in running:
            fut.cancel()
        global _last_pool
        _last_pool = (jobs, time.monotonic())


def execute(fn: Callable, tasks: Iterable[tuple], n_jobs: int | None = -1, backend: str | None = None,
            address: Any = None, probe: bool = False, n_tasks: int | None = None,
            fallback: Callable[[Iterable[tuple]], Iterator] | None = None) -> Iterator:
    """Yield ``fn(*task)`` for each task, in completion order.

    Parameters
    ----------
    fn : callable
        A module-level function (picklable).
    tasks : iterable of tuples
        Positional arguments of each call (may be lazy).
    n_jobs : int
        Workers; -1 means all cores. 1 runs serially in this process (unless ``backend='dask'``).
    backend : None, 'loky', 'threading', 'serial' or 'dask'
    address : str or dask.distributed.Client, optional
        The dask scheduler (``tcp://host:8786``) for ``backend='dask'``.
    probe : bool
        Run the first task in this process and start a worker pool for the
        rest only if that is expected to save time (:func:`pool_start_seconds`,
        small when the previous run's pool is still warm, against the
        remaining work spread over the workers). The runner asks for it for
        fast vectorised scenarios on local workers, whatever ``n_jobs`` says;
        it changes where tasks run, never their numbers.
    n_tasks : int, optional
        How many tasks there are (when ``tasks`` is lazy); None counts a list.
    fallback : callable, optional
        ``fallback(tasks) -> results`` for tasks lost with a worker process
        (loky, dask); None raises a RunError then.

    Close the generator (or let it finish) to stop the workers early.
    """
    backend = check_backend(backend)
    if n_tasks is None:
        tasks = list(tasks)
        n_tasks = len(tasks)
    if not n_tasks:
        return
    it = iter(tasks)
    if backend == "dask":
        yield from _dask_results(fn, it, address, n_jobs, fallback)
        return
    jobs = effective_jobs(n_jobs)
    if backend == "serial" or jobs == 1 or n_tasks == 1:
        for t in it:
            yield fn(*t)
        return
    if probe:
        t0 = time.perf_counter()
        yield fn(*next(it))
        first = time.perf_counter() - t0
        n_tasks -= 1
        if not n_tasks:
            return
        rest = first * n_tasks
        start = pool_start_seconds(min(jobs, n_tasks)) if backend is None else POOL_START_SECONDS
        if rest - (start + rest / min(jobs, n_tasks)) <= 0:
            for t in it:
                yield fn(*t)
            return
    if backend in ("threading", "joblib"):
        from joblib import Parallel, delayed

        # 'joblib': the caller's joblib context (parallel_config) picks the backend
        kind = {"backend": "threading"} if backend == "threading" else {}
        par = Parallel(n_jobs=min(jobs, n_tasks), return_as="generator_unordered", **kind)
        gen = par(delayed(fn)(*t) for t in it)
        try:
            yield from gen
        finally:
            gen.close()
        return
    yield from _loky_results(fn, it, min(jobs, n_tasks), fallback)
