"""Plan and run: chunks, seeds, executor, progress, failure policy, run store, resume.

Reproducibility promise. The plan fixes the chunk size from the scenario
(never from ``n_jobs``): :data:`BATCH_CHUNK` replicates when the process draws
batches, else :data:`LOOP_CHUNK`. Chunk k of grid point g covers replicates
``[k * chunk_size, min(reps, (k + 1) * chunk_size))`` and is seeded by
``SeedSequence(seed, spawn_key=(g, k))``; its numbers depend only on (seed,
point key, chunk index, chunk size). So runs with the same seed agree whatever
the number of jobs or the executor (serial, loky, dask), a longer run extends a
shorter one chunk for chunk, and a run resumed from a store equals an
uninterrupted one bit for bit (failure codes included: causes are numbered by
first appearance in chunk order, see :mod:`simpower.engine.collect`).

Run store. With ``store=`` (a path or a store object with ``load``/``save``)
every finished chunk is saved as it arrives and stored chunks are reused. A
path opens a :class:`~simpower.engine.store.RunStore`, which checks each grid
point's scenario fingerprint, seed and chunk size and refuses a mismatch. When
``seed`` is None and the store already holds a run, its seed is reused, so the
same call resumes.

Failure policy. A failing replicate never stops a chunk. After each chunk the
runner checks, per grid point and analysis, the share of replicates with a
*hard* failure (an exception, a non-finite or invalid p-value, a timeout, a
crash, a failed draw; fit-trouble warnings are not counted): once at least ``min(reps, 100)``
replicates are in and that share exceeds ``max_failure_rate``, the run stops
with a :class:`~simpower.errors.RunError` naming the causes and the first
message of each. Finished chunks stay in the store.

Memory. ``keep_records=False`` keeps only per-chunk tallies
(:mod:`simpower.summaries`) instead of per-replicate arrays; it is the
default above :data:`KEEP_RECORDS_LIMIT` replicates per point. Between
:data:`RECORDS_IN_MEMORY` replicate-records and that limit, the default keeps
the tallies and spools the records to disk (:mod:`simpower.engine.spool`).
So memory is bounded by the chunk size, not the total.

Sizes are checked before memory is used. ``reps`` is at most :data:`MAX_REPS`
per grid point; chunks are planned lazily (no list of every chunk); and
before drawing anything the runner estimates the memory one replicate and
one chunk of a built-in process need (values per replicate, extrapolated from
two small draws in the process's size parameter, times 8 bytes, times
:data:`MEMORY_FACTOR` for the analyses' working copies) and refuses, in one
line naming the field, what exceeds the memory available
(``/proc/meminfo`` MemAvailable, or the cgroup limit if lower).

Crashes. A replicate that kills its process (a segfault in a user analysis)
is counted as failure ``crash`` and the run goes on; see
:mod:`simpower.engine.guard` for where chunks run to make that possible.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Sequence as _SequenceABC
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import Any, Iterator, Mapping, Protocol, Sequence

import numpy as np

from ..execution import Execution, resolve
from ..errors import ParameterError, RunError
from ..result import MissingRecords, RunResult
from ..summaries import WARNING_PREFIX, PointStats
from .chunk import ChunkOutput, run_chunk
from .collect import CauseBook, RecordCollector
from . import guard
from .executor import context_backend, effective_jobs, execute, pool_start_seconds
from .progress import display as progress_display
from .spool import RecordSpool

BATCH_CHUNK = 2000
#: replicates per chunk when an analysis runs replicate by replicate: small enough that a 300-replicate
#: run spreads over two workers in six chunks (not 200 + 100) and a store commits every few seconds,
#: large enough that a chunk's fixed cost (seeding, statistics, a store row) stays below a percent
LOOP_CHUNK = 50
#: above this many replicates per point, records are not kept unless asked (summaries stream)
KEEP_RECORDS_LIMIT = 1_000_000
#: records of at most this many replicates x analyses per point are held in memory; larger
#: points (up to KEEP_RECORDS_LIMIT replicates) spool them to disk (simpower.engine.spool)
#: and summarise from streaming tallies, so memory stays flat in reps
RECORDS_IN_MEMORY = 25_000
#: replicates a point needs before the failure threshold is applied
MIN_FOR_STOP = 100
#: most replicates per grid point: a run store holds about 42 bytes per replicate and analysis
#: (42 GB at this cap), and one run of them takes hours even on the fastest vectorised path
MAX_REPS = 10**9
#: the memory estimate of a chunk counts its data this many times (the data plus the analyses' copies)
MEMORY_FACTOR = 4
#: bytes of one replicate's record of one analysis held in memory (six float64 fields + int16 status)
RECORD_BYTES = 6 * 8 + 2
#: below this size (the process's size parameter) no memory estimate is made
SIZE_CHECK_FROM = 10_000


class ChunkStore(Protocol):
    """What the engine needs of a run store (see :mod:`simpower.engine.store`).

    A store may also offer ``bind(point, scenario, seed, chunk_size, reps)``
    (check or record a grid point) and a ``seed`` attribute (the stored seed);
    the runner uses them when present.
    """

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


#: at most this many simulated values per per-replicate array of a batch chunk (32 MB of float64)
MAX_CHUNK_VALUES = 4_000_000


def default_chunk_size(scenario) -> int:
    """The plan's chunk size: a function of the scenario only (never of ``n_jobs`` or the seed).

    :data:`LOOP_CHUNK` when any analysis runs replicate by replicate (so slow fits
    spread over the workers and the store, progress bar and failure threshold
    update often); else :data:`BATCH_CHUNK`, capped so that one chunk holds at
    most :data:`MAX_CHUNK_VALUES` values per array (large n: memory stays
    bounded). The layout is read from one replicate drawn with a fixed
    generator, which does not touch the run's random numbers.
    """
    process = scenario.process
    if not process.has_batch or not all(a.has_batch for a in scenario.analyses.values()):
        return LOOP_CHUNK
    try:
        one = process.draw_batch(np.random.default_rng(0), 1)
    except Exception:
        return BATCH_CHUNK
    for a in scenario.analyses.values():
        try:
            ok = a.supports_batch(one)
        except Exception:
            ok = False
        if not ok:
            return LOOP_CHUNK
    values = max((int(np.size(v)) for v in one.per_rep.values()), default=1)
    return int(max(1, min(BATCH_CHUNK, MAX_CHUNK_VALUES // max(values, 1))))


class ChunkPlan(_SequenceABC):
    """The chunks of one grid point as a lazy sequence of (chunk index, size) pairs."""

    def __init__(self, reps: int, chunk_size: int):
        self.reps, self.chunk_size = int(reps), int(chunk_size)

    def __len__(self) -> int:
        return -(-self.reps // self.chunk_size)

    def __getitem__(self, k):
        if isinstance(k, slice):
            return [self[i] for i in range(*k.indices(len(self)))]
        n = len(self)
        if k < 0:
            k += n
        if not 0 <= k < n:
            raise IndexError(k)
        return (k, min(self.chunk_size, self.reps - k * self.chunk_size))

    def __eq__(self, other) -> bool:
        if isinstance(other, (ChunkPlan, list, tuple)):
            return len(self) == len(other) and all(a == tuple(b) for a, b in zip(self, other))
        return NotImplemented

    def __repr__(self) -> str:
        return f"ChunkPlan(reps={self.reps}, chunk_size={self.chunk_size})"


def plan_chunks(reps: int, chunk_size: int) -> ChunkPlan:
    """(chunk index, size) pairs covering ``reps`` replicates (a lazy sequence: nothing is listed)."""
    return ChunkPlan(reps, chunk_size)


def available_memory() -> int | None:
    """Bytes of memory available now: MemAvailable of /proc/meminfo, or the cgroup's room if smaller."""
    avail = None
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    avail = int(line.split()[1]) * 1024
                    break
    except (OSError, ValueError, IndexError):
        pass
    try:
        with open("/sys/fs/cgroup/memory.max") as f:
            limit = f.read().strip()
        if limit != "max":
            with open("/sys/fs/cgroup/memory.current") as f:
                room = int(limit) - int(f.read().strip())
            avail = room if avail is None else min(avail, room)
    except (OSError, ValueError):
        pass
    return avail


