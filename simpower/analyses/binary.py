"""Two-arm binary outcomes: two-proportion z-test, chi-square, Fisher's exact test, logistic regression.

Layout understood: a long table with ``y`` in {0, 1} (NaN = missing, dropped:
complete cases) and ``arm`` in {0, 1}. Each replicate reduces to the 2x2 table
of events ``x_a`` out of ``n_a`` per arm; p1 and p0 are the treatment and
control proportions. The tables and tests always put the treatment arm
(arm 1) first, so "greater" means a higher event risk (or odds) in arm 1.

Batch paths compute the 2x2 tables of a whole chunk with numpy and then the
statistics; the tests check each against the per-replicate path and against
scipy / statsmodels.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import special, stats

from .._validation import Bool
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, result_from_fields, rowwise
from .numeric import p_from_z, wald


# -- 2x2 tables --------------------------------------------------------------
def two_by_two(data) -> tuple[int, int, int, int]:
    """``(x0, n0, x1, n1)``: events and complete cases per arm of one replicate."""
    y = np.asarray(data["y"], dtype=float)
    arm = np.asarray(data["arm"])
    levels = set(np.unique(arm).tolist())
    if levels != {0, 1}:
        raise ValueError(f"two-arm analyses need arm labels 0 and 1; got {sorted(levels)}")
    ok = np.isfinite(y)
    if np.any((y[ok] != 0) & (y[ok] != 1)):
        raise ValueError("binary analyses need y in {0, 1} (NaN = missing)")
    y0, y1 = y[ok & (arm == 0)], y[ok & (arm == 1)]
    return int(y0.sum()), int(y0.size), int(y1.sum()), int(y1.size)


def _binary_outcomes(layout) -> bool:
    """The two-arm layout's finite outcomes are all 0 or 1 (padding and missing values allowed)."""
    y = np.asarray(layout.y)
    with np.errstate(all="ignore"):
        square = y * y == y  # True exactly at 0, 1 and +inf (False at NaN); values not finite are ignored
    return bool(square.all() or not np.any(~square & np.isfinite(y)))


class _Binary(Analysis):
    """Two-arm binary analyses: batch path on the 2x2 tables of a two-arm layout."""

    layouts = ("two_arm",)
    _supports = staticmethod(_binary_outcomes)


def batch_two_by_two(batch):
    """Arrays ``(x0, n0, x1, n1)`` over the replicates of a batch (padding and NaN dropped)."""
    layout = batch.layout("two_arm")
    y = layout.y
    ok = layout.observed
    every = bool(ok.all())
    yy = y if every else np.where(ok, y, 0.0)
    if np.ndim(layout.arm) == 1:  # shared arms: sums as products with the arm indicator (exact: 0/1 counts)
        w1 = (np.asarray(layout.arm) == 1).astype(float)
        x1 = yy @ w1
        x0 = yy.sum(axis=1) - x1
        if every:
            n1 = np.full(y.shape[0], w1.sum())
            n0 = np.full(y.shape[0], float(y.shape[1])) - n1
        else:
            n1 = ok.astype(float) @ w1
            n0 = np.count_nonzero(ok, axis=1) - n1
        return x0, n0, x1, n1
    is1 = np.asarray(layout.arm) == 1
    x1 = np.sum(yy * is1, axis=1)
    n1 = np.sum(ok & is1, axis=1)
    x0 = np.sum(yy, axis=1) - x1
    n0 = np.sum(ok, axis=1) - n1
    return x0, n0.astype(float), x1, n1.astype(float)


def risk_difference(x0, n0, x1, n1, ci_level):
    """p1 - p0 with its unpooled (Wald) SE and confidence interval."""
    with np.errstate(all="ignore"):
        p0, p1 = x0 / n0, x1 / n1
        est = p1 - p0
        se = np.sqrt(p0 * (1 - p0) / n0 + p1 * (1 - p1) / n1)
    crit = special.ndtri(0.5 + ci_level / 2)
    return est, se, est - crit * se, est + crit * se


# -- two-proportion z-test ---------------------------------------------------
def _z_test(x0, n0, x1, n1, continuity, alternative):
    with np.errstate(all="ignore"):
        d = x1 / n1 - x0 / n0
        pbar = (x0 + x1) / (n0 + n1)
        se0 = np.sqrt(pbar * (1 - pbar) * (1 / n0 + 1 / n1))
        cc = 0.5 * (1 / n0 + 1 / n1) if continuity else 0.0
        if alternative == "two-sided":
            z = np.sign(d) * np.maximum(np.abs(d) - cc, 0.0) / se0
        elif alternative == "greater":
            z = (d - cc) / se0
        else:
            z = (d + cc) / se0
        return z, p_from_z(z, alternative)


