"""Runs that grow: content keys, an in-memory chunk store, and stopping at a target MCSE.

Planning code runs the same grid point more than once with more replicates
(the required-n search comes back to its estimate; sequential stopping adds
replicates until the Monte Carlo SE is small enough). The engine's chunks are
prefix-stable, so a longer run extends a shorter one chunk for chunk; a
:class:`MemoryStore` keeps the finished chunks so that nothing is simulated
twice.

Every grid point is seeded by a *content key*, :func:`point_key`, derived from
the point's scenario fingerprint: the same parameters give the same random
numbers whichever command asked for them (sweep, search, sequential run), and
a run store shared by those commands can never hand one point's chunks to
another.

Sequential stopping follows Morris, White & Crowther (2019, Statistics in
Medicine 38:2074-2102, section 5.3): the MCSE of a rejection rate p after R
replicates is sqrt(p(1-p)/R), so R = p(1-p)/MCSE^2 replicates reach a target
MCSE; the run estimates p, extends to the R this implies, and repeats.
"""

from __future__ import annotations

import math
from typing import Sequence

from .._validation import Int, Real
from ..engine.progress import session as progress_session, status
from ..engine.runner import run_points
from ..execution import Execution, resolve
from ..engine.chunk import ChunkOutput
from ..engine.runner import default_chunk_size
from ..errors import ParameterError
from ..summaries import mcse_target_reps

#: chunk size of growing runs: fine enough that the final replicate count
#: overshoots its target by little, coarse enough to keep batches efficient
GROW_CHUNK = 500
#: default replicates before the first look, and the default ceiling
MIN_REPS = 1000
MAX_REPS = 100_000


def point_key(scenario) -> int:
    """The seed key of a grid point: the first 48 bits of its scenario fingerprint.

    Examples
    --------
    >>> import simpower as sp
    >>> sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest())
    >>> point_key(sc) == point_key(sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest()))
    True
    >>> point_key(sc) == point_key(sc.with_params(n=65))
    False
    """
    return scenario.point_key()


def grow_chunk_size(scenario, chunk_size: int | None = None) -> int:
    """The chunk size a growing run uses (``chunk_size`` if given)."""
    if chunk_size is not None:
        return int(Int(low=1).clean("chunk_size", chunk_size))
    return min(default_chunk_size(scenario), GROW_CHUNK)


class MemoryStore:
    """Finished chunks kept in memory, optionally in front of another store.

    Meets the engine's store protocol (``load`` / ``save``, and ``bind`` /
    ``flush`` passed on to the backing store). With a ``backing`` store (a
    :class:`~simpower.engine.store.RunStore`, or a path, opened here and
    closed by :meth:`close`) chunks found there are reused and new chunks are
    saved there too, so an interrupted search or sweep resumes where it
    stopped.
    """

    def __init__(self, backing=None):
        self.owned = False
        if isinstance(backing, (str, bytes)) or hasattr(backing, "__fspath__"):
            from ..engine.store import RunStore

            backing, self.owned = RunStore(backing), True
        self.backing = backing
        self._chunks: dict[tuple[int, int, int], ChunkOutput] = {}
        self.hits = 0
        self.simulated = 0

    @property
    def seed(self) -> int | None:
        """The backing store's seed (to resume a run started without one), else None."""
        return getattr(self.backing, "seed", None) if self.backing is not None else None

    def bind(self, point: int, scenario, seed: int, chunk_size: int, reps: int) -> None:
        if self.backing is not None and hasattr(self.backing, "bind"):
            self.backing.bind(point, scenario, seed, chunk_size, reps)

    def flush(self) -> None:
        if self.backing is not None and hasattr(self.backing, "flush"):
            self.backing.flush()

    def close(self) -> None:
        """Close the backing store if this object opened it."""
        if self.owned and self.backing is not None:
            self.backing.close()
            self.owned = False

    def load(self, point: int, chunk: int, size: int) -> ChunkOutput | None:
        out = self._chunks.get((point, chunk, size))
        if out is None and self.backing is not None:
            out = self.backing.load(point, chunk, size)
            if out is not None:
                self._chunks[(point, chunk, size)] = out
        if out is not None:
            self.hits += size
        return out

    def save(self, out: ChunkOutput) -> None:
        self._chunks[(out.point, out.chunk, out.size)] = out
        self.simulated += out.size
        if self.backing is not None:
            self.backing.save(out)


def as_memory_store(store) -> MemoryStore:
    """``store`` itself if it is a MemoryStore, else a MemoryStore in front of it (a path is opened)."""
    return store if isinstance(store, MemoryStore) else MemoryStore(store)


