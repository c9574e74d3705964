"""Analyses of clustered and repeated data that are not mixed models.

* :class:`ClusterMeansT` -- the cluster-level summary t-test: one mean per
  cluster, compared between arms (Donner & Klar 2000, ch. 6). Batch path for
  equal and variable cluster sizes (padded layouts).
* :class:`GEE` -- generalised estimating equations (Liang & Zeger 1986); it lives in
  :mod:`simpower.analyses.gee` and is re-exported here (also as ``Gee``).
* :class:`FinalVisitT` -- complete-case Student or Welch t-test at the final
  visit of a repeated-measures table. Batch path.

Missing outcomes (NaN in ``y``) are dropped: these are complete-case analyses,
valid when outcomes are missing completely at random.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from .._validation import Bool, Choice
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult
from .gee import GEE
from .numeric import p_from_t


def _two_sided_ci(est, se, df, ci_level):
    """Two-sided t interval at ``ci_level`` (whatever the test's alternative, as in the t-tests)."""
    crit = stats.t.ppf(0.5 + ci_level / 2, df)
    return est - crit * se, est + crit * se


def _pooled_se(x0, x1) -> float:
    """SE of mean(x1) - mean(x0) with the pooled variance (defined with one value in an arm if df > 0)."""
    ss = np.sum((x0 - x0.mean()) ** 2) + np.sum((x1 - x1.mean()) ** 2)
    with np.errstate(all="ignore"):
        return float(np.sqrt(ss / (x0.size + x1.size - 2) * (1 / x0.size + 1 / x1.size)))


def _t_fields(est, se, df, alternative, ci_level):
    """p-value of ``est / se`` against t(df) and the two-sided CI (arrays allowed)."""
    lo, hi = _two_sided_ci(est, se, df, ci_level)
    return {"pvalue": p_from_t(est / se, df, alternative), "estimate": est, "se": se, "ci_low": lo, "ci_high": hi}


# -- cluster summaries ------------------------------------------------------------
def cluster_summaries(data) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-cluster sums and counts of observed outcomes, and each cluster's arm, for one long table.

    Raises
    ------
    ValueError
        If a cluster has members in both arms (individual randomisation).
    """
    y = np.asarray(data["y"], float)
    arm = np.asarray(data["arm"])
    _, inv = np.unique(np.asarray(data["cluster"]), return_inverse=True)
    inv = inv.ravel()
    ok = np.isfinite(y)
    counts = np.bincount(inv[ok])
    sums = np.bincount(inv[ok], weights=y[ok], minlength=counts.size)
    members = np.bincount(inv)
    arm_sum = np.bincount(inv, weights=arm.astype(float))
    if np.any((arm_sum != 0) & (arm_sum != members)):
        raise ValueError("cluster_means_t needs cluster randomisation: a cluster has members in both arms")
    counts = np.concatenate([counts, np.zeros(members.size - counts.size, counts.dtype)])
    sums = np.concatenate([sums, np.zeros(members.size - sums.size)])
    return sums, counts, (arm_sum > 0).astype(int)


class ClusterMeansT(Analysis):
    """Two-sample t-test on cluster means (cluster-level summary analysis).

    Each cluster is reduced to the mean of its observed outcomes (clusters
    with none are dropped), and the arms' cluster means are compared.

    Parameters
    ----------
    weights : {"equal", "size"}
        "equal" (default): Student's t-test on the cluster means, pooled
        variance, df = clusters - 2. Exact when clusters are equal in size
        and outcomes normal. "size": difference of size-weighted means (the
        individual-level mean difference), each arm's variance estimated by
        ``k/(k-1) * sum_c (m_c / M)^2 (mean_c - mean)^2`` over its k clusters
        (m_c observed members, M their total): the cluster-robust sandwich
        variance of the arm mean (Liang & Zeger 1986) with the k/(k-1)
        small-sample factor ("CR1", Cameron & Miller 2015), df = clusters - 2.
        With equal sizes both choices give the same test. On 0/1 outcomes the
        cluster means are cluster proportions and the estimate is the risk
        difference.
    alternative : {"two-sided", "greater", "less"}
        H1 "greater": arm 1 above arm 0.
    ci_level : float in (0, 1)
        Level of the two-sided confidence interval (two-sided whatever ``alternative``).

    Notes
    -----
    H0: the two arms have the same mean outcome (the mean of cluster means
    for "equal", of individuals for "size"). Needs ``y``, ``arm`` and
    ``cluster`` columns with every cluster in a single arm.
    """

    name = "cluster_means_t"
    null_hypothesis = "the two arms have equal mean cluster-level outcomes"
    params = {"weights": Choice(("equal", "size")), "alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"weights": "equal", "alternative": "two-sided", "ci_level": 0.95}

    # -- per replicate (scipy / statsmodels) --------------------------------------
    def __call__(self, data) -> TestResult:
        sums, counts, arm = cluster_summaries(data)
        keep = counts > 0
        means = sums[keep] / counts[keep]
        arm, counts = arm[keep], counts[keep]
        m0, m1 = means[arm == 0], means[arm == 1]
        if self.weights == "equal":
            r = stats.ttest_ind(m1, m0, equal_var=True, alternative=self.alternative)
            df = m0.size + m1.size - 2
            se = _pooled_se(m0, m1)
            est = float(m1.mean() - m0.mean())
            lo, hi = _two_sided_ci(est, se, df, self.ci_level)
            return TestResult(pvalue=float(r.pvalue), estimate=est, se=se, ci_low=lo, ci_high=hi,
                              statistic=float(r.statistic), df=float(df))
        est, var = 0.0, 0.0
        for a, sign in ((0, -1.0), (1, 1.0)):
            mean_a, var_a = _size_weighted_arm(data, a)
            est += sign * mean_a
            var += var_a
        df = m0.size + m1.size - 2
        with np.errstate(all="ignore"):
            out = _t_fields(np.float64(est), np.sqrt(var), df, self.alternative, self.ci_level)
        return TestResult(**{k: float(v) for k, v in out.items()}, statistic=float(est / np.sqrt(var)),
                          df=float(df))

    # -- batch --------------------------------------------------------------------
    layouts = ("clustered",)

    def _supports(self, layout):
        """Cluster ids are integers in [0, 4 N) (the per-cluster sums are indexed by them)."""
        cluster = layout.cluster
        return np.issubdtype(cluster.dtype, np.integer) and cluster.min() >= 0 and cluster.max() < 4 * cluster.shape[-1]

    def batch(self, batch):
        layout = self.batch_layout(batch)
        y = layout.y
        reps, width = y.shape
        present = layout.present
        present = np.ones((reps, width), bool) if present is None else present
        cluster = np.broadcast_to(layout.cluster, (reps, width))
        arm = np.broadcast_to(layout.arm, (reps, width))
        n_cl = int(cluster.max()) + 1
        idx = cluster + n_cl * np.arange(reps)[:, None]
        ok = present & np.isfinite(y)

        def per_cluster(mask, weights=None):
            w = None if weights is None else weights[mask]
            return np.bincount(idx[mask], weights=w, minlength=reps * n_cl).reshape(reps, n_cl)

        counts = per_cluster(ok)
        sums = per_cluster(ok, y)
        members = per_cluster(present)
        arm_sum = per_cluster(present, arm.astype(float))
        mixed = ((arm_sum != 0) & (arm_sum != members)).any(axis=1)
        keep = counts > 0
        with np.errstate(all="ignore"):
            means = np.where(keep, sums / counts, 0.0)
            in1 = keep & (arm_sum > 0)
            in0 = keep & ~(arm_sum > 0)
            k0, k1 = in0.sum(axis=1), in1.sum(axis=1)
            df = (k0 + k1 - 2).astype(float)
            if self.weights == "equal":
                mean0, ss0 = _masked_mean_ss(means, in0)
                mean1, ss1 = _masked_mean_ss(means, in1)
                se = np.sqrt((ss0 + ss1) / df * (1.0 / k0 + 1.0 / k1))
            else:
                mean0, v0 = _weighted_arm(means, counts, in0)
                mean1, v1 = _weighted_arm(means, counts, in1)
                se = np.sqrt(v0 + v1)
            out = _t_fields(mean1 - mean0, se, df, self.alternative, self.ci_level)
        if not mixed.any():
            return BatchResult(**out)
        out = BatchResult(**{f: np.where(mixed, np.nan, v) for f, v in out.items()})
        out.mark("error:ValueError", mixed, "cluster_means_t needs cluster randomisation: "
                                            "a cluster has members in both arms")
        return out


def _masked_mean_ss(x, mask):
    k = mask.sum(axis=1)
    mean = np.where(mask, x, 0.0).sum(axis=1) / k
    d = np.where(mask, x - mean[:, None], 0.0)
    return mean, np.einsum("ij,ij->i", d, d)


def _weighted_arm(means, counts, mask):
    """Size-weighted arm mean and its sandwich variance, per replicate."""
    w = np.where(mask, counts, 0).astype(float)
    total = w.sum(axis=1)
    k = mask.sum(axis=1)
    mean = (w * np.where(mask, means, 0.0)).sum(axis=1) / total
    r = np.where(mask, (means - mean[:, None]) * w / total[:, None], 0.0)
    return mean, k / (k - 1.0) * np.einsum("ij,ij->i", r, r)


def _size_weighted_arm(data, a):
    """Individual-level mean of arm ``a`` and k/(k-1) times its cluster-robust variance (statsmodels OLS)."""
    from statsmodels.regression.linear_model import OLS  # not statsmodels.api: it loads every model

    y = np.asarray(data["y"], float)
    sel = (np.asarray(data["arm"]) == a) & np.isfinite(y)
    groups = np.unique(np.asarray(data["cluster"])[sel], return_inverse=True)[1].ravel()
    k = int(groups.max()) + 1 if groups.size else 0
    if k < 2:  # no variance estimate from fewer than two clusters
        return (float(y[sel].mean()) if k else math.nan), math.nan
    fit = OLS(y[sel], np.ones(sel.sum())).fit(cov_type="cluster",
                                                 cov_kwds={"groups": groups, "use_correction": False})
    return float(fit.params[0]), k / (k - 1.0) * float(fit.bse[0]) ** 2


# -- GEE: simpower/analyses/gee.py (re-exported here, where it used to live) ----------
Gee = GEE


# -- final visit ----------------------------------------------------------------
class FinalVisitT(Analysis):
    """Complete-case t-test between arms at the final visit of repeated measures.

    Parameters
    ----------
    welch : bool
        Welch's unequal-variance t-test instead of Student's (default False).
    alternative, ci_level
        H1 "greater": arm 1 above arm 0.

    Notes
    -----
    H0: equal arm means at the final visit (the largest ``visit``), using the
    subjects observed there. Ignores earlier visits: the naive analysis,
    biased under MAR dropout that depends on earlier outcomes.
    """

    name = "final_visit_t"
    null_hypothesis = "equal arm means at the final visit (complete cases)"
    params = {"welch": Bool(), "alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"welch": False, "alternative": "two-sided", "ci_level": 0.95}

    def __call__(self, data) -> TestResult:
        y = np.asarray(data["y"], float)
        visit = np.asarray(data["visit"])
        arm = np.asarray(data["arm"])
        sel = (visit == visit.max()) & np.isfinite(y)
        y0, y1 = y[sel & (arm == 0)], y[sel & (arm == 1)]
        r = stats.ttest_ind(y1, y0, equal_var=not self.welch, alternative=self.alternative)
        if self.welch:
            se = math.sqrt(y0.var(ddof=1) / y0.size + y1.var(ddof=1) / y1.size)
        else:
            se = _pooled_se(y0, y1)
        est = float(y1.mean() - y0.mean())
        lo, hi = _two_sided_ci(est, se, float(r.df), self.ci_level)
        return TestResult(pvalue=float(r.pvalue), estimate=est, se=se, ci_low=float(lo), ci_high=float(hi),
                          statistic=float(r.statistic), df=float(r.df))

    layouts = ("longitudinal",)

    def _supports(self, layout):
        """No padding; arms and visits shared by all replicates."""
        return layout.present is None and "visit" in layout.shared and "arm" in layout.shared

    def batch(self, batch):
        layout = self.batch_layout(batch)
        visit, arm = layout.shared["visit"], layout.shared["arm"]
        last = visit == visit.max()
        y = layout.y[:, last]
        a = arm[last]
        ok = np.isfinite(y)
        in0, in1 = ok & (a == 0), ok & (a == 1)
        with np.errstate(all="ignore"):
            n0, n1 = in0.sum(axis=1), in1.sum(axis=1)
            m0, ss0 = _masked_mean_ss(y, in0)
            m1, ss1 = _masked_mean_ss(y, in1)
            v0, v1 = ss0 / (n0 - 1), ss1 / (n1 - 1)
            if self.welch:
                a0, a1 = v0 / n0, v1 / n1
                se = np.sqrt(a0 + a1)
                df = (a0 + a1) ** 2 / (a0**2 / (n0 - 1) + a1**2 / (n1 - 1))
            else:
                df = (n0 + n1 - 2).astype(float)
                se = np.sqrt((ss0 + ss1) / df * (1.0 / n0 + 1.0 / n1))
            return BatchResult(**_t_fields(m1 - m0, se, df, self.alternative, self.ci_level))
