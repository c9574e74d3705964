"""Performance measures of a simulation study, each with its Monte Carlo SE: the one summary path.

Every summary simpower shows -- of a run held in memory, of a run too large to
keep, of a run store, of each grid point of a sweep or search -- is computed
the same way: each chunk of replicates is reduced to policy-free sufficient
statistics where it ran (in the worker: :func:`chunk_statistics`; :class:`AnalysisStats`: counts by failure cause, rejections among
clean replicates, moments of the estimates and of the squared SEs, coverage
counts, per-hypothesis counts, and the discordant pairs of each two analyses),
the chunk statistics of a grid point are folded in chunk order
(:class:`PointStats`), so the result does not depend on the order in which
chunks finished, and :func:`finalise` turns the folded statistics into an
:class:`AnalysisSummary` under the run's fit-trouble policy.

Formulas follow Morris, White & Crowther (2019), "Using simulation studies to
evaluate statistical methods", Statistics in Medicine 38:2074-2102, Table 6:

* rejection rate (power or type I error) p, MCSE sqrt(p(1-p)/R);
* bias = mean(est) - theta, MCSE = empSE / sqrt(R);
* empirical SE = sd(est), MCSE = empSE / sqrt(2(R-1));
* model SE = sqrt(mean(se^2)), MCSE = sqrt(var(se^2) / (4 R modSE^2));
* coverage c, MCSE sqrt(c(1-c)/R).

Intervals for a proportion are Wilson score intervals (Wilson 1927, JASA).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

#: cause prefixes, see :mod:`simpower.engine.chunk`
WARNING_PREFIX = "warning:"


def wilson_interval(successes: float, n: float, level: float = 0.95) -> tuple[float, float]:
    """Wilson score interval for a binomial proportion.

    Examples
    --------
    >>> lo, hi = wilson_interval(80, 100)
    >>> round(lo, 3), round(hi, 3)
    (0.711, 0.867)
    """
    if n <= 0:
        return (math.nan, math.nan)
    from scipy import stats  # here: workers reduce chunks without scipy.stats

    z = stats.norm.ppf(0.5 + level / 2)
    p = successes / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return (max(0.0, centre - half), min(1.0, centre + half))


def mcse_target_reps(p: float, target_mcse: float) -> int:
    """Replicates needed for a rejection rate ``p`` to have MCSE ``target_mcse``.

    R = p(1-p)/MCSE^2 (Morris, White & Crowther 2019, section 5.3).

    Examples
    --------
    >>> mcse_target_reps(0.5, 0.005)
    10000
    """
    return int(math.ceil(p * (1 - p) / target_mcse**2 - 1e-9))


def paired_difference(reject_a: np.ndarray, reject_b: np.ndarray) -> dict[str, float]:
    """Difference in rejection rate of two analyses on the same data sets.

    With b = #(A rejects, B does not) and c = #(B rejects, A does not) over R
    common replicates, the difference is (b - c)/R with
    MCSE = sqrt(b + c - (b - c)^2/R) / R, the SE of a difference of paired
    proportions (e.g. Agresti 2013, Categorical Data Analysis, section 11.1.1).
    """
    a = np.asarray(reject_a, bool)
    bb = np.asarray(reject_b, bool)
    r = a.size
    b = int(np.count_nonzero(a & ~bb))
    c = int(np.count_nonzero(~a & bb))
    d = (b - c) / r if r else math.nan
    var = (b + c - (b - c) ** 2 / r) / r**2 if r else math.nan
    return {"difference": d, "mcse": math.sqrt(max(var, 0.0)), "discordant_a_only": b,
            "discordant_b_only": c, "n": r}


def bradley_liberal(rate: float, alpha: float) -> bool:
    """Bradley's (1978, Br J Math Stat Psychol) liberal criterion: 0.5 alpha <= rate <= 1.5 alpha."""
    return 0.5 * alpha <= rate <= 1.5 * alpha




# ---------------------------------------------------------------------------
# typed results
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class RejectionRate:
    """A rejection rate (power or type I error): ``rejections`` of ``n`` replicates.

    Examples
    --------
    >>> r = RejectionRate(80, 100)
    >>> r.rate, round(r.mcse, 4), tuple(round(x, 3) for x in r.interval())
    (0.8, 0.04, (0.711, 0.867))
    """

    rejections: int
    n: int

    @property
    def rate(self) -> float:
        return self.rejections / self.n if self.n else math.nan

    @property
    def mcse(self) -> float:
        """sqrt(p(1-p)/R) (Morris, White & Crowther 2019, Table 6)."""
        p = self.rate
        return math.sqrt(p * (1 - p) / self.n) if self.n else math.nan

    def interval(self, level: float = 0.95) -> tuple[float, float]:
        """Wilson score interval at ``level``."""
        return wilson_interval(self.rejections, self.n, level)