def _gib(nbytes: float) -> str:
    return f"{nbytes / 2**30:.3g} GiB"


def _values_of_one(process) -> int:
    one = process.draw_batch(np.random.default_rng(0), 1)
    return sum(int(np.size(v)) for v in one.per_rep.values()) + sum(int(np.size(v)) for v in one.shared.values())


def values_per_replicate(process) -> tuple[str, Any, float] | None:
    """(size field, its value, values in one replicate) of a large built-in batch process, else None.

    The count is extrapolated linearly from two small draws in the size
    parameter (exact for layouts whose rows grow linearly with it), so nothing
    of the real size is drawn.
    """
    field_ = getattr(process, "size_param", None)
    if not process.has_batch or not guard.is_builtin(process) or not field_:
        return None
    try:
        n = process.get_params(deep=False)[field_]
    except (KeyError, AttributeError):
        return None
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n <= SIZE_CHECK_FROM:
        return None
    for lo, hi in ((2, 4), (4, 8), (10, 20), (50, 100)):
        try:
            a, b = _values_of_one(process.replace(**{field_: lo})), _values_of_one(process.replace(**{field_: hi}))
        except Exception:  # a size the process refuses: try larger ones
            continue
        return field_, n, a + (b - a) / (hi - lo) * (int(n) - lo)
    return None


