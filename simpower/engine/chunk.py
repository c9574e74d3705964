"""One chunk of replicates: draw, analyse, capture failures.

Reproducibility promise: a chunk's random numbers depend only on (run
entropy, grid point key, chunk index) through
``SeedSequence(entropy, spawn_key=(point, chunk))`` -- the same stream
``SeedSequence(entropy).spawn(...)[point].spawn(...)[chunk]`` would give -- and
on the chunk's size, which belongs to the plan. So the numbers are the same for
any number of jobs, any executor (serial, loky, dask) and any order in which
chunks finish, and a chunk recomputed after a crash equals the lost one.

Failure causes are strings: ``"error:<ExceptionType>"`` (the analysis raised),
``"process:<ExceptionType>"`` (drawing the data raised),
``"nonfinite_pvalue"`` (NaN or infinite), ``"invalid_pvalue"`` (finite but outside
[0, 1] by more than :data:`PVALUE_SLACK`), ``"crash"`` (the analysis killed
its process: a segfault, ``os._exit``; see :mod:`simpower.engine.guard`),
``"process:crash"`` (drawing the data killed it: that replicate and the later
ones of its chunk, whose random numbers would follow it), ``"warning:<WarningType>"`` (fit trouble: the analysis
warned; its values are kept and the run's policy decides), ``"timeout"`` (a
per-replicate call ran past the time limit). A failing replicate never stops
the chunk; the first message of each cause is kept. A batch path that raises
(a bug, or data it cannot handle) is not fatal either: that analysis is redone
replicate by replicate for the chunk, so each failing replicate is counted by
cause, and the path is reported as "per-replicate (batch path raised ...)".

Crashes. ``run_chunk(..., mark=f)`` calls ``f(i, name)`` before each call that
runs code which may kill the process (``i`` the replicate, -1 for a whole-batch
call; ``name`` the analysis, None for drawing the data), and ``crashed`` maps
such keys to a message: those calls are skipped and recorded as ``crash`` (or
``process:crash``). A chunk redone with the keys of the calls that killed
earlier attempts therefore gives the same records, cause codes included, as a
run where those calls had simply failed, whichever process ran it.

Time limit: with ``timeout`` set, every per-replicate *analysis* call is
interrupted by ``SIGALRM`` (``signal.setitimer``) after ``timeout`` seconds
and recorded as ``"timeout"``. Drawing the data is not timed: an interrupted
draw would leave the chunk's generator part-way and shift the numbers of the
later replicates by an amount that depends on the clock, breaking the
promise above (analyses draw no numbers from the chunk's generator). That works only on
POSIX, in the main thread of a process: the serial path and loky worker
processes qualify; dask workers (threads) and the threading backend do not,
and there the limit is not enforced (``ChunkOutput.timeout_enforced`` is
False; the runner warns). Batch paths are not timed, and a long call inside C
code (one huge LAPACK call) is interrupted only when it returns to Python.
"""

from __future__ import annotations

import os
import signal
import socket
import threading
import time
from dataclasses import dataclass, field

import numpy as np

from ..analyses.base import FIELDS, IGNORED_WARNINGS, as_batch_result, as_test_result, recording_warnings
from ..summaries import chunk_statistics
TIMEOUT = "timeout"
CRASH = "crash"
PROCESS_CRASH = "process:crash"
#: a p-value outside [-PVALUE_SLACK, 1 + PVALUE_SLACK] is impossible, not rounding: failure "invalid_pvalue"
PVALUE_SLACK = 1e-9


def chunk_seed(entropy: int, point: int, chunk: int) -> np.random.SeedSequence:
    """The SeedSequence of chunk ``chunk`` of grid point ``point``."""
    return np.random.SeedSequence(entropy, spawn_key=(point, chunk))


@dataclass
class ChunkOutput:
    """Per-replicate records of one chunk (data only: arrays, strings, numbers)."""

    point: int
    chunk: int
    size: int
    #: analysis name -> field -> array of length ``size`` (``status`` is int16: 0 ok, k -> causes[k-1])
    records: dict[str, dict[str, np.ndarray]]
    causes: list[str] = field(default_factory=list)
    messages: dict[str, str] = field(default_factory=dict)
    paths: dict[str, str] = field(default_factory=dict)
    hypotheses: dict[str, list[str]] = field(default_factory=dict)
    seconds: float = 0.0
    #: wall-clock start (seconds since the epoch) and the worker that ran it ("host:pid")
    started_at: float = 0.0
    worker: str = ""
    #: None: no time limit asked; True/False: whether the limit could be enforced there
    timeout_enforced: bool | None = None
    #: the chunk's summary statistics, computed where the chunk ran: (analysis -> AnalysisStats,
    #: (a, b) -> discordant counts); None for a chunk read back from a store (computed on arrival)
    stats: tuple | None = None


class ReplicateTimeout(BaseException):
    """Raised by the SIGALRM handler inside a timed call.

    A ``BaseException`` so that a user's ``except Exception`` cannot swallow it.
    """


