"""One chunk of replicates: draw, analyse, capture failures.

A chunk's random numbers depend only on (run entropy, grid point, chunk index)
through ``SeedSequence(entropy, spawn_key=(point, chunk))`` -- the same stream
``SeedSequence(entropy).spawn(...)[point].spawn(...)[chunk]`` would give -- and
on the chunk's size, which belongs to the plan. So the numbers are the same for
any number of jobs and any executor.

Failure causes are strings: ``"error:<ExceptionType>"`` (the analysis raised),
``"process:<ExceptionType>"`` (drawing the data raised),
``"nonfinite_pvalue"``, ``"warning:<WarningType>"`` (fit trouble: the analysis
warned; its values are kept and the run's policy decides), ``"timeout"``.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..analyses.base import FIELDS, as_test_result

IGNORED_WARNINGS = (DeprecationWarning, PendingDeprecationWarning, FutureWarning, ImportWarning, ResourceWarning)


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


def _fill(rec, i, res, causes: _Causes):
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


def _apply_one(analysis, data, rec, i, causes: _Causes, hyp: dict, name: str):
    """Run one analysis on one data set, recording values or the failure cause."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            res = as_test_result(analysis(data))
        except Exception as exc:  # a user analysis may raise anything: count it by type
            rec["status"][i] = causes.code(f"error:{type(exc).__name__}", f"{type(exc).__name__}: {exc}")
            return
    _fill(rec, i, res, causes)
    if res.names and name not in hyp:
        hyp[name] = list(res.names)
    if not np.isfinite(res.pvalue):
        rec["status"][i] = causes.code("nonfinite_pvalue", f"p-value was {res.pvalue}")
        return
    for w in caught:
        if not issubclass(w.category, IGNORED_WARNINGS):
            rec["status"][i] = causes.code(f"warning:{w.category.__name__}", str(w.message))
            return


def _apply_batch(analysis, batch, rec, causes: _Causes, hyp: dict, name: str):
    out = analysis.batch(batch)
    for f in FIELDS:
        if f in out:
            rec[f][:] = np.broadcast_to(np.asarray(out[f], float), rec[f].shape)
    if "pvalues" in out:
        rec["pvalues"] = np.asarray(out["pvalues"], float)
        if "names" in out:
            hyp[name] = list(out["names"])
    for cause, mask in (out.get("trouble") or {}).items():
        rec["status"][np.asarray(mask, bool) & (rec["status"] == 0)] = causes.code(cause, out.get("trouble_messages", {}).get(cause, ""))
    bad = ~np.isfinite(rec["pvalue"]) & (rec["status"] == 0)
    if bad.any():
        rec["status"][bad] = causes.code("nonfinite_pvalue", "p-value was not finite (e.g. zero variance)")


def run_chunk(scenario, entropy: int, point: int, chunk: int, size: int) -> ChunkOutput:
    """Simulate and analyse ``size`` replicates of ``scenario``; never raises for a failing replicate."""
    t0 = time.perf_counter()
    rng = np.random.default_rng(chunk_seed(entropy, point, chunk))
    process = scenario.process
    analyses = scenario.analyses
    causes = _Causes()
    records = {name: _empty(size) for name in analyses}
    paths: dict[str, str] = {}
    hyp: dict[str, list[str]] = {}
    if process.has_batch:
        batch = process.draw_batch(rng, size)
        for name, analysis in analyses.items():
            rec = records[name]
            if analysis.has_batch and analysis.supports_batch(batch):
                paths[name] = "batch"
                _apply_batch(analysis, batch, rec, causes, hyp, name)
            else:
                paths[name] = "per-replicate"
                for i in range(size):
                    _apply_one(analysis, batch.replicate(i), rec, i, causes, hyp, name)
    else:
        paths = {name: "per-replicate" for name in analyses}
        for i in range(size):
            try:
                data = process(rng)
            except Exception as exc:
                code = causes.code(f"process:{type(exc).__name__}", f"{type(exc).__name__}: {exc}")
                for rec in records.values():
                    rec["status"][i] = code
                continue
            for name, analysis in analyses.items():
                _apply_one(analysis, data, records[name], i, causes, hyp, name)
    return ChunkOutput(point, chunk, size, records, causes.causes, causes.messages, paths, hyp,
                       time.perf_counter() - t0)