def check_memory(scenario, reps: int, chunk_size: int | None, jobs: int, keep_records: bool | None) -> None:
    """Refuse, in one line naming the field, a scenario whose chunk or records cannot fit in memory."""
    avail = available_memory()
    if avail is None:
        return
    if keep_records is True:
        need = reps * len(scenario.analyses) * RECORD_BYTES
        if need > avail:
            raise ParameterError(f"`reps` = {reps} with `keep_records=True` needs about {_gib(need)} of memory for "
                                 f"the records; {_gib(avail)} is available. Leave `keep_records` unset (records "
                                 f"are then spooled to disk or kept in the store) or lower `reps`.")
    est = values_per_replicate(scenario.process)
    if est is None:
        return
    field_, n, values = est
    one = values * 8 * MEMORY_FACTOR
    if one > avail:
        raise ParameterError(f"`{field_}` = {n} is too large: one replicate holds about {values:.3g} values "
                             f"({_gib(values * 8)}; about {_gib(one)} with the analyses' working copies) and "
                             f"{_gib(avail)} of memory is available; lower `{field_}`.")
    if chunk_size is not None and one * chunk_size * jobs > avail:
        raise ParameterError(f"`chunk_size` = {chunk_size} is too large for `{field_}` = {n}: {jobs} chunk(s) at a "
                             f"time need about {_gib(one * chunk_size * jobs)} and {_gib(avail)} of memory is "
                             f"available; lower `chunk_size` (or `n_jobs`), or leave it to the plan.")


@dataclass
class _Point:
    scenario: Any
    reps: int
    key: int
    chunk_size: int
    collector: RecordCollector | None
    stats: PointStats
    paths: dict = field(default_factory=dict)
    chunk_seconds: float = 0.0
    done: int = 0
    hard: dict = field(default_factory=dict)
    counts: dict = field(default_factory=dict)
    #: streaming mode only: the causes and hypothesis labels seen so far
    stream_book: CauseBook | None = None
    hyp: dict = field(default_factory=dict)
    #: streaming mode, records spooled to disk
    spool: RecordSpool | None = None
    #: the point's parameters in words for messages ("n = 48, icc = 0.05"); "" for a single run
    label: str = ""

    def add(self, out: ChunkOutput) -> None:
        chunk_stats = self.stats.add(out)
        if self.collector is not None:
            self.collector.add(out, out.chunk * self.chunk_size)
        else:
            table = self.stream_book.remap(out)
            for name, h in out.hypotheses.items():
                self.hyp.setdefault(name, h)
            if self.spool is not None:
                self.spool.add(out, out.chunk * self.chunk_size, table)
        # failure counts come from the chunk's statistics (the one place they are counted)
        for name, t in chunk_stats.items():
            per = self.counts.setdefault(name, {})
            for cause, k in t.counts.items():
                per[cause] = per.get(cause, 0) + k
            if t.n_hard:
                self.hard[name] = self.hard.get(name, 0) + t.n_hard
        for name, p in out.paths.items():
            self.paths.setdefault(name, p)
        self.chunk_seconds += out.seconds
        self.done += out.size

    @property
    def book(self) -> CauseBook:
        return self.collector.book if self.collector is not None else self.stream_book


def _check_failures(pt: _Point, limit: float, store) -> None:
    """Raise RunError once a point's share of hard failures exceeds ``limit``."""
    if pt.done < min(pt.reps, MIN_FOR_STOP) or not pt.hard:
        return
    name, worst = max(pt.hard.items(), key=lambda kv: kv[1])
    if worst <= limit * pt.done:
        return
    book = pt.book
    causes = {c: n for c, n in pt.counts.get(name, {}).items() if not c.startswith(WARNING_PREFIX)}
    # a process that fails to draw the data fails every analysis of that replicate ("process:<Type>")
    drawn = {c: n for c, n in causes.items() if c.startswith(PROCESS_PREFIX)}
    if sum(drawn.values()) > limit * pt.done:
        part, count, causes = f"the process `{part_label(pt.scenario.process)}`", sum(drawn.values()), drawn
        failed, fix = "failed to draw the data", "Fix the process"
    else:
        part, count, failed = f"the analysis `{name}`", worst, "failed"
        fix = f"Fix the analysis (and the process `{part_label(pt.scenario.process)}`)" if drawn else \
            "Fix the analysis"
    shown = ", ".join(f"{c} x{n}" for c, n in sorted(causes.items(), key=lambda kv: -kv[1]))
    first = "; ".join(f"first {c}: {book.messages.get(c, '')}" for c in list(causes)[:3])
    place = _kept_in(store)
    kept = f" Finished chunks are kept in {place}." if place else ""
    at = f" at {pt.label}" if pt.label else ""
    raise RunError(f"stopped: {part} {failed} on {count} of {pt.done} replicates{at} "
                   f"({count / pt.done:.1%} > max_failure_rate {limit:g}): {shown} ({first}). {fix} "
                   f"or raise `max_failure_rate` (--max-failure-rate).{kept}")