class _Limiter:
    """Per-replicate time limit through ``signal.setitimer`` (POSIX main thread only)."""

    def __init__(self, seconds: float | None):
        self.seconds = seconds
        self.enforced = bool(seconds) and hasattr(signal, "setitimer") and \
            threading.current_thread() is threading.main_thread()
        self._old = None

    def __enter__(self):
        if self.enforced:
            self._old = signal.signal(signal.SIGALRM, self._fire)
        return self

    def __exit__(self, *exc):
        if self.enforced:
            signal.setitimer(signal.ITIMER_REAL, 0)
            signal.signal(signal.SIGALRM, self._old if self._old is not None else signal.SIG_DFL)
        return False

    @staticmethod
    def _fire(signum, frame):
        raise ReplicateTimeout

    def call(self, fn, arg):
        """``fn(arg)`` under the time limit (raises ReplicateTimeout when it runs out)."""
        if not self.enforced:
            return fn(arg)
        signal.setitimer(signal.ITIMER_REAL, self.seconds)
        try:
            return fn(arg)
        finally:
            signal.setitimer(signal.ITIMER_REAL, 0)

    @property
    def message(self) -> str:
        return f"a replicate ran past the time limit of {self.seconds:g} s"


class _Causes:
    def __init__(self):
        self.causes: list[str] = []
        self.messages: dict[str, str] = {}

    def code(self, cause: str, message: str = "") -> int:
        if cause not in self.causes:
            self.causes.append(cause)
            self.messages[cause] = message[:500]
        return self.causes.index(cause) + 1


def _empty(size: int) -> dict[str, np.ndarray]:
    rec = {f: np.full(size, np.nan) for f in FIELDS}
    rec["status"] = np.zeros(size, np.int16)
    return rec


def _fill(rec, i, res):
    rec["pvalue"][i] = res.pvalue
    rec["estimate"][i] = res.estimate
    rec["se"][i] = res.se
    rec["ci_low"][i] = res.ci_low
    rec["ci_high"][i] = res.ci_high
    if res.pvalues is not None:
        pv = rec.get("pvalues")
        if pv is None:
            pv = rec["pvalues"] = np.full((rec["pvalue"].size, res.pvalues.size), np.nan)
        pv[i, : res.pvalues.size] = res.pvalues


def _invalid(p) -> np.ndarray:
    """Finite p-values outside [0, 1] beyond rounding (``PVALUE_SLACK``)."""
    p = np.asarray(p, float)
    return np.isfinite(p) & ((p < -PVALUE_SLACK) | (p > 1 + PVALUE_SLACK))


def _apply_one(analysis, data, rec, i, causes: _Causes, hyp: dict, name: str, limit: _Limiter,
               crashed=None, mark=None):
    """Run one analysis on one data set, recording values or the failure cause."""
    if crashed and (i, name) in crashed:
        rec["status"][i] = causes.code(CRASH, crashed[(i, name)])
        return
    if mark is not None:
        mark(i, name)
    with recording_warnings() as caught:
        try:
            res = as_test_result(limit.call(analysis, data))
        except ReplicateTimeout:
            rec["status"][i] = causes.code(TIMEOUT, limit.message)
            return
        except Exception as exc:  # a user analysis may raise anything: count it by type
            rec["status"][i] = causes.code(f"error:{type(exc).__name__}", f"{type(exc).__name__}: {exc}")
            return
    _fill(rec, i, res)
    if res.names and name not in hyp:
        hyp[name] = list(res.names)
    if not np.isfinite(res.pvalue):
        rec["status"][i] = causes.code("nonfinite_pvalue", f"p-value was {res.pvalue}")
        return
    if _invalid(res.pvalue) or (res.pvalues is not None and _invalid(res.pvalues).any()):
        bad = res.pvalue if _invalid(res.pvalue) else res.pvalues[_invalid(res.pvalues)][0]
        rec["status"][i] = causes.code("invalid_pvalue", f"p-value was {bad}, outside [0, 1]")
        return
    for w in caught:
        if not issubclass(w.category, IGNORED_WARNINGS):
            rec["status"][i] = causes.code(f"warning:{w.category.__name__}", str(w.message))
            return