class TwoProportions(_Binary):
    """Two-sample z-test for proportions, pooled SE under H0, optional continuity correction.

    H0: p1 = p0. The statistic is ``(p1_hat - p0_hat) / sqrt(pbar (1 - pbar)
    (1/n0 + 1/n1))`` with ``pbar`` the pooled proportion; with ``continuity``
    the absolute difference is first reduced by ``(1/n0 + 1/n1) / 2`` (Yates;
    two-sided, this is the square root of scipy's corrected chi-square). The
    estimate is the risk difference p1 - p0 with the unpooled (Wald) SE and
    CI, as is common practice. A replicate with no events or only events
    (pbar = 0 or 1) has no defined statistic: its p-value is NaN and the
    engine counts it as ``nonfinite_pvalue``.

    ``analytic_power`` returns :func:`simpower.analytic.prop2_power` for a
    ``binary_two_arm`` process without missing outcomes. That is a normal
    approximation, not an exact power: the engine's cross-check flag then
    says the simulation is far from the approximation (expect it with small
    arms or risks near 0 or 1), not that something is broken.
    """

    name = "two_proportions"
    estimand_label = "risk difference"
    null_hypothesis = "the event risks in the two arms are equal (p1 = p0)"
    params = {"alternative": ALTERNATIVE, "continuity": Bool(), "ci_level": CI_LEVEL}
    defaults = {"alternative": "two-sided", "continuity": False, "ci_level": 0.95}

    def _out(self, x0, n0, x1, n1):
        z, p = _z_test(x0, n0, x1, n1, self.continuity, self.alternative)
        est, se, lo, hi = risk_difference(x0, n0, x1, n1, self.ci_level)
        return {"pvalue": p, "estimate": est, "se": se, "ci_low": lo, "ci_high": hi, "statistic": z}

    def __call__(self, data):
        x0, n0, x1, n1 = two_by_two(data)
        return result_from_fields(self._out(float(x0), float(n0), float(x1), float(n1)))

    def batch(self, batch):
        out = self._out(*batch_two_by_two(batch))
        return BatchResult(**{k: v for k, v in out.items() if k != "statistic"})


# -- chi-square ----------------------------------------------------------------
def chi_square_2x2(x0, n0, x1, n1, correction):
    """Pearson's X^2 of 2x2 tables (arrays), as :func:`scipy.stats.chi2_contingency` computes it.

    With ``correction`` (Yates) every |observed - expected| is reduced by
    ``min(0.5, |observed - expected|)``. Tables with an empty row or column
    give NaN (scipy refuses them: an expected count is 0).
    """
    obs = np.stack([x1, n1 - x1, x0, n0 - x0], axis=-1).astype(float)
    rows = np.stack([n1, n1, n0, n0], axis=-1)
    events = x0 + x1
    total = n0 + n1
    cols = np.stack([events, total - events, events, total - events], axis=-1)
    with np.errstate(all="ignore"):
        expected = rows * cols / total[..., None]
        if correction:
            diff = expected - obs
            obs = obs + np.sign(diff) * np.minimum(0.5, np.abs(diff))
        x2 = np.sum((obs - expected) ** 2 / expected, axis=-1)
    bad = np.any(expected == 0, axis=-1)
    return np.where(bad, np.nan, x2)


class ChiSquare(_Binary):
    """Pearson's chi-square test of the 2x2 table (arm x event), optionally Yates-corrected.

    H0: the event risk does not depend on the arm (p1 = p0); two-sided. The
    per-replicate path calls :func:`scipy.stats.chi2_contingency`
    (``correction`` as there, default True); the batch path computes the same
    statistic for all replicates at once. A table with an empty row or column
    (no events, or only events) has no statistic: p-value NaN, counted by the
    engine as ``nonfinite_pvalue``. The estimate is the risk difference with
    a Wald CI, as in ``two_proportions``.
    """

    name = "chi_square"
    estimand_label = "risk difference"
    null_hypothesis = "event risk is independent of arm (p1 = p0), two-sided"
    params = {"correction": Bool(), "ci_level": CI_LEVEL}
    defaults = {"correction": True, "ci_level": 0.95}

    def _rd(self, x0, n0, x1, n1):
        est, se, lo, hi = risk_difference(x0, n0, x1, n1, self.ci_level)
        return {"estimate": est, "se": se, "ci_low": lo, "ci_high": hi}

    def __call__(self, data):
        x0, n0, x1, n1 = two_by_two(data)
        table = np.array([[x1, n1 - x1], [x0, n0 - x0]])
        rd = self._rd(float(x0), float(n0), float(x1), float(n1))
        if np.any(table.sum(axis=0) == 0) or np.any(table.sum(axis=1) == 0):
            return TestResult(pvalue=math.nan, **{k: float(v) for k, v in rd.items()})
        r = stats.chi2_contingency(table, correction=self.correction)
        return TestResult(pvalue=float(r.pvalue), statistic=float(r.statistic), df=1.0,
                          **{k: float(v) for k, v in rd.items()})

    def batch(self, batch):
        x0, n0, x1, n1 = batch_two_by_two(batch)
        x2 = chi_square_2x2(x0, n0, x1, n1, self.correction)
        return BatchResult(pvalue=stats.chi2.sf(x2, 1), **self._rd(x0, n0, x1, n1))