#: cause prefix of a replicate whose data could not be drawn (see :mod:`simpower.engine.chunk`)
PROCESS_PREFIX = "process:"


def part_label(component) -> str:
    """How messages name a process or an analysis: its registry name, its reference, or its class."""
    name = getattr(component, "name", None) or getattr(component, "label", None)
    if name:
        return str(name)
    try:
        return str(component.spec()["type"])
    except Exception:
        return type(component).__name__


def _kept_in(store) -> str | None:
    """Where finished chunks outlive this call: a store's path ('the store' for one without), or None.

    A :class:`~simpower.planning.sequential.MemoryStore` keeps chunks only in memory;
    it counts only through the store behind it (``backing``), if any.
    """
    if store is not None and hasattr(store, "backing"):
        store = store.backing
    if store is None:
        return None
    return str(getattr(store, "path", None) or "the store")


def _fmt_value(v) -> str:
    if isinstance(v, float):
        return f"{v:g}"
    return str(v)


def point_labels(scenarios: Sequence) -> list[str]:
    """Each scenario's parameters that differ between them, in words ("n = 48, icc = 0.05")."""
    if len(scenarios) < 2:
        return [""] * len(scenarios)
    params = [sc.get_params() for sc in scenarios]
    names = [k for k in params[0] if any(p.get(k) != params[0][k] for p in params[1:])]
    return [", ".join(f"{k} = {_fmt_value(p.get(k))}" for k in names) for p in params]


def _open_store(store):
    """(store object, owned) for a path or an object."""
    if store is None or hasattr(store, "load"):
        return store, False
    if isinstance(store, (str, Path)):
        from .store import RunStore

        return RunStore(store), True
    raise ParameterError(f"`store` must be a file path or a store with load/save; got {store!r}.")


def _check_args(reps, keys, n_scen):
    reps_list = [reps] * n_scen if np.ndim(reps) == 0 else list(reps)
    if len(reps_list) != n_scen:
        raise ParameterError(f"`reps` must be one integer or one per scenario ({n_scen}); got {len(reps_list)}.")
    for r in reps_list:
        if isinstance(r, bool) or not isinstance(r, (int, np.integer)) or r < 1:
            raise ParameterError(f"`reps` must be an integer >= 1; got {r!r}.")
        if r > MAX_REPS:
            raise ParameterError(f"`reps` must be at most {MAX_REPS:_} (10**9) per grid point; got {r}. Split the "
                                 f"study, or aim at a Monte Carlo SE (target_mcse) instead.")
    keys = list(range(n_scen)) if keys is None else [int(k) for k in keys]
    if len(keys) != n_scen or len(set(keys)) != n_scen or min(keys, default=0) < 0 or max(keys, default=0) >= 2**63:
        raise ParameterError(f"`keys` must be {n_scen} distinct integers in [0, 2**63); got {keys!r}.")
    return reps_list, keys


def check_execution(n_jobs: Any, backend: Any, address: Any) -> tuple[int | None, str | None, Any]:
    """Validated ``(n_jobs, backend, address)``; an ``address`` implies ``backend='dask'`` (see :class:`Execution`)."""
    ex = Execution(n_jobs=n_jobs, backend=backend, address=address)
    return ex.n_jobs, ex.backend, ex.address


def executor_of(ex: Execution) -> tuple[int | None, str | None, Any]:
    """(n_jobs, backend, address) the chunks run with: ``ex``'s, or joblib's current context when ``backend`` is None.

    Read in the calling thread (joblib's context is thread-local), before any chunk runs.
    """
    if ex.backend is not None:
        return ex.n_jobs, ex.backend, ex.address
    backend, address, ctx_jobs = context_backend()
    n_jobs = ctx_jobs if ex.n_jobs is None and ctx_jobs is not None else ex.n_jobs
    if isinstance(n_jobs, int) and n_jobs < -1:  # joblib's "all but k"
        n_jobs = effective_jobs(n_jobs)
    return n_jobs, backend, address


def run_many(scenarios: Sequence, reps: int | Sequence[int], *, seed=None, n_jobs: int | None = -1,
             chunk_size: int | None = None, progress: bool | None = None, fit_trouble: str = "failure",
             backend: str | None = None, address: Any = None, store: Any = None,
             max_failure_rate: float = 0.5, keys: Sequence[int] | None = None, desc: str = "simulating",
             timeout: float | None = None, keep_records: bool | None = None,
             labels: Mapping[int, str] | None = None, execution: Execution | None = None) -> list[RunResult]:
    """Run several scenarios (grid points) with one pool of workers.

    Point ``i`` uses seed key ``keys[i]`` (default ``i``). ``labels`` maps a
    key to the point's parameters in words for messages (default: the
    parameters in which the scenarios differ). See :func:`run` for the other
    parameters; ``reps`` may give one count per scenario. The execution
    settings may be given as one :class:`~simpower.execution.Execution`.
    """
    ex = resolve(execution, seed=seed, n_jobs=n_jobs, chunk_size=chunk_size, progress=progress,
                 fit_trouble=fit_trouble, backend=backend, address=address, store=store,
                 max_failure_rate=max_failure_rate, timeout=timeout, keep_records=keep_records)
    return run_points(scenarios, reps, ex, keys=keys, desc=desc, labels=labels)