def _apply_batch(analysis, batch, rec, causes: _Causes, hyp: dict, name: str):
    out = as_batch_result(analysis.batch(batch))  # a BatchResult, or a dict with its keys
    for f in FIELDS:
        if f in out:
            rec[f][:] = np.broadcast_to(np.asarray(out[f], float), rec[f].shape)
    if "pvalues" in out:
        rec["pvalues"] = np.asarray(out["pvalues"], float)
        if "names" in out:
            hyp[name] = list(out["names"])
    for cause, mask in (out.get("trouble") or {}).items():
        rec["status"][np.asarray(mask, bool) & (rec["status"] == 0)] = causes.code(
            cause, out.get("trouble_messages", {}).get(cause, ""))
    bad = ~np.isfinite(rec["pvalue"]) & (rec["status"] == 0)
    if bad.any():
        rec["status"][bad] = causes.code("nonfinite_pvalue", "p-value was not finite (e.g. zero variance)")
    bad = _invalid(rec["pvalue"])
    if "pvalues" in rec:
        bad |= _invalid(rec["pvalues"]).reshape(bad.size, -1).any(axis=1)
    bad &= rec["status"] == 0
    if bad.any():
        j = int(np.argmax(bad))
        shown = rec["pvalue"][j] if _invalid(rec["pvalue"][j]) else rec["pvalues"][j][_invalid(rec["pvalues"][j])][0]
        rec["status"][bad] = causes.code("invalid_pvalue", f"p-value was {shown}, outside [0, 1]")


def _batch_ok(analysis, batch) -> bool:
    """Whether the analysis's batch path applies to this batch (a layout check that raises means no)."""
    if not analysis.has_batch:
        return False
    try:
        return bool(analysis.supports_batch(batch))
    except Exception:
        return False


def run_chunk(scenario, entropy: int, point: int, chunk: int, size: int,
              timeout: float | None = None, *, crashed: dict | None = None, mark=None) -> ChunkOutput:
    """Simulate and analyse ``size`` replicates of ``scenario``; never raises for a failing replicate.

    Parameters
    ----------
    scenario : Scenario
    entropy : int
        The run's seed entropy.
    point, chunk : int
        Grid point key and chunk index (the seed's spawn key).
    size : int
        Replicates in this chunk (fixed by the plan).
    timeout : float, optional
        Time limit in seconds for each per-replicate analysis call (see the module notes).
    crashed : dict, optional
        ``(replicate, analysis name or None) -> message`` of calls that killed
        an earlier attempt at this chunk: skipped and recorded as crashes.
    mark : callable, optional
        ``mark(replicate, name)`` is called before each such call (see the module notes).
    """
    started = time.time()
    t0 = time.perf_counter()
    rng = np.random.default_rng(chunk_seed(entropy, point, chunk))
    process = scenario.process
    analyses = scenario.analyses
    causes = _Causes()
    records = {name: _empty(size) for name in analyses}
    paths: dict[str, str] = {}
    hyp: dict[str, list[str]] = {}
    crashed = crashed or {}
    with _Limiter(timeout) as limit:
        if process.has_batch and (-1, None) in crashed:  # drawing the whole chunk killed the process
            code = causes.code(PROCESS_CRASH, crashed[(-1, None)])
            for rec in records.values():
                rec["status"][:] = code
            paths = {name: "none (drawing the data crashed)" for name in analyses}
        elif process.has_batch:
            if mark is not None:
                mark(-1, None)
            batch = process.draw_batch(rng, size)
            for name, analysis in analyses.items():
                rec = records[name]
                if (-1, name) in crashed:  # the batch path killed the process: redo replicate by replicate
                    paths[name] = "per-replicate (batch path crashed)"
                elif _batch_ok(analysis, batch):
                    try:
                        if mark is not None:
                            mark(-1, name)
                        _apply_batch(analysis, batch, rec, causes, hyp, name)
                        paths[name] = "batch"
                        continue
                    except Exception as exc:  # a batch path that raises: redo this chunk replicate by replicate
                        rec = records[name] = _empty(size)
                        hyp.pop(name, None)
                        paths[name] = f"per-replicate (batch path raised {type(exc).__name__})"
                else:
                    paths[name] = "per-replicate"
                for i in range(size):
                    _apply_one(analysis, batch.replicate(i), rec, i, causes, hyp, name, limit, crashed, mark)
        else:
            paths = {name: "per-replicate" for name in analyses}
            for i in range(size):
                if (i, None) in crashed:
                    # drawing this replicate killed the process: how many numbers it took from the chunk's
                    # stream is unknown, so it and the later replicates of the chunk cannot be drawn
                    code = causes.code(PROCESS_CRASH, crashed[(i, None)])
                    for rec in records.values():
                        rec["status"][i:] = code
                    break
                if mark is not None:
                    mark(i, None)
                try:
                    data = process(rng)
                except Exception as exc:
                    code = causes.code(f"process:{type(exc).__name__}", f"{type(exc).__name__}: {exc}")
                    for rec in records.values():
                        rec["status"][i] = code
                    continue
                for name, analysis in analyses.items():
                    _apply_one(analysis, data, records[name], i, causes, hyp, name, limit, crashed, mark)
    stats = chunk_statistics(scenario, records, causes.causes)
    return ChunkOutput(point, chunk, size, records, causes.causes, causes.messages, paths, hyp,
                       time.perf_counter() - t0, started_at=started, worker=f"{socket.gethostname()}:{os.getpid()}",
                       timeout_enforced=None if not timeout else limit.enforced, stats=stats)
