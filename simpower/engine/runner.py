"""Plan and run: chunks, seeds, executor, progress, failure threshold, store hooks.

The plan fixes the chunk size from the scenario (never from ``n_jobs``):
:data:`BATCH_CHUNK` replicates when the process draws batches, else
:data:`LOOP_CHUNK`. Chunk k of point g covers replicates
``[k * chunk_size, min(reps, (k + 1) * chunk_size))`` and is seeded by
``SeedSequence(seed, spawn_key=(g, k))``; so runs with the same seed agree
whatever the number of jobs or the executor, and a longer run extends a
shorter one chunk for chunk.
"""

from __future__ import annotations

import math
import sys
import time
from dataclasses import dataclass
from typing import Any, Protocol, Sequence

import numpy as np

from ..errors import ParameterError, RunError
from ..result import Records, RunResult
from .chunk import ChunkOutput, run_chunk
from .executor import effective_jobs, execute

BATCH_CHUNK = 2000
LOOP_CHUNK = 200


class ChunkStore(Protocol):
    """What the engine needs of a run store (see :mod:`simpower.engine.store`)."""

    def load(self, point: int, chunk: int, size: int) -> ChunkOutput | None: ...

    def save(self, out: ChunkOutput) -> None: ...


class RunInterrupted(RunError):
    """The run was interrupted (Ctrl-C); finished chunks were kept."""


def normalize_seed(seed: Any) -> int:
    """The entropy integer of a seed-like input (None draws fresh entropy)."""
    if seed is None:
        return int(np.random.SeedSequence().entropy)
    if isinstance(seed, np.random.SeedSequence):
        if seed.spawn_key:
            raise ParameterError("`seed` must be a root SeedSequence (no spawn_key) or an integer >= 0.")
        return int(seed.entropy)
    if isinstance(seed, str) and seed.strip().isdigit():
        seed = int(seed.strip())
    if isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0:
        return int(seed)
    raise ParameterError(f"`seed` must be an integer >= 0; got {seed!r}.")


def default_chunk_size(scenario) -> int:
    return BATCH_CHUNK if scenario.process.has_batch else LOOP_CHUNK


def plan_chunks(reps: int, chunk_size: int) -> list[tuple[int, int]]:
    """(chunk index, size) pairs covering ``reps`` replicates."""
    n = math.ceil(reps / chunk_size)
    return [(k, min(chunk_size, reps - k * chunk_size)) for k in range(n)]


@dataclass
class _Point:
    scenario: Any
    reps: int
    key: int
    arrays: dict
    causes: list
    messages: dict
    paths: dict
    hyp: dict
    chunk_seconds: float = 0.0
    done: int = 0
    failed: int = 0


def _merge(pt: _Point, out: ChunkOutput, chunk_size: int) -> None:
    start = out.chunk * chunk_size
    stop = start + out.size
    remap = np.zeros(len(out.causes) + 1, np.int16)
    for j, cause in enumerate(out.causes, start=1):
        if cause not in pt.causes:
            pt.causes.append(cause)
            pt.messages[cause] = out.messages.get(cause, "")
        remap[j] = pt.causes.index(cause) + 1
    for name, rec in out.records.items():
        arr = pt.arrays[name]
        for f, v in rec.items():
            if f == "status":
                arr["status"][start:stop] = remap[v]
            elif f == "pvalues":
                if "pvalues" not in arr:
                    arr["pvalues"] = np.full((pt.reps, v.shape[1]), np.nan)
                arr["pvalues"][start:stop, : v.shape[1]] = v
            else:
                arr[f][start:stop] = v
        pt.failed += int(np.count_nonzero(rec["status"] > 0))
    for name, p in out.paths.items():
        pt.paths.setdefault(name, p)
    for name, h in out.hypotheses.items():
        pt.hyp.setdefault(name, h)
    pt.chunk_seconds += out.seconds
    pt.done += out.size


def _hard_failures(out: ChunkOutput) -> int:
    worst = 0
    for rec in out.records.values():
        bad = rec["status"] > 0
        for j, cause in enumerate(out.causes, start=1):
            if cause.startswith("warning:"):
                bad &= rec["status"] != j
        worst = max(worst, int(bad.sum()))
    return worst


def _progress(total: int, enabled: bool | None, desc: str):
    if enabled is None:
        enabled = sys.stderr.isatty()
    from tqdm import tqdm

    return tqdm(total=total, disable=not enabled, file=sys.stderr, unit="rep", desc=desc, leave=False,
                dynamic_ncols=True)