@dataclass(frozen=True)
class EstimatePerformance:
    """Bias, empirical and model SE and coverage of an analysis' estimates, with MCSEs.

    Measures that cannot be computed (no true value, fewer than two
    estimates) are None. Formulas: Morris, White & Crowther (2019), Table 6.
    """

    n_estimate: int
    mean: float | None = None
    mean_mcse: float | None = None
    empirical_se: float | None = None
    empirical_se_mcse: float | None = None
    bias: float | None = None
    bias_mcse: float | None = None
    n_se: int = 0
    model_se: float | None = None
    model_se_mcse: float | None = None
    relative_error_model_se: float | None = None
    n_ci: int = 0
    coverage: float | None = None
    coverage_mcse: float | None = None

    def row(self) -> dict[str, Any]:
        """The measures under the column names of a summary table (absent ones left out)."""
        out: dict[str, Any] = {"n_estimate": self.n_estimate}
        if self.mean is None:
            return out
        out.update({"mean_estimate": self.mean, "mean_estimate_mcse": self.mean_mcse,
                    "empirical_se": self.empirical_se, "empirical_se_mcse": self.empirical_se_mcse})
        if self.bias is not None:
            out.update({"bias": self.bias, "bias_mcse": self.bias_mcse})
        out["n_se"] = self.n_se
        if self.model_se is not None:
            out.update({"model_se": self.model_se, "model_se_mcse": self.model_se_mcse})
            if self.relative_error_model_se is not None:
                out["relative_error_model_se"] = self.relative_error_model_se
        out["n_ci"] = self.n_ci
        if self.coverage is not None:
            out.update({"coverage": self.coverage, "coverage_mcse": self.coverage_mcse})
        return out


class AnalysisSummary(dict):
    """The summary of one analysis: a dict of named figures (a table row) with typed views.

    ``power`` (a :class:`RejectionRate` among usable replicates),
    ``power_all`` (failures counted as non-rejections), ``estimates`` (an
    :class:`EstimatePerformance`) and ``failure_counts`` (cause -> count) are
    the typed values; the dict keys are the flat table row built from them
    (``"power"``, ``"mcse"``, ``"ci_low"``... as in every table and JSON file).
    """

    rejection: RejectionRate
    rejection_all: RejectionRate
    estimates: EstimatePerformance
    failure_counts: dict[str, int]

    def row(self) -> dict[str, Any]:
        """A flat table row: failures joined as 'cause xN', per-hypothesis figures left out."""
        out: dict[str, Any] = {}
        for k, v in self.items():
            if k == "failures":
                out["failures"] = "; ".join(f"{c} x{n}" for c, n in v.items())
            elif k != "per_hypothesis":
                out[k] = v
        return out