# -- Fisher's exact test -----------------------------------------------------
#: relative gap below which two table probabilities count as a near-tie the batch path leaves to scipy
_NEAR_TIE = 1e-9
#: cells of the probability grid computed at once
_GRID_CELLS = 2_000_000


def _log_choose(n, k):
    return special.gammaln(n + 1) - special.gammaln(k + 1) - special.gammaln(n - k + 1)


def _log_choose_table(lf, n, k):
    """``_log_choose(n, k)`` for whole numbers ``0 <= k <= n`` from ``lf[j] = gammaln(j + 1)``: the same
    three log-gamma values, looked up instead of computed, subtracted in the same order (same floats).
    Entries outside that range are arbitrary (the caller masks them)."""
    n = n.astype(np.intp)
    k = k.astype(np.intp)
    top = lf.size - 1
    return lf[np.clip(n, 0, top)] - lf[np.clip(k, 0, top)] - lf[np.clip(n - k, 0, top)]


def fisher_pvalues(x0, n0, x1, n1, alternative):
    """Exact conditional p-values of 2x2 tables, vectorised; NaN marks near-ties left to scipy.

    Given the margins, ``x1`` is hypergeometric; the one-sided p-values sum
    its probabilities on one side of the observed ``x1``, the two-sided one
    sums those not above the observed probability (times ``1 + 1e-14``, as
    scipy does). Probabilities come from log-gamma functions, which give
    mirror tables of equal arms exactly equal values; a table where another
    outcome's probability differs from the observed one by a relative amount
    in (0, 1e-9), so that rounding could decide inclusion, gets NaN, and the
    caller then uses :func:`scipy.stats.fisher_exact`.
    """
    x0, n0, x1, n1 = (np.asarray(a, float) for a in (x0, n0, x1, n1))
    k = x0 + x1
    total = n0 + n1
    out = np.empty(x0.shape)
    width = int(n1.max()) + 1
    step = max(1, _GRID_CELLS // width)
    grid = np.arange(width, dtype=float)
    lf = special.gammaln(np.arange(int(total.max()) + 1 if total.size else 1, dtype=float) + 1)
    for s in range(0, x0.size, step):
        sl = slice(s, s + step)
        kk, aa, bb, xo = k[sl, None], n1[sl, None], n0[sl, None], x1[sl, None]
        inside = (grid <= aa) & (grid <= kk) & (kk - grid <= bb)
        with np.errstate(all="ignore"):
            whole = _log_choose_table(lf, aa + bb, kk)
            logp = _log_choose_table(lf, aa, grid) + _log_choose_table(lf, bb, kk - grid) - whole
            logp = np.where(inside, logp, -np.inf)
            lobs = _log_choose_table(lf, aa, xo) + _log_choose_table(lf, bb, kk - xo) - whole
            prob = np.exp(logp)
            if alternative == "less":
                p = np.sum(prob * (grid <= xo), axis=1)
                tie = np.zeros(p.shape, bool)
            elif alternative == "greater":
                p = np.sum(prob * (grid >= xo), axis=1)
                tie = np.zeros(p.shape, bool)
            else:
                rel = np.exp(logp - lobs)
                p = np.sum(prob * (rel <= 1.0 + 1e-14), axis=1)
                gap = np.abs(rel - 1.0)
                tie = np.any(inside & (gap > 0) & (gap < _NEAR_TIE), axis=1)
        p = np.minimum(p, 1.0)
        p[tie] = np.nan
        out[sl] = p
    empty = (k == 0) | (k == total) | (n0 == 0) | (n1 == 0)
    out[empty] = 1.0
    return out


def _log_sample_odds_ratio(x0, n0, x1, n1):
    """log of scipy's sample odds ratio x1 (n0 - x0) / ((n1 - x1) x0); NaN when 0 or infinite."""
    with np.errstate(all="ignore"):
        num, den = x1 * (n0 - x0), (n1 - x1) * x0
        return np.where((num > 0) & (den > 0), np.log(num) - np.log(den), np.nan)


class FisherExact(_Binary):
    """Fisher's exact test of the 2x2 table (arm x event), conditional on both margins.

    H0: the odds ratio of an event, treatment versus control, is 1. The
    per-replicate path calls :func:`scipy.stats.fisher_exact` with the
    treatment row first, so 'greater' means higher odds in arm 1. The batch
    path sums the hypergeometric probabilities of all tables with the same
    margins (exact, not an approximation), hands near-ties to scipy, and
    agrees with it to rounding. The estimate is the log of the sample odds
    ratio (NaN when a cell is 0); no SE or CI.
    """

    name = "fisher_exact"
    estimand_label = "log odds ratio"
    null_hypothesis = "the odds ratio (treatment vs control) is 1, conditional on the margins"
    params = {"alternative": ALTERNATIVE}
    defaults = {"alternative": "two-sided"}

    def __call__(self, data):
        x0, n0, x1, n1 = two_by_two(data)
        r = stats.fisher_exact([[x1, n1 - x1], [x0, n0 - x0]], alternative=self.alternative)
        est = float(_log_sample_odds_ratio(float(x0), float(n0), float(x1), float(n1)))
        return TestResult(pvalue=float(r.pvalue), estimate=est, statistic=float(r.statistic))

    def batch(self, batch):
        x0, n0, x1, n1 = batch_two_by_two(batch)
        p = fisher_pvalues(x0, n0, x1, n1, self.alternative)
        for i in np.flatnonzero(np.isnan(p)):
            table = [[int(x1[i]), int(n1[i] - x1[i])], [int(x0[i]), int(n0[i] - x0[i])]]
            p[i] = stats.fisher_exact(table, alternative=self.alternative).pvalue
        return BatchResult(pvalue=p, estimate=_log_sample_odds_ratio(x0, n0, x1, n1))


# -- logistic regression ---------------------------------------------------------
class Logistic(_Binary):
    """Logistic regression of the event on the arm (statsmodels ``Logit``, Newton); Wald test.

    H0: the log odds ratio (treatment vs control) is 0. Estimate: the arm
    coefficient (log odds ratio) with its model SE and Wald CI.

    With a single binary covariate the maximum likelihood estimate is the
    empirical log odds ratio and its SE is Woolf's
    ``sqrt(1/x1 + 1/(n1 - x1) + 1/x0 + 1/(n0 - x0))``; the batch path uses
    these closed forms. A table with a zero cell has no finite MLE
    (separation): the analysis then warns :class:`PerfectSeparationWarning`
    before fitting, so the engine counts the replicate as fit trouble, and
    any warning or error of the fit itself propagates too. The batch path
    sends such replicates through the per-replicate fit.
    """

    name = "logistic"
    estimand_label = "log odds ratio"
    null_hypothesis = "the log odds ratio of an event, treatment vs control, is 0"
    params = {"alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"alternative": "two-sided", "ci_level": 0.95}

    def _wald(self, est, se):
        return wald(est, se, self.alternative, self.ci_level)

    def __call__(self, data):
        from statsmodels.discrete.discrete_model import Logit  # not statsmodels.api: it loads every model
        from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

        x0, n0, x1, n1 = two_by_two(data)
        if min(x0, n0 - x0, x1, n1 - x1) == 0:
            warnings.warn(PerfectSeparationWarning(
                f"a zero cell in the 2x2 table (events {x0}/{n0} control, {x1}/{n1} treatment): "
                "the log odds ratio has no finite maximum likelihood estimate"))
        y = np.asarray(data["y"], float)
        arm = np.asarray(data["arm"], float)
        ok = np.isfinite(y)
        exog = np.column_stack([np.ones(int(ok.sum())), arm[ok]])
        fit = Logit(y[ok], exog).fit(disp=0)
        return result_from_fields(self._wald(float(fit.params[1]), float(fit.bse[1])))

    def batch(self, batch):
        x0, n0, x1, n1 = batch_two_by_two(batch)
        with np.errstate(all="ignore"):
            est = np.log(x1) - np.log(n1 - x1) - np.log(x0) + np.log(n0 - x0)
            se = np.sqrt(1 / x1 + 1 / (n1 - x1) + 1 / x0 + 1 / (n0 - x0))
        out = BatchResult(**self._wald(est, se))
        zero = np.minimum(np.minimum(x0, n0 - x0), np.minimum(x1, n1 - x1)) == 0
        rows = np.flatnonzero(zero)
        if rows.size:
            fields, out.trouble, out.trouble_messages = rowwise(self, batch, rows)
            for f, v in fields.items():
                out[f][rows] = v
        return out