def run_points(scenarios: Sequence, reps: int | Sequence[int], ex: Execution, *, keys: Sequence[int] | None = None,
               desc: str = "simulating", labels: Mapping[int, str] | None = None) -> list[RunResult]:
    """:func:`run_many` with its execution settings as one :class:`~simpower.execution.Execution` value."""
    scenarios = list(scenarios)
    reps_list, keys = _check_args(reps, keys, len(scenarios))
    store, owned = _open_store(ex.store)
    try:
        stored_seed = getattr(store, "seed", None) if store is not None else None
        entropy = normalize_seed(stored_seed if ex.seed is None and stored_seed is not None else ex.seed)
        if labels is None:
            labels = dict(zip(keys, point_labels(scenarios)))
        return _run(scenarios, reps_list, keys, entropy, ex, store, desc, labels)
    finally:
        if owned:
            store.close()


def _make_points(scenarios, reps_list, keys, sizes, keep_records, fit_trouble):
    points = []
    for sc, r, key, cs in zip(scenarios, reps_list, keys, sizes):
        keep = keep_records if keep_records is not None else r <= KEEP_RECORDS_LIMIT
        in_memory = keep_records is True or r * len(sc.analyses) <= RECORDS_IN_MEMORY
        if keep and in_memory:
            pt = _Point(sc, int(r), key, cs, RecordCollector(sc.analyses, int(r)), PointStats(sc))
        else:
            pt = _Point(sc, int(r), key, cs, None, PointStats(sc), stream_book=CauseBook(),
                        spool=RecordSpool(sc.analyses, int(r)) if keep else None)
        points.append(pt)
    return points


PREFLIGHT_REPLICATES = 3


def trial_data(scenario, count: int) -> list | None:
    """``count`` replicates of the scenario's process drawn with a fixed generator (never the run's own
    random numbers), as long tables; None when the process raises."""
    rng = np.random.default_rng(0)
    try:
        if scenario.process.has_batch:
            batch = scenario.process.draw_batch(rng, count)
            return [batch.replicate(i) for i in range(count)]
        return [scenario.process(rng) for _ in range(count)]
    except Exception:
        return None


def preflight(scenario, label: str = "") -> None:
    """Refuse at once an analysis that cannot analyse the process's data at all.

    Draws :data:`PREFLIGHT_REPLICATES` replicates with a fixed generator (the
    run's own random numbers are untouched) and applies each analysis. Only
    when an analysis raises on every one of them -- a layout mismatch such as
    a t-test on survival data, not an occasional failure -- is the run
    refused, with one line naming the analysis and its first error. A process
    that raises is left to the run, which counts it by cause.

    Returns the seconds the analyses without a batch path took on one
    replicate (a second, warm call each), or None when the process raised:
    the runner's estimate of a per-replicate run's cost.
    """
    data = trial_data(scenario, PREFLIGHT_REPLICATES)
    if data is None:
        return None
    cost = 0.0
    for name, analysis in scenario.analyses.items():
        errors = []
        with warnings.catch_warnings(record=True):   # recorded, never printed (see planning.search)
            warnings.simplefilter("ignore")
            for i, d in enumerate(data):
                try:
                    analysis(d)
                except Exception as exc:
                    errors.append(exc)
                else:
                    if scenario.process.has_batch and analysis.has_batch:
                        break  # its chunks take the batch path: no per-replicate cost to estimate
                    # a second, warm call (imports done) times the analysis on one replicate
                    t0 = time.perf_counter()
                    try:
                        analysis(data[(i + 1) % len(data)])
                    except Exception:
                        pass
                    cost += time.perf_counter() - t0
                    break
        if len(errors) == len(data):
            exc = errors[0]
            raise ParameterError(
                f"analysis `{name}` cannot analyse the data of process `{part_label(scenario.process)}`: "
                f"it raised {type(exc).__name__}: {exc} on every trial replicate{f' at {label}' if label else ''}; "
                f"check that the analysis fits the design (columns {', '.join(sorted(map(str, data[0])))})"
                f"{' and data of that shape' if label else ''}.")
    return cost


def _preflight_isolated(sc, label: str = "") -> None:
    """:func:`preflight` in a forked child of the crash-isolating helper (a crash there is left to the run)."""
    g, shared = guard.acquire()
    clean = False
    try:
        g.call(preflight, sc, label)
        clean = True
    finally:
        guard.release(g, shared, clean)