def seed_with_store(seed, mem: MemoryStore) -> int:
    """The run's entropy: ``seed``, else the backing store's (resuming), else fresh."""
    from ..engine.runner import normalize_seed

    return normalize_seed(seed if seed is not None or mem.seed is None else int(mem.seed))


#: keys of the old ``engine={...}`` mapping that are execution settings (the rest: ``labels``)
ENGINE_KEYS = ("backend", "address", "timeout", "keep_records")


def execution_of(execution: Execution | None, engine=None, **keywords) -> tuple[Execution, dict | None]:
    """(the call's Execution, point labels) from ``execution``, an old ``engine`` mapping and keyword arguments.

    ``engine`` (``backend``, ``address``, ``timeout``, ``keep_records``, and
    ``labels`` for messages) is the mapping planning calls took before
    :class:`~simpower.execution.Execution`; it keeps working.
    """
    eng = dict(engine or {})
    labels = eng.pop("labels", None)
    unknown = [k for k in eng if k not in ENGINE_KEYS]
    if unknown:
        raise ParameterError(f"`engine` has no setting `{unknown[0]}`; it takes {', '.join(ENGINE_KEYS)} "
                             f"(or give execution=Execution(...)).")
    return resolve(execution, **keywords, **eng), labels


def check_target_mcse(target_mcse) -> float:
    return Real(0.0, 0.5, low_open=True, high_open=True).clean("target_mcse", target_mcse)


def reps_for_mcse(rejections: int, reps: int, target_mcse: float) -> int:
    """Replicates a rate needs for MCSE <= ``target_mcse``, judged from ``rejections`` of ``reps``.

    The rate is estimated as (k + 1) / (R + 2), which keeps a run that has
    seen no rejection (or only rejections) from stopping at once with an MCSE
    of exactly 0.
    """
    p = (rejections + 1) / (reps + 2)
    return mcse_target_reps(p, target_mcse)


def _round_up(reps: int, chunk: int) -> int:
    return int(math.ceil(reps / chunk) * chunk)


def _needed(result, target_mcse: float, which: str) -> int:
    names = [result.primary] if which == "primary" else list(result.summaries)
    need = 0
    for name in names:
        s = result.summaries[name]
        need = max(need, reps_for_mcse(s["rejections"], s["n_ok"], target_mcse) + (s["reps"] - s["n_ok"]))
    return need


def _reached(result, target_mcse: float, which: str) -> bool:
    names = [result.primary] if which == "primary" else list(result.summaries)
    return all(result.summaries[n]["n_ok"] >= reps_for_mcse(result.summaries[n]["rejections"],
                                                            result.summaries[n]["n_ok"], target_mcse)
               for n in names)


def run_many_to_mcse(scenarios: Sequence, target_mcse: float = 0.005, *, max_reps: int = MAX_REPS,
                     min_reps: int = MIN_REPS, seed=None, n_jobs: int | None = -1, chunk_size: int | None = None,
                     store=None, progress: bool | None = None, fit_trouble: str = "failure",
                     which: str = "primary", keys: Sequence[int] | None = None, max_failure_rate: float = 0.5,
                     engine=None, execution: Execution | None = None):
    """Run each scenario until its power's MCSE reaches ``target_mcse`` (or ``max_reps``).

    All points still short of their target are extended together in one
    pool of workers. See :func:`run_to_mcse` for the parameters. Each result's
    ``extra["sequential"]`` says how many replicates it took, whether the
    target was reached, and the replicate counts of the looks.
    """
    target_mcse = check_target_mcse(target_mcse)
    max_reps = Int(low=1).clean("max_reps", max_reps)
    min_reps = Int(low=1).clean("min_reps", min_reps)
    if min_reps > max_reps:
        raise ParameterError(f"`min_reps` ({min_reps}) must not exceed `max_reps` ({max_reps}).")
    if which not in ("primary", "all"):
        raise ParameterError(f"`which` must be 'primary' or 'all'; got {which!r}.")
    ex, labels = execution_of(execution, engine, seed=seed, n_jobs=n_jobs, chunk_size=chunk_size, store=store,
                              progress=progress, fit_trouble=fit_trouble, max_failure_rate=max_failure_rate)
    scenarios = list(scenarios)
    keys = [point_key(s) for s in scenarios] if keys is None else list(keys)
    sizes = [grow_chunk_size(s, ex.chunk_size) for s in scenarios]
    mem = as_memory_store(ex.store)
    try:
        return _grow(scenarios, target_mcse, max_reps, min_reps, ex.replace(seed=seed_with_store(ex.seed, mem),
                     store=mem), sizes, which, keys, labels)
    finally:
        if mem is not ex.store:
            mem.close()


