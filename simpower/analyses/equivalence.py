"""Equivalence (two one-sided tests) and non-inferiority t-tests.

Layouts as the t-tests (:mod:`simpower.analyses.ttests`): one sample (``y``;
the estimand is the mean), or two arms (``y``, ``arm``; the estimand is
mean(arm 1) - mean(arm 0)). Welch's or the pooled-variance t statistic.
The per-replicate paths call ``scipy.stats.ttest_ind`` / ``ttest_1samp``;
the batch paths compute the same statistics with numpy.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from .._validation import Bool, Real
from ..errors import ParameterError
from .base import CI_LEVEL, Analysis, BatchResult, NullBoundary, TestResult, hand_over
from .numeric import masked_t_parts, mean_var, p_from_t, split_arms, two_sample_se_df
from .ttests import TTest

POSITIVE = Real(0.0, low_open=True)


def _t_parts(data, equal_var):
    """(samples, estimate, se, df) of a one-sample or two-arm table."""
    if "arm" not in data:
        y = np.asarray(data["y"], float)
        y = y[np.isfinite(y)]
        return (y,), float(y.mean()), float(y.std(ddof=1) / math.sqrt(y.size)), y.size - 1.0
    y0, y1 = split_arms(data)
    n0, n1 = y0.size, y1.size
    se, df = two_sample_se_df(n0, n1, y0.var(ddof=1), y1.var(ddof=1), equal_var)
    return (y0, y1), float(y1.mean() - y0.mean()), float(se), float(df)


def _scipy_p(samples, value, equal_var, alternative):
    """One-sided p-value of H0: estimand = value, from scipy."""
    if len(samples) == 1:
        return float(stats.ttest_1samp(samples[0], value, alternative=alternative).pvalue)
    y0, y1 = samples
    return float(stats.ttest_ind(y1 - value, y0, equal_var=equal_var, alternative=alternative).pvalue)


def _batch_parts(layout, equal_var):
    """(estimate, se, df, few): complete batches by the original arithmetic (few None), others masked."""
    if not layout.complete:
        return masked_t_parts(layout, equal_var)
    with np.errstate(all="ignore"):
        if layout.kind == "one_sample":
            y = layout.y
            m, v = mean_var(y)
            return m, np.sqrt(v / y.shape[1]), y.shape[1] - 1.0, None
        y0, y1 = layout.arms()
        n0, n1 = y0.shape[1], y1.shape[1]
        m0, v0 = mean_var(y0)
        m1, v1 = mean_var(y1)
        return (m1 - m0, *two_sample_se_df(n0, n1, v0, v1, equal_var), None)


def _ci(est, se, df, level):
    crit = stats.t.ppf(0.5 + level / 2, df)
    return est - crit * se, est + crit * se


class TOST(Analysis):
    """Equivalence by two one-sided t-tests (Schuirmann 1987, J Pharmacokinet Biopharm 15:657-680).

    H0: the estimand lies outside the equivalence range, theta <= ``low`` or
    theta >= ``high``; H1: ``low`` < theta < ``high``. The p-value is the
    larger of the two one-sided p-values (H0: theta <= low; H0: theta >= high).
    Rejecting at alpha is the same as the (1 - 2 alpha) two-sided CI lying
    inside (low, high); the reported CI has level ``ci_level`` (default 0.90,
    the interval matching alpha = 0.05).

    The type I error check puts the effect on the upper margin, theta = high
    (:meth:`null_boundary`); for outcomes symmetric about their mean the rate
    at the lower margin is the same. The closed form (:meth:`analytic_power`)
    is :func:`simpower.analytic.tost_power` (exact for the pooled test and
    normal data) or :func:`simpower.analytic.welch_tost_power` (Welch's; an
    approximation).

    Parameters
    ----------
    margin : float > 0, optional
        Symmetric range (-margin, margin). Give ``margin`` or both ``low`` and
        ``high``.
    low, high : float, optional
        Asymmetric range, low < high.
    equal_var : bool, default False
        Pooled variance (Schuirmann's original test) instead of Welch's.
    ci_level : float in (0, 1), default 0.90
    """

    name = "tost"
    null_hypothesis = "the mean difference (or mean) lies outside the equivalence range (low, high)"
    params = {"margin": Real(0.0, low_open=True, optional=True), "low": Real(optional=True),
              "high": Real(optional=True), "equal_var": Bool(), "ci_level": CI_LEVEL}
    defaults = {"margin": None, "low": None, "high": None, "equal_var": False, "ci_level": 0.90}

    def _check(self):
        given = self.low is not None or self.high is not None
        if self.margin is not None and given:
            raise ParameterError("`margin` and `low`/`high` both given: give a symmetric margin or the range.")
        if self.margin is None and (self.low is None or self.high is None):
            raise ParameterError("`margin` is required (or give both `low` and `high`): the equivalence range.")
        if self.margin is None and not self.low < self.high:
            raise ParameterError(f"`low` must be < `high`; got low = {self.low:g}, high = {self.high:g}.")

    @property
    def bounds(self) -> tuple[float, float]:
        if self.margin is not None:
            return -self.margin, self.margin
        return self.low, self.high

    def null_boundary(self) -> NullBoundary:
        """The upper end of the equivalence range (the lower one is its mirror image)."""
        return NullBoundary(float(self.bounds[1]), "upper equivalence margin")

    def __call__(self, data):
        low, high = self.bounds
        samples, est, se, df = _t_parts(data, self.equal_var)
        p_low = _scipy_p(samples, low, self.equal_var, "greater")
        p_high = _scipy_p(samples, high, self.equal_var, "less")
        lo, hi = _ci(est, se, df, self.ci_level)
        return TestResult(pvalue=max(p_low, p_high), estimate=est, se=se, ci_low=lo, ci_high=hi, df=df)

    layouts, _supports = TTest.layouts, staticmethod(TTest._supports)  # the t-tests' batch layouts

    def batch(self, batch):
        low, high = self.bounds
        est, se, df, few = _batch_parts(self.batch_layout(batch), self.equal_var)
        with np.errstate(all="ignore"):
            p = np.maximum(p_from_t((est - low) / se, df, "greater"), p_from_t((est - high) / se, df, "less"))
            lo, hi = _ci(est, se, df, self.ci_level)
        res = BatchResult(pvalue=p, estimate=est, se=se, ci_low=lo, ci_high=hi)
        return res if few is None else hand_over(self, batch, res, few)


class NonInferiority(Analysis):
    """Non-inferiority one-sided t-test against a margin.

    With ``higher_is_better`` (default), H0: theta <= -``margin`` against
    H1: theta > -margin (arm 1 is not worse than arm 0 by the margin or more);
    otherwise H0: theta >= margin against H1: theta < margin. theta is
    mean(arm 1) - mean(arm 0), or the mean of one sample.

    Parameters
    ----------
    margin : float > 0
        The non-inferiority margin, in outcome units.
    higher_is_better : bool, default True
    equal_var : bool, default False
        Pooled variance instead of Welch's.
    ci_level : float in (0, 1), default 0.95
        Level of the reported two-sided CI; the one-sided test at alpha
        rejects when the relevant bound of the (1 - 2 alpha) CI clears the
        margin.
    """

    name = "non_inferiority"
    null_hypothesis = "arm 1 is worse than arm 0 by at least the margin"
    params = {"margin": POSITIVE, "higher_is_better": Bool(), "equal_var": Bool(), "ci_level": CI_LEVEL}
    defaults = {"higher_is_better": True, "equal_var": False, "ci_level": 0.95}

    @property
    def _null(self) -> tuple[float, str]:
        return (-self.margin, "greater") if self.higher_is_better else (self.margin, "less")

    def null_boundary(self) -> NullBoundary:
        """theta = -margin (``higher_is_better``) or +margin, where the test's size is alpha."""
        return NullBoundary(float(self._null[0]), "non-inferiority margin")

    def __call__(self, data):
        value, alt = self._null
        samples, est, se, df = _t_parts(data, self.equal_var)
        lo, hi = _ci(est, se, df, self.ci_level)
        return TestResult(pvalue=_scipy_p(samples, value, self.equal_var, alt), estimate=est, se=se,
                          ci_low=lo, ci_high=hi, statistic=(est - value) / se, df=df)

    layouts, _supports = TTest.layouts, staticmethod(TTest._supports)  # the t-tests' batch layouts

    def batch(self, batch):
        value, alt = self._null
        est, se, df, few = _batch_parts(self.batch_layout(batch), self.equal_var)
        with np.errstate(all="ignore"):
            lo, hi = _ci(est, se, df, self.ci_level)
            res = BatchResult(pvalue=p_from_t((est - value) / se, df, alt), estimate=est, se=se,
                              ci_low=lo, ci_high=hi)
        return res if few is None else hand_over(self, batch, res, few)