def _load_stored(pt: _Point, store, plan: ChunkPlan) -> set[int]:
    """Add the point's stored chunks; return their indices."""
    done: set[int] = set()
    if store is None:
        return done
    if hasattr(store, "done_chunks"):
        candidates = ((k, size) for _, k, size in store.done_chunks(pt.key) if k < len(plan) and plan[k][1] == size)
    else:
        candidates = iter(plan)
    for k, size in candidates:
        cached = store.load(pt.key, k, size)
        if cached is not None:
            pt.add(cached)
            done.add(k)
    return done


def _tasks(points, plans, done, entropy, timeout) -> Iterator[tuple]:
    """The chunks still to run, lazily, point by point in chunk order."""
    extra = (timeout,) if timeout else ()
    for pt, plan, skip in zip(points, plans, done):
        for k in range(len(plan)):
            if k not in skip:
                yield (pt.scenario, entropy, pt.key, k, plan[k][1], *extra)


def _isolation(scenarios, backend, jobs) -> tuple[bool, str | None]:
    """(whether crashes are isolated, the backend chunks run on); see :mod:`simpower.engine.guard`."""
    isolating = guard.available() and backend not in ("serial", "threading", "joblib")
    if isolating and backend is None and jobs == 1 and any(guard.has_user_code(sc) for sc in scenarios):
        why = next((w for w in map(guard.unsendable, scenarios) if w), None)
        if why is not None:
            warnings.warn(f"the scenario cannot be sent to a worker process ({why}); it runs in this process, "
                          f"where a replicate that crashes (a segfault) ends the run.", RuntimeWarning, stacklevel=4)
            return False, "serial"
    return isolating, backend


#: estimated cost (seconds) of starting local workers for a per-replicate run (each imports simpower and the
#: libraries its analyses fit with, e.g. statsmodels)
HEAVY_POOL_START_SECONDS = 2.0


def _serial_estimate(scenarios, reps_list, points, costs) -> float | None:
    """Seconds the remaining replicates would take in this process, from the preflight's warm per-replicate
    timings; None when unknown (user code run in isolation, a process that raised)."""
    total = 0.0
    for sc, pt in zip(scenarios, points):
        kind = (type(sc.process).__name__, tuple((n, type(a).__name__) for n, a in sc.analyses.items()))
        cost = costs.get(kind)
        if cost is None:
            return None
        total += cost * max(pt.reps - pt.done, 0)
    return total


def _chunk_results(tasks, n_tasks, scenarios, isolating, run_backend, n_jobs, address, max_failure_rate,
                   serial: float | None = None):
    """The executor's generator of chunk outputs (see :func:`run_many` for where chunks run).

    A per-replicate run on local workers whose estimated cost in this process (``serial``, from the
    preflight) is below what starting workers would save runs here instead: where chunks run never
    changes their numbers.
    """
    if not n_tasks:
        return iter(())
    fallback = partial(guard.run_isolated, run_chunk, jobs=min(effective_jobs(n_jobs), n_tasks),
                       max_failure_rate=max_failure_rate) if isolating else None
    if isolating and run_backend is None and any(guard.has_user_code(sc) for sc in scenarios):
        return fallback(tasks)  # user code: every chunk in a forked worker of the helper
    fast = all(sc.process.has_batch and all(a.has_batch for a in sc.analyses.values()) for sc in scenarios)
    probe = fast and run_backend is None  # an explicit --jobs 2 too: workers must pay for their start
    jobs = min(effective_jobs(n_jobs), n_tasks)
    if not fast and run_backend is None and serial is not None and jobs > 1:
        warm = pool_start_seconds(jobs)  # small when the previous run's workers are still alive
        start = warm if warm < 1.0 else HEAVY_POOL_START_SECONDS
        if serial <= start + serial / jobs:
            n_jobs = 1
    return execute(run_chunk, tasks, n_jobs=n_jobs, backend=run_backend, address=address, probe=probe,
                   n_tasks=n_tasks, fallback=fallback)