def _grow(scenarios, target_mcse, max_reps, min_reps, ex: Execution, sizes, which, keys, labels):
    reps = [min(_round_up(min_reps, cs), max_reps) for cs in sizes]
    results: list = [None] * len(scenarios)
    looks: list[list[int]] = [[] for _ in scenarios]
    todo = list(range(len(scenarios)))
    look = 0
    with progress_session(ex.progress, "extending"):
        while todo:
            look += 1
            status(f"look {look}, {len(todo)} point{'s' if len(todo) != 1 else ''} short of the target MCSE")
            groups: dict[int, list[int]] = {}
            for i in todo:
                groups.setdefault(sizes[i], []).append(i)
            for cs, idx in groups.items():
                outs = run_points([scenarios[i] for i in idx], [reps[i] for i in idx], ex.replace(chunk_size=cs),
                                  keys=[keys[i] for i in idx], desc="extending", labels=labels)
                for i, res in zip(idx, outs):
                    results[i] = res
                    looks[i].append(reps[i])
            nxt = []
            for i in todo:
                res = results[i]
                if _reached(res, target_mcse, which) or reps[i] >= max_reps:
                    continue
                # at most 4 times the current count per look: an estimate from few replicates can overshoot
                want = min(_round_up(_needed(res, target_mcse, which), sizes[i]), 4 * reps[i])
                want = min(max(want, reps[i] + sizes[i]), max_reps)
                reps[i] = want
                nxt.append(i)
            todo = nxt
    for i, res in enumerate(results):
        res.extra["sequential"] = {
            "target_mcse": target_mcse, "reached": bool(_reached(res, target_mcse, which)), "reps": res.reps,
            "looks": looks[i], "max_reps": max_reps, "min_reps": min_reps, "which": which,
            "chunk_size": sizes[i],
        }
    return results


def run_to_mcse(scenario, target_mcse: float = 0.005, *, max_reps: int = MAX_REPS, min_reps: int = MIN_REPS,
                seed=None, n_jobs: int | None = -1, chunk_size: int | None = None, store=None,
                progress: bool | None = None, fit_trouble: str = "failure", which: str = "primary",
                max_failure_rate: float = 0.5, engine=None, execution: Execution | None = None):
    """Simulate until the power's Monte Carlo SE is at most ``target_mcse``.

    Parameters
    ----------
    scenario : Scenario
    target_mcse : float in (0, 0.5)
        The MCSE asked for, e.g. 0.005.
    max_reps : int
        Never more replicates than this; the result says if the target was
        not reached.
    min_reps : int
        Replicates before the first look.
    seed : int >= 0, SeedSequence or None
    n_jobs : int
    chunk_size : int, optional
        Default :data:`GROW_CHUNK` (or smaller, the engine's own choice for
        processes without a batch path). The final count is a multiple of it
        (or ``max_reps``). Record it: the numbers are those of
        ``run(scenario, reps, seed=seed, chunk_size=chunk_size, point=point_key(scenario))``.
    store : run store, optional
        Finished chunks are reused from and saved to it.
    which : {'primary', 'all'}
        Whose MCSE must reach the target: the primary analysis, or every one.
    engine : mapping, optional
        Further keyword arguments for :func:`simpower.run_many` (``backend``,
        ``address``, ``timeout``, ``keep_records``); kept for old calls.
    execution : Execution, optional
        The execution settings (seed to chunk_size) as one value.

    Returns
    -------
    RunResult
        ``extra["sequential"]`` holds ``reps``, ``reached``, ``looks`` (the
        replicate counts at which the MCSE was judged) and the settings.

    Examples
    --------
    >>> import simpower as sp
    >>> sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest())
    >>> res = run_to_mcse(sc, 0.01, seed=3, n_jobs=1)
    >>> res.mcse <= 0.01, res.extra["sequential"]["reached"]
    (True, True)
    """
    return run_many_to_mcse([scenario], target_mcse, max_reps=max_reps, min_reps=min_reps, seed=seed,
                            n_jobs=n_jobs, chunk_size=chunk_size, store=store, progress=progress,
                            fit_trouble=fit_trouble, which=which, max_failure_rate=max_failure_rate,
                            engine=engine, execution=execution)[0]