# ---------------------------------------------------------------------------
# sufficient statistics of a chunk, merged in chunk order
# ---------------------------------------------------------------------------
@dataclass
class Moments:
    """Count, mean and sum of squared deviations of a sample.

    Merged with the pairwise update of Chan, Golub & LeVeque (1983, "Algorithms
    for computing the sample variance", The American Statistician 37:242-247).
    """

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
class AnalysisStats:
    """Sufficient statistics of one analysis over some replicates, whatever the fit-trouble policy.

    Estimate measures and per-hypothesis counts use the clean replicates
    only (a fit that warned has no trustworthy estimate), under either
    policy; the policy decides at :func:`finalise` whether fit trouble is a
    failure or a non-rejection.
    """

    reps: int = 0
    counts: dict[str, int] = field(default_factory=dict)
    n_clean: int = 0
    n_warning: int = 0
    rejections: int = 0
    est: Moments = field(default_factory=Moments)
    se2: Moments = field(default_factory=Moments)
    n_ci: int = 0
    covered: int = 0
    hyp_n: int = 0
    hyp_rej: np.ndarray | None = None
    hyp_any: int = 0
    hyp_all: int = 0

    @classmethod
    def of(cls, rec: dict[str, np.ndarray], causes: list[str], alpha: float,
           true_effect: float | None) -> "AnalysisStats":
        """The statistics of one chunk's records (``status`` codes index ``causes``, 1-based)."""
        status = np.asarray(rec["status"])
        pvalue = rec["pvalue"]
        t = cls(reps=int(pvalue.size))
        is_warning = np.zeros(pvalue.size, bool)
        for code in np.unique(status[status > 0]):
            cause = causes[int(code) - 1]
            m = status == code
            t.counts[cause] = t.counts.get(cause, 0) + int(m.sum())
            if cause.startswith(WARNING_PREFIX):
                is_warning |= m
        clean = status == 0
        t.n_clean = int(clean.sum())
        t.n_warning = int(is_warning.sum())
        t.rejections = int(((pvalue <= alpha) & np.isfinite(pvalue) & clean).sum())
        est = rec["estimate"][clean]
        t.est = Moments.of(est[np.isfinite(est)])
        se = rec["se"][clean]
        se = se[np.isfinite(se)]
        t.se2 = Moments.of(se * se)
        lo, hi = rec["ci_low"][clean], rec["ci_high"][clean]
        ok = np.isfinite(lo) & np.isfinite(hi)
        t.n_ci = int(ok.sum())
        if true_effect is not None and math.isfinite(true_effect):
            t.covered = int(((lo[ok] <= true_effect) & (true_effect <= hi[ok])).sum())
        pvalues = rec.get("pvalues")
        if pvalues is not None:
            rej = pvalues[clean] <= alpha
            t.hyp_n = t.n_clean
            t.hyp_rej = rej.sum(axis=0).astype(np.int64)
            t.hyp_any = int(rej.any(axis=1).sum())
            t.hyp_all = int(rej.all(axis=1).sum())
        return t

    @property
    def n_hard(self) -> int:
        """Replicates that failed for a reason other than fit trouble."""
        return self.reps - self.n_clean - self.n_warning

    def merge(self, o: "AnalysisStats") -> "AnalysisStats":
        counts = dict(self.counts)
        for c, n in o.counts.items():
            counts[c] = counts.get(c, 0) + n
        if self.hyp_rej is None or o.hyp_rej is None:
            rej = self.hyp_rej if o.hyp_rej is None else o.hyp_rej
        else:
            rej = np.zeros(max(self.hyp_rej.size, o.hyp_rej.size), np.int64)
            rej[: self.hyp_rej.size] += self.hyp_rej
            rej[: o.hyp_rej.size] += o.hyp_rej
        return AnalysisStats(self.reps + o.reps, counts, self.n_clean + o.n_clean, self.n_warning + o.n_warning,
                             self.rejections + o.rejections, self.est.merge(o.est), self.se2.merge(o.se2),
                             self.n_ci + o.n_ci, self.covered + o.covered, self.hyp_n + o.hyp_n, rej,
                             self.hyp_any + o.hyp_any, self.hyp_all + o.hyp_all)


def pair_counts(records: dict[str, dict[str, np.ndarray]], alpha: float) -> dict[tuple[str, str], list[int]]:
    """Discordant counts [a only, b only, both clean] of each two analyses on the same replicates."""
    names = list(records)
    rej = {n: records[n]["pvalue"] <= alpha for n in names}
    ok = {n: np.asarray(records[n]["status"]) == 0 for n in names}
    pairs = {}
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            both = ok[a] & ok[b]
            ra, rb = rej[a] & both, rej[b] & both
            pairs[(a, b)] = [int((ra & ~rb).sum()), int((~ra & rb).sum()), int(both.sum())]
    return pairs


def true_effect_of(scenario, name: str) -> float | None:
    """The true value of what analysis ``name`` estimates (None: no bias or coverage)."""
    per = getattr(scenario, "true_effect_for", None)
    return per(name) if per is not None else scenario.true_effect


def chunk_statistics(scenario, records: dict[str, dict[str, np.ndarray]], causes: list[str]) -> tuple:
    """One chunk's statistics per analysis and its discordant pairs (computed by the worker that ran it)."""
    alpha = scenario.alpha
    per = {name: AnalysisStats.of(rec, causes, alpha, true_effect_of(scenario, name))
           for name, rec in records.items() if name in scenario.analyses}
    return per, pair_counts({n: records[n] for n in scenario.analyses if n in records}, alpha)