def _run(scenarios, reps_list, keys, entropy, ex: Execution, store, desc, labels):
    n_jobs, backend, address = executor_of(ex)
    chunk_size, progress, fit_trouble = ex.chunk_size, ex.progress, ex.fit_trouble
    max_failure_rate, timeout, keep_records = ex.max_failure_rate, ex.timeout, ex.keep_records
    jobs = effective_jobs(n_jobs)
    isolating, run_backend = _isolation(scenarios, backend, jobs)
    for sc, r in zip(scenarios, reps_list):
        check_memory(sc, int(r), chunk_size, jobs if backend != "dask" else 1, keep_records)
    costs: dict = {}
    for sc, key in zip(scenarios, keys):  # one trial per kind of scenario (the grid points of a sweep share theirs)
        kind = (type(sc.process).__name__, tuple((n, type(a).__name__) for n, a in sc.analyses.items()))
        if kind not in costs:
            if isolating and guard.has_user_code(sc):
                _preflight_isolated(sc, str(labels.get(key, "")))
                costs[kind] = None
            else:
                costs[kind] = preflight(sc, str(labels.get(key, "")))
    sizes = [int(chunk_size or default_chunk_size(s)) for s in scenarios]
    points = _make_points(scenarios, reps_list, keys, sizes, keep_records, fit_trouble)
    for pt in points:
        pt.label = str(labels.get(pt.key, ""))
    by_key = {pt.key: pt for pt in points}
    plans = [plan_chunks(pt.reps, pt.chunk_size) for pt in points]
    done = []
    for pt, plan in zip(points, plans):
        if store is not None and hasattr(store, "bind"):
            store.bind(pt.key, pt.scenario, entropy, pt.chunk_size, pt.reps)
        done.append(_load_stored(pt, store, plan))
    reused = sum(pt.done for pt in points)
    for pt in points:
        _check_failures(pt, max_failure_rate, store)
    n_tasks = sum(len(plan) - len(d) for plan, d in zip(plans, done))
    total = sum(reps_list) - reused
    tasks = _tasks(points, plans, done, entropy, timeout)
    t0 = time.perf_counter()
    bar = progress_display(total + reused, progress, desc, initial=reused)
    serial = _serial_estimate(scenarios, reps_list, points, costs)
    gen = _chunk_results(tasks, n_tasks, scenarios, isolating, run_backend, n_jobs, address, max_failure_rate,
                         serial)
    unenforced = False
    try:
        for out in gen:
            pt = by_key[out.point]
            if store is not None:
                store.save(out)
            pt.add(out)
            unenforced |= out.timeout_enforced is False
            bar.update(out.size)
            _check_failures(pt, max_failure_rate, store)
    except KeyboardInterrupt:
        done = sum(pt.done for pt in points)
        place = _kept_in(store)
        where = (f"; {done} of {sum(reps_list)} replicates are in {place}: "
                 f"run the same call again (same store) to resume" if place else
                 f"; nothing was saved ({done} of {sum(reps_list)} replicates were done): give a store "
                 f"(store=PATH, --store PATH) to keep progress")
        raise RunInterrupted("interrupted" + where + ".") from None
    finally:
        if hasattr(gen, "close"):
            gen.close()
        bar.close()
        if store is not None and hasattr(store, "flush"):
            store.flush()
    if unenforced:
        warnings.warn(f"the per-replicate time limit ({timeout:g} s) could not be enforced on this executor "
                      f"(it needs a process's main thread: serial or loky); it was ignored.", RuntimeWarning,
                      stacklevel=3)
    seconds = time.perf_counter() - t0
    return [_result(pt, entropy, seconds, fit_trouble, n_jobs, backend, store) for pt in points]


def _result(pt: _Point, entropy, seconds, fit_trouble, n_jobs, backend, store) -> RunResult:
    jobs = effective_jobs(n_jobs) if backend != "dask" else None
    common = dict(n_jobs=jobs, backend=backend, point=pt.key, chunk_seconds=pt.chunk_seconds, stats=pt.stats)
    if pt.collector is not None:
        return RunResult(pt.scenario, pt.reps, entropy, pt.chunk_size, pt.collector.records(), pt.paths, seconds,
                         fit_trouble, **common)
    causes, messages, table = pt.stream_book.canonical()
    if pt.spool is not None:
        records = pt.spool.records(causes, messages, table, pt.hyp)
    else:
        records = MissingRecords(str(getattr(store, "path", "")) or None)
    return RunResult(pt.scenario, pt.reps, entropy, pt.chunk_size, records, pt.paths, seconds, fit_trouble,
                     messages=messages, hypotheses=pt.hyp, **common)


def _scenario_of(scenario, reps, seed):
    """(Scenario, reps, seed): a scenario file path is loaded, its ``reps`` and ``seed`` filling the unset ones."""
    if isinstance(scenario, (str, Path)):
        from ..scenario_files import load  # a path is the one input the engine reads from a file

        sf = load(scenario)
        reps = sf.run.get("reps", DEFAULT_REPS) if reps is None else reps
        seed = sf.run.get("seed") if seed is None else seed
        return sf.scenario, reps, seed
    if not (hasattr(scenario, "process") and hasattr(scenario, "analyses")):
        raise ParameterError(f"`scenario` must be a Scenario or a scenario file path (or "
                             f"sp.load_scenario('x.toml').scenario); got {type(scenario).__name__}.")
    return scenario, DEFAULT_REPS if reps is None else reps, seed


#: replicates of ``run`` when neither the call nor the scenario file gives ``reps``
DEFAULT_REPS = 1000


