"""Performance measures of a simulation study, each with its Monte Carlo SE.

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
from typing import Any

import numpy as np
from scipy import stats

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
    z = stats.norm.ppf(0.5 + level / 2)
    p = successes / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return (max(0.0, centre - half), min(1.0, centre + half))


def rejection_summary(reject: np.ndarray, level: float = 0.95) -> dict[str, float]:
    """Rate, MCSE and Wilson interval of a boolean array of rejections."""
    r = int(reject.size)
    k = int(np.count_nonzero(reject))
    p = k / r if r else math.nan
    lo, hi = wilson_interval(k, r, level)
    return {
        "rejections": k,
        "n": r,
        "rate": p,
        "mcse": math.sqrt(p * (1 - p) / r) if r else math.nan,
        "ci_low": lo,
        "ci_high": hi,
    }


def mcse_target_reps(p: float, target_mcse: float) -> int:
    """Replicates needed for a rejection rate ``p`` to have MCSE ``target_mcse``.

    R = p(1-p)/MCSE^2 (Morris, White & Crowther 2019, section 5.3).

    Examples
    --------
    >>> mcse_target_reps(0.5, 0.005)
    10000
    """
    return int(math.ceil(p * (1 - p) / target_mcse**2 - 1e-9))


def estimate_summary(estimate: np.ndarray, se: np.ndarray, ci_low: np.ndarray, ci_high: np.ndarray,
                     true_effect: float | None) -> dict[str, float]:
    """Mean estimate, bias, empirical SE, model SE and coverage with their MCSEs.

    Replicates with a non-finite estimate are left out of each measure; the
    counts used are reported as ``n_estimate``, ``n_se`` and ``n_ci``.
    """
    out: dict[str, float] = {}
    est = estimate[np.isfinite(estimate)]
    n = est.size
    out["n_estimate"] = n
    if n == 0:
        return out
    mean = float(est.mean())
    emp = float(est.std(ddof=1)) if n > 1 else math.nan
    out["mean_estimate"] = mean
    out["mean_estimate_mcse"] = emp / math.sqrt(n) if n > 1 else math.nan
    out["empirical_se"] = emp
    out["empirical_se_mcse"] = emp / math.sqrt(2 * (n - 1)) if n > 1 else math.nan
    if true_effect is not None and math.isfinite(true_effect):
        out["bias"] = mean - true_effect
        out["bias_mcse"] = out["mean_estimate_mcse"]
    s = se[np.isfinite(se)]
    out["n_se"] = s.size
    if s.size > 1:
        s2 = s * s
        mod = math.sqrt(float(s2.mean()))
        out["model_se"] = mod
        out["model_se_mcse"] = math.sqrt(float(s2.var(ddof=1)) / (4 * s.size * mod * mod)) if mod > 0 else math.nan
        if n > 1 and emp > 0:
            out["relative_error_model_se"] = mod / emp - 1
    ok = np.isfinite(ci_low) & np.isfinite(ci_high)
    out["n_ci"] = int(ok.sum())
    if true_effect is not None and math.isfinite(true_effect) and ok.any():
        cover = (ci_low[ok] <= true_effect) & (true_effect <= ci_high[ok])
        c = float(cover.mean())
        out["coverage"] = c
        out["coverage_mcse"] = math.sqrt(c * (1 - c) / ok.sum())
    return out


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


def summarize_records(pvalue: np.ndarray, status: np.ndarray, causes: list[str], alpha: float,
                      fit_trouble: str = "failure", estimate=None, se=None, ci_low=None, ci_high=None,
                      true_effect: float | None = None) -> dict[str, Any]:
    """Summary of one analysis over R replicates.

    ``status`` is 0 for a clean replicate, else an index into ``causes``
    (1-based). Causes starting with ``"warning:"`` are fit trouble: under
    ``fit_trouble="failure"`` they are failures; under ``"nonrejection"`` they
    stay in the denominator as non-rejections. Other causes (exceptions,
    non-finite p-values) are always failures. Both figures are reported:
    ``power`` (failures left out) and ``power_failures_as_nonrejections``.
    Estimate measures (bias, SEs, coverage) leave out every replicate with a
    cause, fit trouble included, under either policy: a fit that warned
    (e.g. a non-converged logistic fit at +-23) has no trustworthy estimate.
    """
    r = pvalue.size
    status = np.asarray(status)
    is_warning = np.zeros(r, bool)
    counts: dict[str, int] = {}
    for code in np.unique(status[status > 0]):
        cause = causes[int(code) - 1]
        m = status == code
        counts[cause] = int(m.sum())
        if cause.startswith(WARNING_PREFIX):
            is_warning |= m
    hard = (status > 0) & ~is_warning
    if fit_trouble == "failure":
        failed = status > 0
    elif fit_trouble == "nonrejection":
        failed = hard
    else:
        raise ValueError(f"`fit_trouble` must be 'failure' or 'nonrejection'; got {fit_trouble!r}.")
    reject = (pvalue <= alpha) & np.isfinite(pvalue)
    used = ~failed
    reject_used = reject & used
    if fit_trouble == "nonrejection":
        reject_used = reject_used & ~is_warning
    head = rejection_summary(reject_used[used])
    alln = rejection_summary(reject_used)
    out: dict[str, Any] = {
        "reps": r,
        "n_ok": int(used.sum()),
        "n_failed": int(failed.sum()),
        "n_fit_trouble": int(is_warning.sum()),
        "failures": counts,
        "power": head["rate"],
        "mcse": head["mcse"],
        "ci_low": head["ci_low"],
        "ci_high": head["ci_high"],
        "rejections": head["rejections"],
        "power_failures_as_nonrejections": alln["rate"],
        "power_failures_as_nonrejections_mcse": alln["mcse"],
        "fit_trouble_policy": fit_trouble,
    }
    if estimate is not None:
        keep = used & ~is_warning  # estimates of fits that warned are unreliable under either policy
        out.update(estimate_summary(estimate[keep], se[keep], ci_low[keep], ci_high[keep], true_effect))
    return out
