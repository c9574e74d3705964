"""z-test, Student's t, Welch's t and the paired t-test, per replicate and as batches.

Layouts understood (see :mod:`simpower.batch`): a one-sample table
with column ``y``; a two-arm table with ``y`` and ``arm`` in {0, 1} (the
estimate is mean(arm 1) - mean(arm 0)); a paired table with ``y``, ``arm`` and
``pair``. Missing outcomes (NaN in ``y``) are dropped (complete cases). The
batch paths take complete batches (no missingness, no padding) whose arms are
contiguous blocks (the original arithmetic, unchanged), or batches of a process
with missing outcomes (padded or not), whose observed values are summed under the observed mask
(complete cases, as the per-replicate paths); a replicate with fewer than two
observed values in a sample is handed to the per-replicate path.

The per-replicate paths call :mod:`scipy.stats` (imported when first called); the
batch paths compute the same statistics with numpy and :mod:`scipy.special` over
a chunk of replicates, and the tests check the two agree to floating-point tolerance.
"""

from __future__ import annotations

import math

import numpy as np

from .._validation import Real
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import (masked_t_parts, mean_var, normal_ppf, p_from_t, p_from_z, paired_differences, split_arms, t_ppf,
                      two_sample_se_df)

POSITIVE = Real(0.0, low_open=True)


def _ci(est, se, crit):
    return est - crit * se, est + crit * se


class _TBase(Analysis):
    """Shared parts of the t-tests. Confidence intervals are two-sided at ``ci_level``
    whatever the ``alternative``, so coverage is comparable across analyses."""

    params = {"alternative": ALTERNATIVE, "ci_level": CI_LEVEL, "null_mean": Real()}
    defaults = {"alternative": "two-sided", "ci_level": 0.95, "null_mean": 0.0}

    def _two_sided_ci(self, est, se, df):
        crit = float(t_ppf(0.5 + self.ci_level / 2, df))
        return est - crit * se, est + crit * se

    def _result(self, est, se, df):
        t = (est - self.null_mean) / se
        p = p_from_t(t, df, self.alternative)
        crit = t_ppf(0.5 + self.ci_level / 2, df)
        lo, hi = _ci(est, se, crit)
        return BatchResult(pvalue=p, estimate=est, se=se, ci_low=lo, ci_high=hi)

    def _masked(self, batch, layout, equal_var):
        """Batch path with missing outcomes or padding: complete cases under the observed mask."""
        est, se, df, few = masked_t_parts(layout, equal_var)
        with np.errstate(all="ignore"):
            res = self._result(est, se, df)
        return hand_over(self, batch, res, few)


def _complete_blocks(layout) -> bool:
    """Complete batches: one sample, pairs, or two arms in contiguous blocks (the original columns).

    Batches of a process with missing outcomes are taken whatever their arm layout and padding:
    the masked path (:func:`masked_t_parts`) reads the observed mask. Padding alone (variable
    cluster sizes, no missingness) stays per replicate, so that the numbers of complete-data
    scenarios are those they always were.
    """
    if layout.missing:
        return True
    return layout.complete and (layout.kind != "two_arm" or layout.split is not None)


class TTest(_TBase):
    """Student's t-test: one sample (no ``arm`` column) or two arms with pooled variance.

    H0: the mean (one sample) equals ``null_mean``, or the two arm means differ
    by ``null_mean`` (default 0), against ``alternative``.
    """

    name = "t_test"
    null_hypothesis = "the mean difference (or the mean) equals null_mean, assuming equal variances"

    def __call__(self, data):
        from scipy import stats

        if "arm" not in data:
            y = np.asarray(data["y"], float)
            y = y[np.isfinite(y)]
            r = stats.ttest_1samp(y, self.null_mean, alternative=self.alternative)
            est = float(y.mean())
            se = float(y.std(ddof=1) / math.sqrt(y.size))
        else:
            y0, y1 = split_arms(data)
            r = stats.ttest_ind(y1 - self.null_mean, y0, equal_var=True, alternative=self.alternative)
            est = float(y1.mean() - y0.mean())
            df = y0.size + y1.size - 2
            sp2 = ((y0.size - 1) * y0.var(ddof=1) + (y1.size - 1) * y1.var(ddof=1)) / df
            se = math.sqrt(sp2 * (1 / y0.size + 1 / y1.size))
        lo, hi = self._two_sided_ci(est, se, float(r.df))
        return TestResult(pvalue=float(r.pvalue), estimate=est, se=se, ci_low=lo, ci_high=hi,
                          statistic=float(r.statistic), df=float(r.df))

    layouts = ("one_sample", "two_arm")
    _supports = staticmethod(_complete_blocks)

    def batch(self, batch):
        layout = self.batch_layout(batch)
        if not layout.complete:
            return self._masked(batch, layout, equal_var=True)
        with np.errstate(all="ignore"):
            if layout.kind == "one_sample":
                y = layout.y
                m, v = mean_var(y)
                return self._result(m, np.sqrt(v / y.shape[1]), y.shape[1] - 1)
            y0, y1 = layout.arms()
            n0, n1 = y0.shape[1], y1.shape[1]
            m0, v0 = mean_var(y0)
            m1, v1 = mean_var(y1)
            se, df = two_sample_se_df(n0, n1, v0, v1, equal_var=True)
            return self._result(m1 - m0, se, df)