def run(scenario, reps: int | None = None, *, seed=None, n_jobs: int | None = -1, chunk_size: int | None = None,
        progress: bool | None = None, fit_trouble: str = "failure", backend: str | None = None,
        address: Any = None, store: Any = None, max_failure_rate: float = 0.5, point: int | None = None,
        timeout: float | None = None, keep_records: bool | None = None,
        execution: Execution | None = None) -> RunResult:
    """Simulate ``reps`` replicates of ``scenario`` and summarise them.

    Parameters
    ----------
    scenario : Scenario, or str / Path of a scenario file
        A path is loaded with :func:`simpower.load_scenario`; the file's ``reps`` and
        ``seed`` are used unless given here (its other run settings, such as
        ``jobs`` or ``[execution]``, are read by the command line only).
    reps : int >= 1, optional
        Default: the scenario file's ``reps``, else 1000.
    seed : int >= 0, SeedSequence or None
        None draws fresh entropy (or reuses the store's seed when resuming);
        the result records it (``result.seed``).
    n_jobs : int
        Worker processes: -1 (default) uses all cores, a count >= 1 that many;
        1 runs built-in scenarios in this process and scenarios with user code in
        one worker of the crash-isolating helper (:mod:`simpower.engine.guard`).
        Other values (0, and joblib's -2, -3... for "all but some") are refused.
    chunk_size : int, optional
        Replicates per task; defaults to the plan's choice for the scenario.
        Part of the reproducibility promise: the same seed and chunk size give
        the same numbers.
    progress : bool, optional
        Progress bar on stderr; default on only when stderr is a terminal.
    fit_trouble : {'failure', 'nonrejection'}
        What replicates whose analysis warned (non-convergence, singular fit)
        count as; the result shows both figures either way.
    backend : {None, 'loky', 'serial', 'threading', 'dask'}
        None takes joblib's current context when the caller set one
        (``with joblib.parallel_config(backend="threading"):``; see
        :mod:`simpower.execution`); otherwise it is loky worker processes (or this process when ``n_jobs=1``) for
        built-in scenarios, and workers forked from the crash-isolating helper
        for scenarios with user code (or dask when an ``address`` is given), so that a replicate that kills its
        process (a segfault) counts as failure ``crash`` and the run goes on.
        'serial' and 'threading' run in this process (a crash ends the run).
    address : str or dask.distributed.Client, optional
        The dask scheduler (``"tcp://host:8786"``). Giving one implies
        ``backend='dask'``; with another explicit ``backend`` it is refused.
        Without it, ``backend='dask'`` uses the current dask client or starts
        a local cluster.
    store : str, Path or store object, optional
        A run store file: finished chunks are committed there as they arrive
        and reused when the same call runs again (resume).
    max_failure_rate : float in (0, 1]
        Stop with an error once more than this share of an analysis'
        replicates fail hard (exceptions, non-finite or invalid p-values,
        timeouts, crashes).
    point : int, optional
        The grid point key (seed spawn key) of this scenario; by default its
        content key (:meth:`Scenario.point_key`), the key sweeps and searches
        give the same parameters, so a sweep's point reproduces as a single
        run with the same seed and chunk size.
    timeout : float, optional
        Per-replicate time limit (seconds) of per-replicate analysis calls;
        a replicate past it counts as failure ``"timeout"``. Enforced on the
        serial path and in loky workers (POSIX), not on dask or threads.
    keep_records : bool, optional
        Keep per-replicate arrays in memory (``result.records``). None: in
        memory up to 25,000 replicates x analyses, spooled to a temporary
        folder (memory maps) up to 1,000,000 replicates, above that
        summaries only (records then stay in the store only). False:
        summaries only.
    execution : Execution, optional
        All of the settings above (seed to keep_records, and chunk_size) as
        one :class:`~simpower.execution.Execution` value; a keyword argument
        that contradicts it is refused.

    Examples
    --------
    >>> import simpower as sp
    >>> sc = sp.Scenario(sp.NormalTwoArm(n=64, effect=0.5), sp.TTest())
    >>> res = sp.run(sc, reps=2000, seed=1, n_jobs=1)
    >>> abs(res.power - 0.80) < 4 * res.mcse   # Cohen (1988): n = 64 per arm gives 80% power
    True
    """
    ex = resolve(execution, seed=seed, n_jobs=n_jobs, chunk_size=chunk_size, progress=progress,
                 fit_trouble=fit_trouble, backend=backend, address=address, store=store,
                 max_failure_rate=max_failure_rate, timeout=timeout, keep_records=keep_records)
    scenario, reps, file_seed = _scenario_of(scenario, reps, ex.seed)
    if ex.seed is None and file_seed is not None:
        ex = ex.replace(seed=file_seed)
    store, owned = _open_store(ex.store)
    try:
        if point is None:
            point = scenario.point_key()
            held = store.point_keys() if hasattr(store, "point_keys") else []
            if len(held) == 1 and held[0] != point:
                # the store holds one other run: bind to it, so a changed scenario is refused
                # (naming what changed) rather than stored beside the old one
                point = held[0]
        return run_points([scenario], reps, ex.replace(store=store), keys=[point])[0]
    finally:
        if owned:
            store.close()