class PointStats:
    """Chunk statistics of one grid point, folded in chunk order.

    ``add`` takes chunks in any order (parallel workers, a resumed store).
    Chunks that arrive in order are folded at once (the prefix); only chunks
    that finished ahead of an earlier one wait, so memory does not grow with
    the number of chunks. The fold is always in chunk order, so a point's
    summaries are the same to the last bit for any number of jobs, executor
    or interruption history, and whether its records are held in memory,
    spooled or only in a store.
    """

    def __init__(self, scenario):
        self.analyses = list(scenario.analyses)
        self.alpha = scenario.alpha
        self.truth = {name: true_effect_of(scenario, name) for name in self.analyses}
        #: chunks waiting for an earlier one, by chunk index
        self.waiting: dict[int, tuple[dict[str, AnalysisStats], dict]] = {}
        self._prefix: tuple[dict[str, AnalysisStats], dict] = ({n: AnalysisStats() for n in self.analyses}, {})
        self._next = 0

    def add_records(self, chunk: int, records: dict[str, dict[str, np.ndarray]],
                    causes: list[str]) -> dict[str, AnalysisStats]:
        """Add chunk ``chunk``'s records (per analysis: pvalue, estimate, se, ci_low, ci_high, status);
        returns the chunk's statistics per analysis."""
        per = {name: AnalysisStats.of(rec, causes, self.alpha, self.truth[name])
               for name, rec in records.items() if name in self.truth}
        return self._add(chunk, per, pair_counts({n: records[n] for n in self.analyses if n in records}, self.alpha))

    def add(self, out) -> dict[str, AnalysisStats]:
        """Add a finished chunk (a :class:`simpower.engine.chunk.ChunkOutput`): its statistics as the
        worker computed them, or computed here for a chunk read back from a store."""
        if getattr(out, "stats", None) is None:
            return self.add_records(out.chunk, out.records, out.causes)
        return self._add(out.chunk, *out.stats)

    def _add(self, chunk: int, per: dict[str, AnalysisStats], pairs: dict) -> dict[str, AnalysisStats]:
        self.waiting[chunk] = (per, pairs)
        while self._next in self.waiting:
            self._prefix = self._fold(self._prefix, self.waiting.pop(self._next))
            self._next += 1
        return per

    @classmethod
    def from_records(cls, scenario, records, chunk_size: int) -> "PointStats":
        """The statistics of assembled per-replicate records, cut into the plan's chunks."""
        st = cls(scenario)
        reps = next(iter(records.values())).pvalue.size if records else 0
        for k, start in enumerate(range(0, reps, max(int(chunk_size), 1))):
            stop = min(start + chunk_size, reps)
            part = {}
            for name, r in records.items():
                part[name] = {"pvalue": r.pvalue[start:stop], "estimate": r.estimate[start:stop],
                              "se": r.se[start:stop], "ci_low": r.ci_low[start:stop],
                              "ci_high": r.ci_high[start:stop], "status": r.status[start:stop]}
                if r.pvalues is not None:
                    part[name]["pvalues"] = r.pvalues[start:stop]
            st.add_records(k, part, list(next(iter(records.values())).causes))
        return st

    @staticmethod
    def _fold(acc, chunk):
        stats, pairs = dict(acc[0]), {k: list(v) for k, v in acc[1].items()}
        per, pr = chunk
        for name, t in per.items():
            stats[name] = stats[name].merge(t)
        for key, v in pr.items():
            got = pairs.setdefault(key, [0, 0, 0])
            for j in range(3):
                got[j] += v[j]
        return stats, pairs

    def folded(self) -> tuple[dict[str, AnalysisStats], dict[tuple[str, str], list[int]]]:
        """All chunks so far, folded in chunk order (chunks after a gap follow in their order)."""
        acc = self._prefix
        for k in sorted(self.waiting):
            acc = self._fold(acc, self.waiting[k])
        return acc


# ---------------------------------------------------------------------------
# finalisation
# ---------------------------------------------------------------------------
def _estimates(t: AnalysisStats, true_effect: float | None) -> EstimatePerformance:
    n = t.est.n
    if n == 0:
        return EstimatePerformance(0)
    emp = math.sqrt(t.est.var()) if n > 1 else math.nan
    mean_mcse = emp / math.sqrt(n) if n > 1 else math.nan
    has_truth = true_effect is not None and math.isfinite(true_effect)
    kw: dict[str, Any] = dict(n_estimate=n, mean=t.est.mean, mean_mcse=mean_mcse, empirical_se=emp,
                              empirical_se_mcse=emp / math.sqrt(2 * (n - 1)) if n > 1 else math.nan,
                              n_se=t.se2.n, n_ci=t.n_ci)
    if has_truth:
        kw.update(bias=t.est.mean - true_effect, bias_mcse=mean_mcse)
    if t.se2.n > 1:
        mod = math.sqrt(t.se2.mean)
        kw["model_se"] = mod
        kw["model_se_mcse"] = math.sqrt(t.se2.var() / (4 * t.se2.n * mod * mod)) if mod > 0 else math.nan
        if n > 1 and emp > 0:
            kw["relative_error_model_se"] = mod / emp - 1
    if has_truth and t.n_ci:
        c = t.covered / t.n_ci
        kw.update(coverage=c, coverage_mcse=math.sqrt(c * (1 - c) / t.n_ci))
    return EstimatePerformance(**kw)