class WelchT(_TBase):
    """Welch's t-test for two arms (unequal variances, Satterthwaite df).

    H0: the two arm means differ by ``null_mean`` (default 0).
    """

    name = "welch_t"
    null_hypothesis = "the two arm means differ by null_mean (variances may differ)"

    def __call__(self, data):
        from scipy import stats

        if "arm" not in data:
            raise ValueError("welch_t needs two arms (an 'arm' column)")
        y0, y1 = split_arms(data)
        r = stats.ttest_ind(y1 - self.null_mean, y0, equal_var=False, alternative=self.alternative)
        est = float(y1.mean() - y0.mean())
        se = math.sqrt(y0.var(ddof=1) / y0.size + y1.var(ddof=1) / y1.size)
        lo, hi = self._two_sided_ci(est, se, float(r.df))
        return TestResult(pvalue=float(r.pvalue), estimate=est, se=se, ci_low=lo, ci_high=hi,
                          statistic=float(r.statistic), df=float(r.df))

    layouts = ("two_arm",)
    _supports = staticmethod(_complete_blocks)

    def batch(self, batch):
        layout = self.batch_layout(batch)
        if not layout.complete:
            return self._masked(batch, layout, equal_var=False)
        y0, y1 = layout.arms()
        n0, n1 = y0.shape[1], y1.shape[1]
        with np.errstate(all="ignore"):
            m0, v0 = mean_var(y0)
            m1, v1 = mean_var(y1)
            se, df = two_sample_se_df(n0, n1, v0, v1, equal_var=False)
            return self._result(m1 - m0, se, df)


class PairedT(_TBase):
    """Paired t-test on within-pair differences (arm 1 minus arm 0, matched by ``pair``).

    H0: the mean within-pair difference equals ``null_mean`` (default 0).
    """

    name = "paired_t"
    null_hypothesis = "the mean within-pair difference equals null_mean"

    #: within-pair differences of one long table (kept as an attribute for compatibility)
    _differences = staticmethod(paired_differences)

    def __call__(self, data):
        from scipy import stats

        d = self._differences(data)
        r = stats.ttest_1samp(d, self.null_mean, alternative=self.alternative)
        est, se = float(d.mean()), float(d.std(ddof=1) / math.sqrt(d.size))
        lo, hi = self._two_sided_ci(est, se, float(r.df))
        return TestResult(pvalue=float(r.pvalue), estimate=est, se=se, ci_low=lo, ci_high=hi,
                          statistic=float(r.statistic), df=float(r.df))

    layouts = ("paired",)
    _supports = staticmethod(_complete_blocks)

    def batch(self, batch):
        layout = self.batch_layout(batch)
        if not layout.complete:
            return self._masked(batch, layout, equal_var=True)
        d = layout.y1 - layout.y0
        with np.errstate(all="ignore"):
            m, v = mean_var(d)
            return self._result(m, np.sqrt(v / d.shape[1]), d.shape[1] - 1)


class ZTest(Analysis):
    """z-test with a known SD: one sample (no ``arm`` column) or two arms.

    H0: the mean (or the mean difference) equals ``null_mean``. ``sd`` is the
    known SD assumed by the test (both arms), ``sd1`` the treatment arm's if it
    differs.
    """

    name = "z_test"
    null_hypothesis = "the mean (or mean difference) equals null_mean, SD known"
    params = {"sd": POSITIVE, "sd1": Real(0.0, low_open=True, optional=True), "alternative": ALTERNATIVE,
              "ci_level": CI_LEVEL, "null_mean": Real()}
    defaults = {"sd": 1.0, "sd1": None, "alternative": "two-sided", "ci_level": 0.95, "null_mean": 0.0}

    def _sd1(self):
        return self.sd if self.sd1 is None else self.sd1

    def _out(self, est, se):
        z = (est - self.null_mean) / se
        crit = normal_ppf(0.5 + self.ci_level / 2)
        lo, hi = _ci(est, se, crit)
        return BatchResult(pvalue=p_from_z(z, self.alternative), estimate=est, se=se, ci_low=lo, ci_high=hi)

    def __call__(self, data):
        if "arm" not in data:
            y = np.asarray(data["y"], float)
            y = y[np.isfinite(y)]
            out = self._out(float(y.mean()), self.sd / math.sqrt(y.size))
        else:
            y0, y1 = split_arms(data)
            se = math.sqrt(self.sd**2 / y0.size + self._sd1() ** 2 / y1.size)
            out = self._out(float(y1.mean() - y0.mean()), se)
        return TestResult(**{k: float(v) for k, v in out.items()})

    layouts = ("one_sample", "two_arm")
    _supports = staticmethod(_complete_blocks)

    def batch(self, batch):
        layout = self.batch_layout(batch)
        if not layout.complete:
            est, _, _, few = masked_t_parts(layout)
            obs = layout.observed
            with np.errstate(all="ignore"):
                if layout.kind == "one_sample":
                    se = self.sd / np.sqrt(np.count_nonzero(obs, axis=1))
                else:
                    n0 = np.count_nonzero(obs & (layout.arm == 0), axis=1)
                    n1 = np.count_nonzero(obs & (layout.arm == 1), axis=1)
                    se = np.sqrt(self.sd**2 / n0 + self._sd1() ** 2 / n1)
                res = self._out(est, se)
            return hand_over(self, batch, res, few)
        if layout.kind == "one_sample":
            y = layout.y
            est = y.mean(axis=1)
            return self._out(est, np.full(est.shape, self.sd / math.sqrt(y.shape[1])))
        y0, y1 = layout.arms()
        se = math.sqrt(self.sd**2 / y0.shape[1] + self._sd1() ** 2 / y1.shape[1])
        est = y1.mean(axis=1) - y0.mean(axis=1)
        return self._out(est, np.full(est.shape, se))
