"""Streaming summaries: counts and sums per chunk, for runs too large to keep every replicate.

With ``keep_records=False`` the runner keeps, per chunk and analysis, only
what the summaries need: failure counts by cause, rejections among usable
replicates, and (count, mean, sum of squared deviations) of the estimates and
of the squared model SEs, plus coverage counts and the discordant pairs of
each two analyses. Chunks are folded as soon as every earlier chunk is in,
so memory holds only the chunks that finished ahead of an earlier one (a few
hundred bytes each), not one tally per chunk of the run, and does not grow
with the replicates; the per-replicate records stay in the run store when one
is given.

Chunk tallies are folded in chunk order with the pairwise update of Chan,
Golub & LeVeque (1983, "Algorithms for computing the sample variance", The
American Statistician 37:242-247), so the result does not depend on the
order in which chunks finished, and agrees with the in-memory summaries of
:func:`simpower.summaries.summarize_records` to rounding error.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..result import RunResult
from ..summaries import WARNING_PREFIX, wilson_interval
from ..errors import RunError


@dataclass
class Moments:
    """Count, mean and sum of squared deviations of a sample."""

    n: int = 0
    mean: float = 0.0
    m2: float = 0.0

    @classmethod
    def of(cls, x: np.ndarray) -> "Moments":
        if x.size == 0:
            return cls()
        m = float(x.mean())
        d = x - m
        return cls(int(x.size), m, float(np.dot(d, d)))

    def merge(self, other: "Moments") -> "Moments":
        if other.n == 0:
            return self
        if self.n == 0:
            return other
        n = self.n + other.n
        delta = other.mean - self.mean
        return Moments(n, self.mean + delta * other.n / n, self.m2 + other.m2 + delta * delta * self.n * other.n / n)

    def var(self) -> float:
        return self.m2 / (self.n - 1) if self.n > 1 else math.nan


@dataclass
class AnalysisTally:
    """What one chunk contributes to one analysis' summary."""

    reps: int = 0
    counts: dict[str, int] = field(default_factory=dict)
    n_used: int = 0
    n_fit_trouble: int = 0
    rejections: int = 0
    est: Moments = field(default_factory=Moments)
    se2: Moments = field(default_factory=Moments)
    n_ci: int = 0
    covered: int = 0
    hyp_n: int = 0
    hyp_rej: np.ndarray | None = None
    hyp_any: int = 0
    hyp_all: int = 0

    def merge(self, o: "AnalysisTally") -> "AnalysisTally":
        counts = dict(self.counts)
        for c, n in o.counts.items():
            counts[c] = counts.get(c, 0) + n
        if self.hyp_rej is None:
            rej = o.hyp_rej
        elif o.hyp_rej is None:
            rej = self.hyp_rej
        else:
            w = max(self.hyp_rej.size, o.hyp_rej.size)
            rej = np.zeros(w, np.int64)
            rej[: self.hyp_rej.size] += self.hyp_rej
            rej[: o.hyp_rej.size] += o.hyp_rej
        return AnalysisTally(self.reps + o.reps, counts, self.n_used + o.n_used, self.n_fit_trouble + o.n_fit_trouble,
                             self.rejections + o.rejections, self.est.merge(o.est), self.se2.merge(o.se2),
                             self.n_ci + o.n_ci, self.covered + o.covered, self.hyp_n + o.hyp_n, rej,
                             self.hyp_any + o.hyp_any, self.hyp_all + o.hyp_all)


def tally_analysis(rec: dict[str, np.ndarray], causes: list[str], alpha: float, fit_trouble: str,
                   true_effect: float | None) -> AnalysisTally:
    """The tally of one analysis' records in one chunk (same rules as ``summarize_records``)."""
    status = rec["status"]
    pvalue = rec["pvalue"]
    t = AnalysisTally(reps=int(pvalue.size))
    is_warning = np.zeros(pvalue.size, bool)
    for code in np.unique(status[status > 0]):
        cause = causes[int(code) - 1]
        m = status == code
        t.counts[cause] = t.counts.get(cause, 0) + int(m.sum())
        if cause.startswith(WARNING_PREFIX):
            is_warning |= m
    failed = status > 0 if fit_trouble == "failure" else (status > 0) & ~is_warning
    used = ~failed
    reject = (pvalue <= alpha) & np.isfinite(pvalue) & used
    if fit_trouble == "nonrejection":
        reject &= ~is_warning
    t.n_used = int(used.sum())
    t.n_fit_trouble = int(is_warning.sum())
    t.rejections = int(reject.sum())
    keep = used & ~is_warning  # estimates of fits that warned are unreliable under either policy
    est = rec["estimate"][keep]
    t.est = Moments.of(est[np.isfinite(est)])
    se = rec["se"][keep]
    se = se[np.isfinite(se)]
    t.se2 = Moments.of(se * se)
    lo, hi = rec["ci_low"][keep], rec["ci_high"][keep]
    ok = np.isfinite(lo) & np.isfinite(hi)
    t.n_ci = int(ok.sum())
    if true_effect is not None and math.isfinite(true_effect):
        t.covered = int(((lo[ok] <= true_effect) & (true_effect <= hi[ok])).sum())
    if "pvalues" in rec:
        clean = status == 0
        rej = rec["pvalues"][clean] <= alpha
        t.hyp_n = int(clean.sum())
        t.hyp_rej = rej.sum(axis=0).astype(np.int64)
        t.hyp_any = int(rej.any(axis=1).sum())
        t.hyp_all = int(rej.all(axis=1).sum())
    return t