def run_many(scenarios: Sequence, reps: int | Sequence[int], *, seed=None, n_jobs: int | None = -1,
             chunk_size: int | None = None, progress: bool | None = None, fit_trouble: str = "failure",
             backend: str | None = None, address: str | None = None, store: ChunkStore | None = None,
             max_failure_rate: float = 0.5, keys: Sequence[int] | None = None,
             desc: str = "simulating") -> list[RunResult]:
    """Run several scenarios (grid points) with one pool of workers.

    Point ``i`` uses seed key ``keys[i]`` (default ``i``). See :func:`run`.
    """
    entropy = normalize_seed(seed)
    if fit_trouble not in ("failure", "nonrejection"):
        raise ParameterError(f"`fit_trouble` must be 'failure' or 'nonrejection'; got {fit_trouble!r}.")
    if not (0 < max_failure_rate <= 1):
        raise ParameterError(f"`max_failure_rate` must be in (0, 1]; got {max_failure_rate}.")
    scenarios = list(scenarios)
    reps_list = [reps] * len(scenarios) if np.ndim(reps) == 0 else list(reps)
    for r in reps_list:
        if isinstance(r, bool) or not isinstance(r, (int, np.integer)) or r < 1:
            raise ParameterError(f"`reps` must be an integer >= 1; got {r!r}.")
    keys = list(range(len(scenarios))) if keys is None else list(keys)
    if chunk_size is not None and (not isinstance(chunk_size, (int, np.integer)) or chunk_size < 1):
        raise ParameterError(f"`chunk_size` must be an integer >= 1; got {chunk_size!r}.")
    sizes = [chunk_size or default_chunk_size(s) for s in scenarios]

    points = []
    tasks = []
    for sc, r, key, cs in zip(scenarios, reps_list, keys, sizes):
        arrays = {name: {f: np.full(r, np.nan) for f in ("pvalue", "estimate", "se", "ci_low", "ci_high")}
                  for name in sc.analyses}
        for a in arrays.values():
            a["status"] = np.zeros(r, np.int16)
        pt = _Point(sc, int(r), int(key), arrays, [], {}, {}, {})
        points.append(pt)
        for k, size in plan_chunks(int(r), cs):
            cached = store.load(key, k, size) if store is not None else None
            if cached is not None:
                _merge(pt, cached, cs)
            else:
                tasks.append((sc, entropy, int(key), k, size))
    by_key = {pt.key: (pt, cs) for pt, cs in zip(points, sizes)}
    total = sum(t[4] for t in tasks)
    t0 = time.perf_counter()
    bar = _progress(total, progress, desc)
    try:
        for out in execute(run_chunk, tasks, n_jobs=n_jobs, backend=backend, address=address):
            pt, cs = by_key[out.point]
            if store is not None:
                store.save(out)
            _merge(pt, out, cs)
            bar.update(out.size)
            if pt.failed > max_failure_rate * pt.done * len(pt.arrays) and pt.done >= min(pt.reps, 100):
                worst = _hard_failures(out)
                if worst > max_failure_rate * out.size:
                    first = next(iter(pt.messages.items()), ("", ""))
                    raise RunError(
                        f"stopped: more than {max_failure_rate:.0%} of replicates failed "
                        f"(first {first[0]}: {first[1]}); fix the analysis or raise `max_failure_rate`."
                    )
    except KeyboardInterrupt:
        raise RunInterrupted("interrupted; finished chunks were kept" + (" in the store" if store else "")) from None
    finally:
        bar.close()
    seconds = time.perf_counter() - t0
    results = []
    for pt, cs in zip(points, sizes):
        recs = {name: Records(a["pvalue"], a["estimate"], a["se"], a["ci_low"], a["ci_high"], a["status"],
                              list(pt.causes), dict(pt.messages), a.get("pvalues"), pt.hyp.get(name, []))
                for name, a in pt.arrays.items()}
        results.append(RunResult(pt.scenario, pt.reps, entropy, cs, recs, pt.paths, seconds, fit_trouble,
                                 n_jobs=effective_jobs(n_jobs), backend=backend, point=pt.key,
                                 chunk_seconds=pt.chunk_seconds))
    return results


def run(scenario, reps: int = 1000, *, seed=None, n_jobs: int | None = -1, chunk_size: int | None = None,
        progress: bool | None = None, fit_trouble: str = "failure", backend: str | None = None,
        address: str | None = None, store: ChunkStore | None = None, max_failure_rate: float = 0.5,
        point: int = 0) -> RunResult:
    """Simulate ``reps`` replicates of ``scenario`` and summarise them.

    Parameters
    ----------
    scenario : Scenario
    reps : int >= 1
    seed : int >= 0, SeedSequence or None
        None draws fresh entropy; the result records it (``result.seed``).
    n_jobs : int
        Worker processes; -1 (default) uses all cores.
    chunk_size : int, optional
        Replicates per task; defaults to the plan's choice for the scenario.
    progress : bool, optional
        Progress bar on stderr; default on only when stderr is a terminal.
    fit_trouble : {'failure', 'nonrejection'}
        What replicates whose analysis warned (non-convergence, singular fit)
        count as; the result shows both figures either way.
    backend : {None, 'loky', 'serial', 'threading', 'dask'}
    address : str, optional
        dask scheduler address for ``backend='dask'``.
    store : run store, optional
        Finished chunks are saved there and reused on a rerun.
    max_failure_rate : float in (0, 1]
        Stop with an error once more than this share of replicates fail.

    Examples
    --------
    >>> import simpower as sp
    >>> sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest())
    >>> res = sp.run(sc, reps=2000, seed=1, n_jobs=1)
    >>> abs(res.power - 0.80) < 4 * res.mcse   # Cohen (1988): n = 64 per arm gives 80% power
    True
    """
    return run_many([scenario], reps, seed=seed, n_jobs=n_jobs, chunk_size=chunk_size, progress=progress,
                    fit_trouble=fit_trouble, backend=backend, address=address, store=store,
                    max_failure_rate=max_failure_rate, keys=[point])[0]
