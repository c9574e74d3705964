"""z-test, Student's t, Welch's t and the paired t-test, per replicate and as batches.

Layouts understood (see :mod:`simpower.processes.base`): a one-sample table
with column ``y``; a two-arm table with ``y`` and ``arm`` in {0, 1} (the
estimate is mean(arm 1) - mean(arm 0)); a paired table with ``y``, ``arm`` and
``pair``. Missing outcomes (NaN in ``y``) are dropped (complete cases).

The per-replicate paths call :mod:`scipy.stats`; the batch paths compute the
same statistics with numpy over a chunk of replicates, and the tests check the
two agree to floating-point tolerance.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from .. import analytic
from .._validation import Real

from .base import ALTERNATIVE, CI_LEVEL, Analysis, TestResult

POSITIVE = Real(0.0, low_open=True)


def p_from_t(t, df, alternative):
    """p-value of a t statistic (arrays allowed)."""
    if alternative == "two-sided":
        return 2.0 * stats.t.sf(np.abs(t), df)
    if alternative == "greater":
        return stats.t.sf(t, df)
    return stats.t.cdf(t, df)


def p_from_z(z, alternative):
    if alternative == "two-sided":
        return 2.0 * stats.norm.sf(np.abs(z))
    if alternative == "greater":
        return stats.norm.sf(z)
    return stats.norm.cdf(z)


def _split_arms(data):
    y = np.asarray(data["y"], dtype=float)
    arm = np.asarray(data["arm"])
    levels = np.unique(arm)
    if levels.size != 2 or set(levels.tolist()) != {0, 1}:
        raise ValueError(f"two-arm analyses need arm labels 0 and 1; got {levels.tolist()}")
    y0, y1 = y[arm == 0], y[arm == 1]
    return y0[np.isfinite(y0)], y1[np.isfinite(y1)]


def _batch_arms(batch):
    """Views of the control and treatment columns when arms are contiguous, else None."""
    if "present" in batch.per_rep or batch.info.get("missing") or "arm" not in batch.shared:
        return None
    arm = batch.shared["arm"]
    if arm.ndim != 1 or np.any(arm[:-1] > arm[1:]) or set(np.unique(arm).tolist()) != {0, 1}:
        return None
    y = batch.per_rep["y"]
    n0 = int(np.count_nonzero(arm == 0))
    return y[:, :n0], y[:, n0:]


def _mean_var(y):
    m = y.mean(axis=1)
    d = y - m[:, None]
    v = np.einsum("ij,ij->i", d, d) / (y.shape[1] - 1)
    return m, v


def two_sample_se_df(n0, n1, v0, v1, equal_var: bool):
    """SE of the difference in arm means and its df, from arm sizes and variances (scalars or arrays).

    ``equal_var``: the pooled variance and n0 + n1 - 2 df (Student); otherwise
    the Welch-Satterthwaite df (Welch 1947; Satterthwaite 1946).
    """
    if equal_var:
        df = n0 + n1 - 2.0
        return np.sqrt(((n0 - 1) * v0 + (n1 - 1) * v1) / df * (1 / n0 + 1 / n1)), df
    a0, a1 = v0 / n0, v1 / n1
    return np.sqrt(a0 + a1), (a0 + a1) ** 2 / (a0**2 / (n0 - 1) + a1**2 / (n1 - 1))


def _ci(est, se, crit):
    return est - crit * se, est + crit * se


class _TBase(Analysis):
    """Shared parts of the t-tests. Confidence intervals are two-sided at ``ci_level``
    whatever the ``alternative``, so coverage is comparable across analyses."""

    params = {"alternative": ALTERNATIVE, "ci_level": CI_LEVEL, "null_mean": Real()}
    defaults = {"alternative": "two-sided", "ci_level": 0.95, "null_mean": 0.0}

    def _two_sided_ci(self, est, se, df):
        crit = float(stats.t.ppf(0.5 + self.ci_level / 2, df))
        return est - crit * se, est + crit * se

    def _result(self, est, se, df):
        t = (est - self.null_mean) / se
        p = p_from_t(t, df, self.alternative)
        crit = stats.t.ppf(0.5 + self.ci_level / 2, df)
        lo, hi = _ci(est, se, crit)
        return {"pvalue": p, "estimate": est, "se": se, "ci_low": lo, "ci_high": hi}


class TTest(_TBase):
    """Student's t-test: one sample (no ``arm`` column) or two arms with pooled variance.

    H0: the mean (one sample) equals ``null_mean``, or the two arm means differ
    by ``null_mean`` (default 0), against ``alternative``.
    """

    name = "t_test"
    null_hypothesis = "the mean difference (or the mean) equals null_mean, assuming equal variances"

    def __call__(self, data):
        if "arm" not in data:
            y = np.asarray(data["y"], float)
            y = y[np.isfinite(y)]
            r = stats.ttest_1samp(y, self.null_mean, alternative=self.alternative)
            est = float(y.mean())
            se = float(y.std(ddof=1) / math.sqrt(y.size))
        else:
            y0, y1 = _split_arms(data)
            r = stats.ttest_ind(y1 - self.null_mean, y0, equal_var=True, alternative=self.alternative)
            est = float(y1.mean() - y0.mean())
            df = y0.size + y1.size - 2
            sp2 = ((y0.size - 1) * y0.var(ddof=1) + (y1.size - 1) * y1.var(ddof=1)) / df
            se = math.sqrt(sp2 * (1 / y0.size + 1 / y1.size))
        lo, hi = self._two_sided_ci(est, se, float(r.df))
        return TestResult(pvalue=float(r.pvalue), estimate=est, se=se, ci_low=lo, ci_high=hi,
                          statistic=float(r.statistic), df=float(r.df))

    def supports_batch(self, batch):
        if "arm" not in batch:
            return "present" not in batch.per_rep and not batch.info.get("missing")
        return _batch_arms(batch) is not None

    def batch(self, batch):
        with np.errstate(all="ignore"):
            if "arm" not in batch:
                y = batch.per_rep["y"]
                m, v = _mean_var(y)
                return self._result(m, np.sqrt(v / y.shape[1]), y.shape[1] - 1)
            y0, y1 = _batch_arms(batch)
            n0, n1 = y0.shape[1], y1.shape[1]
            m0, v0 = _mean_var(y0)
            m1, v1 = _mean_var(y1)
            se, df = two_sample_se_df(n0, n1, v0, v1, equal_var=True)
            return self._result(m1 - m0, se, df)

    def analytic_power(self, process, alpha):
        nc = process.normal_case()
        if nc is None or nc.get("sd") is None or nc["design"] == "paired":
            return None
        return analytic.t_power(nc["effect"] - self.null_mean, nc["n"], sd=nc["sd"], alpha=alpha,
                                alternative=self.alternative, design=nc["design"], ratio=nc["ratio"])


class WelchT(_TBase):
    """Welch's t-test for two arms (unequal variances, Satterthwaite df).

    H0: the two arm means differ by ``null_mean`` (default 0).
    """

    name = "welch_t"
    analytic_exact = False  # the closed form is an approximation
    null_hypothesis = "the two arm means differ by null_mean (variances may differ)"

    def __call__(self, data):
        if "arm" not in data:
            raise ValueError("welch_t needs two arms (an 'arm' column)")
        y0, y1 = _split_arms(data)
        r = stats.ttest_ind(y1 - self.null_mean, y0, equal_var=False, alternative=self.alternative)
        est = float(y1.mean() - y0.mean())
        se = math.sqrt(y0.var(ddof=1) / y0.size + y1.var(ddof=1) / y1.size)
        lo, hi = self._two_sided_ci(est, se, float(r.df))
        return TestResult(pvalue=float(r.pvalue), estimate=est, se=se, ci_low=lo, ci_high=hi,
                          statistic=float(r.statistic), df=float(r.df))

    def supports_batch(self, batch):
        return _batch_arms(batch) is not None

    def batch(self, batch):
        y0, y1 = _batch_arms(batch)
        n0, n1 = y0.shape[1], y1.shape[1]
        with np.errstate(all="ignore"):
            m0, v0 = _mean_var(y0)
            m1, v1 = _mean_var(y1)
            se, df = two_sample_se_df(n0, n1, v0, v1, equal_var=False)
            return self._result(m1 - m0, se, df)

    def analytic_power(self, process, alpha):
        nc = process.normal_case()
        if nc is None or nc["design"] != "two-sample":
            return None
        return analytic.welch_power(nc["effect"] - self.null_mean, nc["n"], sd0=nc["sd0"], sd1=nc["sd1"],
                                    ratio=nc["ratio"], alpha=alpha, alternative=self.alternative)


class PairedT(_TBase):
    """Paired t-test on within-pair differences (arm 1 minus arm 0, matched by ``pair``).

    H0: the mean within-pair difference equals ``null_mean`` (default 0).
    """

    name = "paired_t"
    null_hypothesis = "the mean within-pair difference equals null_mean"

    @staticmethod
    def _differences(data):
        y = np.asarray(data["y"], float)
        arm = np.asarray(data["arm"])
        pair = np.asarray(data["pair"])
        o0 = np.argsort(pair[arm == 0], kind="stable")
        o1 = np.argsort(pair[arm == 1], kind="stable")
        p0, p1 = pair[arm == 0][o0], pair[arm == 1][o1]
        if p0.size != p1.size or np.any(p0 != p1):
            common, i0, i1 = np.intersect1d(pair[arm == 0], pair[arm == 1], return_indices=True)
            d = y[arm == 1][i1] - y[arm == 0][i0]
        else:
            d = y[arm == 1][o1] - y[arm == 0][o0]
        return d[np.isfinite(d)]

    def __call__(self, data):
        d = self._differences(data)
        r = stats.ttest_1samp(d, self.null_mean, alternative=self.alternative)
        est, se = float(d.mean()), float(d.std(ddof=1) / math.sqrt(d.size))
        lo, hi = self._two_sided_ci(est, se, float(r.df))
        return TestResult(pvalue=float(r.pvalue), estimate=est, se=se, ci_low=lo, ci_high=hi,
                          statistic=float(r.statistic), df=float(r.df))

    def supports_batch(self, batch):
        if _batch_arms(batch) is None or "pair" not in batch.shared:
            return False
        arm, pair = batch.shared["arm"], batch.shared["pair"]
        n0 = int(np.count_nonzero(arm == 0))
        return 2 * n0 == arm.size and np.array_equal(pair[:n0], pair[n0:])

    def batch(self, batch):
        y0, y1 = _batch_arms(batch)
        d = y1 - y0
        with np.errstate(all="ignore"):
            m, v = _mean_var(d)
            return self._result(m, np.sqrt(v / d.shape[1]), d.shape[1] - 1)

    def analytic_power(self, process, alpha):
        nc = process.normal_case()
        if nc is None or nc["design"] != "paired":
            return None
        return analytic.t_power(nc["effect"] - self.null_mean, nc["n"], sd=nc["sd"], alpha=alpha,
                                alternative=self.alternative, design="paired")


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
        crit = stats.norm.ppf(0.5 + self.ci_level / 2)
        lo, hi = _ci(est, se, crit)
        return {"pvalue": p_from_z(z, self.alternative), "estimate": est, "se": se, "ci_low": lo, "ci_high": hi}

    def __call__(self, data):
        if "arm" not in data:
            y = np.asarray(data["y"], float)
            y = y[np.isfinite(y)]
            out = self._out(float(y.mean()), self.sd / math.sqrt(y.size))
        else:
            y0, y1 = _split_arms(data)
            se = math.sqrt(self.sd**2 / y0.size + self._sd1() ** 2 / y1.size)
            out = self._out(float(y1.mean() - y0.mean()), se)
        return TestResult(**{k: float(v) for k, v in out.items()})

    def supports_batch(self, batch):
        return TTest.supports_batch(self, batch)

    def batch(self, batch):
        if "arm" not in batch:
            y = batch.per_rep["y"]
            est = y.mean(axis=1)
            return self._out(est, np.full(est.shape, self.sd / math.sqrt(y.shape[1])))
        y0, y1 = _batch_arms(batch)
        se = math.sqrt(self.sd**2 / y0.shape[1] + self._sd1() ** 2 / y1.shape[1])
        est = y1.mean(axis=1) - y0.mean(axis=1)
        return self._out(est, np.full(est.shape, se))

    def analytic_power(self, process, alpha):
        nc = process.normal_case()
        if nc is None or nc["design"] == "paired":
            return None
        if nc["design"] == "one-sample":
            if not math.isclose(nc["sd"], self.sd):
                return None
            return analytic.z_power(nc["effect"] - self.null_mean, nc["n"], sd=self.sd, alpha=alpha,
                                    alternative=self.alternative, design="one-sample")
        if not (math.isclose(nc["sd0"], self.sd) and math.isclose(nc["sd1"], self._sd1())):
            return None
        if nc.get("sd") is None:
            return None
        return analytic.z_power(nc["effect"] - self.null_mean, nc["n"], sd=self.sd, alpha=alpha,
                                alternative=self.alternative, design="two-sample", ratio=nc["ratio"])