def tally_pairs(out_records: dict[str, dict[str, np.ndarray]], alpha: float) -> dict[tuple[str, str], list[int]]:
    """Discordant counts [a only, b only, n both clean] of each two analyses in one chunk."""
    names = list(out_records)
    rej = {n: out_records[n]["pvalue"] <= alpha for n in names}
    ok = {n: out_records[n]["status"] == 0 for n in names}
    pairs = {}
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            both = ok[a] & ok[b]
            ra, rb = rej[a] & both, rej[b] & both
            pairs[(a, b)] = [int((ra & ~rb).sum()), int((~ra & rb).sum()), int(both.sum())]
    return pairs


def _rate(k: int, n: int) -> tuple[float, float, float, float]:
    p = k / n if n else math.nan
    lo, hi = wilson_interval(k, n)
    return p, (math.sqrt(p * (1 - p) / n) if n else math.nan), lo, hi


def summary_of(t: AnalysisTally, fit_trouble: str, true_effect: float | None) -> dict[str, Any]:
    """The summary dict :func:`simpower.summaries.summarize_records` would give, from a folded tally."""
    power, mcse, lo, hi = _rate(t.rejections, t.n_used)
    alln, alln_mcse, _, _ = _rate(t.rejections, t.reps)
    out: dict[str, Any] = {
        "reps": t.reps, "n_ok": t.n_used, "n_failed": t.reps - t.n_used, "n_fit_trouble": t.n_fit_trouble,
        "failures": dict(t.counts), "power": power, "mcse": mcse, "ci_low": lo, "ci_high": hi,
        "rejections": t.rejections, "power_failures_as_nonrejections": alln,
        "power_failures_as_nonrejections_mcse": alln_mcse, "fit_trouble_policy": fit_trouble,
    }
    n = t.est.n
    out["n_estimate"] = n
    if n == 0:
        return out
    emp = math.sqrt(t.est.var()) if n > 1 else math.nan
    out["mean_estimate"] = t.est.mean
    out["mean_estimate_mcse"] = emp / math.sqrt(n) if n > 1 else math.nan
    out["empirical_se"] = emp
    out["empirical_se_mcse"] = emp / math.sqrt(2 * (n - 1)) if n > 1 else math.nan
    has_truth = true_effect is not None and math.isfinite(true_effect)
    if has_truth:
        out["bias"] = t.est.mean - true_effect
        out["bias_mcse"] = out["mean_estimate_mcse"]
    out["n_se"] = t.se2.n
    if t.se2.n > 1:
        mod = math.sqrt(t.se2.mean)
        out["model_se"] = mod
        out["model_se_mcse"] = math.sqrt(t.se2.var() / (4 * t.se2.n * mod * mod)) if mod > 0 else math.nan
        if n > 1 and emp > 0:
            out["relative_error_model_se"] = mod / emp - 1
    out["n_ci"] = t.n_ci
    if has_truth and t.n_ci:
        c = t.covered / t.n_ci
        out["coverage"] = c
        out["coverage_mcse"] = math.sqrt(c * (1 - c) / t.n_ci)
    return out


def true_effect_of(scenario, name: str) -> float | None:
    """The true value of what analysis ``name`` estimates (as the in-memory summaries use it)."""
    per = getattr(scenario, "true_effect_for", None)
    return per(name) if per is not None else scenario.true_effect


class PointTally:
    """Chunk tallies of one grid point, folded in chunk order.

    Chunks that arrive in order are folded at once (the prefix); only chunks
    that arrive ahead of a missing one wait in ``chunks``. So memory does not
    grow with the number of chunks, and the folding order -- hence every bit
    of the result -- is chunk order whatever the arrival order.
    """

    def __init__(self, scenario, fit_trouble: str):
        self.analyses = list(scenario.analyses)
        self.alpha, self.fit_trouble = scenario.alpha, fit_trouble
        self.truth = {name: true_effect_of(scenario, name) for name in self.analyses}
        #: chunks waiting for an earlier one, by chunk index
        self.chunks: dict[int, tuple[dict[str, AnalysisTally], dict]] = {}
        self._prefix = ({name: AnalysisTally() for name in self.analyses}, {})
        self._next = 0

    def add(self, out) -> None:
        per = {name: tally_analysis(rec, out.causes, self.alpha, self.fit_trouble, self.truth[name])
               for name, rec in out.records.items() if name in self.analyses}
        self.chunks[out.chunk] = (per, tally_pairs({n: out.records[n] for n in self.analyses
                                                    if n in out.records}, self.alpha))
        while self._next in self.chunks:
            self._prefix = self._fold(self._prefix, self.chunks.pop(self._next))
            self._next += 1

    @staticmethod
    def _fold(acc, chunk):
        tallies, pairs = dict(acc[0]), {k: list(v) for k, v in acc[1].items()}
        per, pr = chunk
        for name, t in per.items():
            tallies[name] = tallies[name].merge(t)
        for key, v in pr.items():
            got = pairs.setdefault(key, [0, 0, 0])
            for j in range(3):
                got[j] += v[j]
        return tallies, pairs

    def folded(self) -> tuple[dict[str, AnalysisTally], dict[tuple[str, str], list[int]]]:
        acc = self._prefix
        for k in sorted(self.chunks):
            acc = self._fold(acc, self.chunks[k])
        return acc