def hypotheses_summary(t: AnalysisStats, labels) -> dict[str, Any]:
    """Power of each hypothesis of a several-hypothesis analysis, and of any / all of them."""
    n = max(t.hyp_n, 1)
    out = {}
    for j, k in enumerate(t.hyp_rej):
        p = float(k) / n
        out[labels[j] if j < len(labels) else str(j)] = {"power": p, "mcse": math.sqrt(p * (1 - p) / n)}
    for label, k in (("any", t.hyp_any), ("all", t.hyp_all)):
        p = k / n
        out[label] = {"power": p, "mcse": math.sqrt(p * (1 - p) / n)}
    return out


def check_fit_trouble(fit_trouble: str) -> str:
    if fit_trouble not in ("failure", "nonrejection"):
        raise ValueError(f"`fit_trouble` must be 'failure' or 'nonrejection'; got {fit_trouble!r}.")
    return fit_trouble


def finalise(t: AnalysisStats, fit_trouble: str = "failure", true_effect: float | None = None,
             hypotheses=None) -> AnalysisSummary:
    """The summary of folded statistics under a fit-trouble policy.

    Under ``fit_trouble="failure"`` fit trouble (causes ``warning:<Type>``) is
    a failure, left out of the power's denominator; under ``"nonrejection"``
    it stays in the denominator as a non-rejection. Other causes (exceptions,
    invalid p-values) are always failures. Both figures are reported:
    ``power`` (failures left out) and ``power_failures_as_nonrejections``.
    """
    check_fit_trouble(fit_trouble)
    n_used = t.n_clean + (t.n_warning if fit_trouble == "nonrejection" else 0)
    head = RejectionRate(t.rejections, n_used)
    alln = RejectionRate(t.rejections, t.reps)
    lo, hi = head.interval()
    est = _estimates(t, true_effect)
    s = AnalysisSummary({
        "reps": t.reps, "n_ok": n_used, "n_failed": t.reps - n_used, "n_fit_trouble": t.n_warning,
        "failures": dict(t.counts), "power": head.rate, "mcse": head.mcse, "ci_low": lo, "ci_high": hi,
        "rejections": t.rejections, "power_failures_as_nonrejections": alln.rate,
        "power_failures_as_nonrejections_mcse": alln.mcse, "fit_trouble_policy": fit_trouble,
        **est.row(),
    })
    s.rejection, s.rejection_all, s.estimates, s.failure_counts = head, alln, est, dict(t.counts)
    if t.hyp_rej is not None:
        s["per_hypothesis"] = hypotheses_summary(t, hypotheses or [])
    return s


def paired_from_counts(only_a: int, only_b: int, n: int) -> dict[str, float]:
    """The paired difference of :func:`paired_difference` from its discordant counts."""
    d = (only_a - only_b) / n if n else math.nan
    var = (only_a + only_b - (only_a - only_b) ** 2 / n) / n**2 if n else math.nan
    return {"difference": d, "mcse": math.sqrt(max(var, 0.0)) if n else math.nan,
            "discordant_a_only": only_a, "discordant_b_only": only_b, "n": n}


def summarize_records(pvalue: np.ndarray, status: np.ndarray, causes: list[str], alpha: float,
                      fit_trouble: str = "failure", estimate=None, se=None, ci_low=None, ci_high=None,
                      true_effect: float | None = None) -> AnalysisSummary:
    """Summary of one analysis' per-replicate arrays taken as one chunk (same rules as every summary)."""
    nan = np.full(np.size(pvalue), np.nan)
    rec = {"pvalue": np.asarray(pvalue, float), "status": np.asarray(status),
           "estimate": nan if estimate is None else np.asarray(estimate, float),
           "se": nan if se is None else np.asarray(se, float),
           "ci_low": nan if ci_low is None else np.asarray(ci_low, float),
           "ci_high": nan if ci_high is None else np.asarray(ci_high, float)}
    out = finalise(AnalysisStats.of(rec, list(causes), alpha, true_effect), fit_trouble, true_effect)
    if estimate is None:
        for k in [k for k in out if k not in _RATE_KEYS]:
            del out[k]
    return out


_RATE_KEYS = ("reps", "n_ok", "n_failed", "n_fit_trouble", "failures", "power", "mcse", "ci_low", "ci_high",
              "rejections", "power_failures_as_nonrejections", "power_failures_as_nonrejections_mcse",
              "fit_trouble_policy")