class _MissingRecords(dict):
    """Stands for ``result.records`` when per-replicate records were not kept in memory."""

    def __init__(self, causes, messages, hypotheses, store_path):
        super().__init__()
        self._info = (causes, messages, hypotheses, store_path)

    def _fail(self, *a, **k):
        where = (f" They are in the run store {self._info[3]}: simpower.engine.open_store(path).records(point)."
                 if self._info[3] else " Give a store to keep them on disk, or keep_records=True.")
        raise RunError("per-replicate records were not kept in memory (keep_records=False)." + where)

    __getitem__ = _fail
    values = _fail


class _Messages:
    def __init__(self, messages):
        self.messages = messages


class StreamedResult(RunResult):
    """A :class:`~simpower.result.RunResult` built from chunk tallies instead of per-replicate arrays.

    Summaries, comparisons and per-hypothesis powers are the same quantities;
    ``records`` is unavailable (read them from the run store) unless given
    (records spooled to disk, :mod:`simpower.engine.spool`).
    """

    def __init__(self, scenario, reps, seed, chunk_size, tally: PointTally, causes, messages, paths, seconds,
                 fit_trouble="failure", n_jobs=None, backend=None, point=0, chunk_seconds=0.0, hypotheses=None,
                 store_path=None, extra=None, records=None):
        # the base class sets the common attributes (no records: no summaries computed there)
        super().__init__(scenario, reps, seed, chunk_size, {}, paths, seconds, fit_trouble, n_jobs=n_jobs,
                         backend=backend, point=point, chunk_seconds=chunk_seconds, extra=extra)
        self.store_path = store_path
        hypotheses = hypotheses or {}
        self.records = records if records is not None else _MissingRecords(causes, messages, hypotheses, store_path)
        self._messages = messages
        tallies, self._pairs = tally.folded()
        self.summaries = {}
        for name, t in tallies.items():
            truth = tally.truth[name]
            s = summary_of(t, fit_trouble, truth)
            s["true_effect"] = truth
            self._cross_check(name, s)
            if t.hyp_rej is not None:
                s["per_hypothesis"] = self._hypotheses_of(t, hypotheses.get(name, []))
            self.summaries[name] = s

    @staticmethod
    def _hypotheses_of(t: AnalysisTally, labels) -> dict[str, Any]:
        n = max(t.hyp_n, 1)
        out = {}
        for j, k in enumerate(t.hyp_rej):
            p = float(k) / n
            out[labels[j] if j < len(labels) else str(j)] = {"power": p, "mcse": math.sqrt(p * (1 - p) / n)}
        for label, k in (("any", t.hyp_any), ("all", t.hyp_all)):
            p = k / n
            out[label] = {"power": p, "mcse": math.sqrt(p * (1 - p) / n)}
        return out

    def compare(self, a: str, b: str) -> dict[str, float]:
        if (a, b) in self._pairs:
            only_a, only_b, n = self._pairs[(a, b)]
        elif (b, a) in self._pairs:
            only_b, only_a, n = self._pairs[(b, a)]
        else:
            raise KeyError(f"no analyses {a!r} and {b!r} in this result")
        # the paired-proportion difference of summaries.paired_difference, from its counts
        d = (only_a - only_b) / n if n else math.nan
        var = (only_a + only_b - (only_a - only_b) ** 2 / n) / n**2 if n else math.nan
        out = {"difference": d, "mcse": math.sqrt(max(var, 0.0)) if n else math.nan,
               "discordant_a_only": only_a, "discordant_b_only": only_b, "n": n}
        out.update({"a": a, "b": b})
        return out

    def comparisons(self) -> list[dict[str, float]]:
        names = list(self.summaries)
        return [self.compare(names[0], other) for other in names[1:]]

    def records_frame(self, analysis=None):
        if not isinstance(self.records, _MissingRecords):
            return super().records_frame(analysis)
        self.records._fail()

    def to_dict(self):
        if not isinstance(self.records, _MissingRecords):
            return super().to_dict()
        saved = self.records
        self.records = {n: _Messages(self._messages) for n in self.summaries} if self._messages else {}
        try:
            return super().to_dict()
        finally:
            self.records = saved

    def __str__(self) -> str:
        if not isinstance(self.records, _MissingRecords):
            return super().__str__()
        saved = self.records
        self.records = {n: _Messages(self._messages) for n in self.summaries}
        try:
            return super().__str__()
        finally:
            self.records = saved
