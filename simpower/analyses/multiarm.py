"""Several arms against a shared control: Dunnett's many-to-one test and the one-way ANOVA F test.

Both read a long table with ``y`` and ``arm`` (0 = control, 1, 2, ... the
other arms); missing outcomes (NaN) are dropped. The batch paths take the
``table`` layout whose shared ``arm`` labels are sorted and run 0, 1, ..., K - 1
(what ``multi_arm`` draws), with or without missing outcomes: only observed
outcomes count (complete cases, as on the per-replicate path), so the arm sizes
and the df may differ between replicates. They compute the same statistics with
numpy and agree with the per-replicate paths to floating-point tolerance; a
replicate with an arm left without observed outcomes, or with no residual df,
goes to the per-replicate path (which refuses it, as before).

:class:`Dunnett` returns one adjusted p-value per comparison with control
(``pvalues``, named ``"1-0"``, ``"2-0"``, ...; the run result reports
per-comparison, 'any' and 'all' power); its primary p-value is the smallest,
so the primary power is the disjunctive power (at least one arm beats
control). The adjusted p-values are those of ``scipy.stats.dunnett``
(single-step, pooled variance of all arms, many-to-one multivariate t),
evaluated by the deterministic quadrature of :mod:`simpower.analytic.multiarm`.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from .. import analytic
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import masked_mean_var


def _arm_groups(data):
    """Arm labels (sorted, control 0 first) and the finite outcomes of each arm."""
    if "arm" not in data:
        raise ValueError("a multi-arm analysis needs an 'arm' column (0 = control)")
    y = np.asarray(data["y"], float)
    arm = np.asarray(data["arm"])
    levels = np.unique(arm)
    if levels.size < 2 or levels[0] != 0:
        raise ValueError(f"a multi-arm analysis needs arm 0 (control) and at least one other arm; got {levels.tolist()}")
    groups = [y[(arm == lev) & np.isfinite(y)] for lev in levels]
    empty = [int(lev) for lev, g in zip(levels, groups) if g.size == 0]
    if empty:
        raise ValueError(f"arm {empty[0]} has no observed outcome")
    return levels, groups


def _sorted_blocks(layout):
    """Sizes of the arms 0..K-1 (rows, padding and missing outcomes included) when the shared arm labels
    are sorted blocks."""
    if "arm" not in layout.shared or "arm" in layout.per_rep:
        return None
    arm = np.asarray(layout.shared["arm"])
    if arm.ndim != 1 or arm.size != layout.width or not np.issubdtype(arm.dtype, np.integer):
        return None
    if arm.size == 0 or arm[0] != 0 or np.any(np.diff(arm) < 0):
        return None
    levels, sizes = np.unique(arm, return_counts=True)
    if levels.size < 2 or not np.array_equal(levels, np.arange(levels.size)):
        return None
    return sizes


#: the batch layout of the multi-arm tests: a complete table whose shared arm labels are sorted blocks 0..K-1
_ARMS_IN_BLOCKS = (("table",), staticmethod(lambda layout: _sorted_blocks(layout) is not None))


def _block_stats(y, sizes):
    """Per-arm means (R, K) and the within-arm sum of squares (R,) of contiguous blocks."""
    edges = np.concatenate([[0], np.cumsum(sizes)])
    means, ss = [], 0.0
    for a, b in zip(edges[:-1], edges[1:]):
        block = y[:, a:b]
        m = block.mean(axis=1)
        d = block - m[:, None]
        means.append(m)
        ss = ss + np.einsum("ij,ij->i", d, d)
    return np.column_stack(means), ss


def _masked_block_stats(layout, sizes):
    """Observed counts (R, K), means (R, K) and within-arm sum of squares (R,) of contiguous blocks."""
    edges = np.concatenate([[0], np.cumsum(sizes)])
    y, obs = layout.y, layout.observed
    counts, means, ss = [], [], 0.0
    for a, b in zip(edges[:-1], edges[1:]):
        n, m, v = masked_mean_var(y[:, a:b], obs[:, a:b])
        counts.append(n)
        means.append(m)
        ss = ss + np.where(n > 1, v * (n - 1), 0.0)
    return np.column_stack(counts), np.column_stack(means), ss


class Dunnett(Analysis):
    """Dunnett's many-to-one test: each arm against the shared control, single-step adjusted.

    H0 (comparison j): arm j's mean equals the control's (arm 0), against
    ``alternative`` ('greater': arm j above control). The SD is pooled over
    all arms (df = N - K); the adjusted p-value of comparison j is
    1 - P(max_i T_i < t_j) under the many-to-one multivariate t (two-sided:
    of |T|), as in ``scipy.stats.dunnett`` (Dunnett 1955, JASA 50:1096-1121).

    ``estimate`` is arm 1's mean difference from control, ``se`` its pooled
    standard error; the CI is that comparison's two-sided ``ci_level``
    interval with the pooled SD (per comparison, not simultaneous), so its
    coverage is comparable with the t-tests'.
    """

    name = "dunnett"
    null_hypothesis = "each arm's mean equals the control arm's mean (common variance)"
    params = {"alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"alternative": "two-sided", "ci_level": 0.95}

    def __call__(self, data):
        levels, groups = _arm_groups(data)
        sizes = np.array([g.size for g in groups], float)
        means = np.array([g.mean() for g in groups])
        df = sizes.sum() - sizes.size
        if df <= 0:
            raise ValueError(f"Dunnett's test needs more observations than arms; got {int(sizes.sum())}")
        ss = sum(float(np.sum((g - m) ** 2)) for g, m in zip(groups, means))
        fields = self._fields(means[None, :], np.array([ss]), sizes, df)
        return TestResult(pvalue=float(fields["pvalue"][0]), estimate=float(fields["estimate"][0]),
                          se=float(fields["se"][0]), ci_low=float(fields["ci_low"][0]),
                          ci_high=float(fields["ci_high"][0]), statistic=float(fields["t"][0, 0]), df=float(df),
                          pvalues=fields["pvalues"][0], names=tuple(f"{int(j)}-0" for j in levels[1:]))

    def _fields(self, means, ss, sizes, df):
        """Statistics of R replicates from arm means (R, K), within sum of squares (R,), sizes (K,), df."""
        with np.errstate(all="ignore"):
            s = np.sqrt(ss / df)
            se = s[:, None] * np.sqrt(1.0 / sizes[1:] + 1.0 / sizes[0])
            diff = means[:, 1:] - means[:, :1]
            t = diff / se
        adj = analytic.dunnett_pvalues(t, sizes, df, self.alternative)
        bad = ~np.all(np.isfinite(adj), axis=1)
        primary = np.where(bad, np.nan, np.min(np.where(bad[:, None], 0.0, adj), axis=1))
        crit = stats.t.ppf(0.5 + self.ci_level / 2, df)
        est, se1 = diff[:, 0], se[:, 0]
        return {"pvalue": primary, "pvalues": adj, "estimate": est, "se": se1, "ci_low": est - crit * se1,
                "ci_high": est + crit * se1, "t": t}

    layouts, _supports = _ARMS_IN_BLOCKS

    def batch(self, batch):
        layout = self.batch_layout(batch)
        sizes = _sorted_blocks(layout)
        names = tuple(f"{j}-0" for j in range(1, sizes.size))
        if layout.complete:
            with np.errstate(all="ignore"):
                means, ss = _block_stats(layout.y, sizes)
            f = self._fields(means, ss, sizes.astype(float), float(sizes.sum() - sizes.size))
            return BatchResult(pvalue=f["pvalue"], estimate=f["estimate"], se=f["se"], ci_low=f["ci_low"],
                               ci_high=f["ci_high"], pvalues=f["pvalues"], names=names)
        # observed outcomes only: replicates with the same observed arm sizes share the many-to-one
        # correlation and the df, so the quadrature runs once per distinct size vector
        counts, means, ss = _masked_block_stats(layout, sizes)
        R, k = layout.size, sizes.size
        out = {key: np.full(R, np.nan) for key in ("pvalue", "estimate", "se", "ci_low", "ci_high")}
        pvalues = np.full((R, k - 1), np.nan)
        bad = np.any(counts == 0, axis=1) | (counts.sum(axis=1) <= k)
        good = np.flatnonzero(~bad)
        if good.size:
            keys, inverse = np.unique(counts[good], axis=0, return_inverse=True)
            for g, key in enumerate(keys):
                rows = good[inverse.reshape(-1) == g]
                f = self._fields(means[rows], ss[rows], key.astype(float), float(key.sum() - k))
                for name in out:
                    out[name][rows] = f[name]
                pvalues[rows] = f["pvalues"]
        res = BatchResult(pvalues=pvalues, names=names, **out)
        return hand_over(self, batch, res, bad)

    def power_parts(self, process, alpha) -> dict | None:
        """Exact per-comparison, any- and all-rejection power (:func:`simpower.analytic.dunnett_power`).

        For a process stating multi-arm facts (a normal outcome with a common SD
        and no missingness: :class:`simpower.facts.MultiArmFacts`); None
        otherwise. The primary closed form (any rejection) is the cross-check
        table's entry (:mod:`simpower.crosscheck`).
        """
        from ..crosscheck import dunnett_parts
        from ..facts import MultiArmFacts

        facts = next((f for f in process.facts() if isinstance(f, MultiArmFacts)), None)
        return None if facts is None else dunnett_parts(self, facts, alpha)


class AnovaF(Analysis):
    """One-way ANOVA F test of equal means over all arms (``scipy.stats.f_oneway``).

    H0: every arm has the same mean (common variance). Returns the p-value only
    (no estimate: the F test has no one-number effect estimate).
    """

    name = "anova_f"
    null_hypothesis = "all arm means are equal (common variance)"

    def __call__(self, data):
        _, groups = _arm_groups(data)
        r = stats.f_oneway(*groups)
        return TestResult(pvalue=float(r.pvalue), statistic=float(r.statistic),
                          df=float(sum(g.size for g in groups) - len(groups)))

    layouts, _supports = _ARMS_IN_BLOCKS

    def batch(self, batch):
        layout = self.batch_layout(batch)
        sizes = _sorted_blocks(layout)
        k, n = sizes.size, int(sizes.sum())
        if layout.complete:
            with np.errstate(all="ignore"):
                means, ss_within = _block_stats(layout.y, sizes)
                grand = means @ sizes / n
                ss_between = ((means - grand[:, None]) ** 2) @ sizes
                f = (ss_between / (k - 1)) / (ss_within / (n - k))
            return BatchResult(pvalue=stats.f.sf(f, k - 1, n - k))
        counts, means, ss_within = _masked_block_stats(layout, sizes)
        n_obs = counts.sum(axis=1)
        bad = np.any(counts == 0, axis=1) | (n_obs <= k)
        with np.errstate(all="ignore"):
            grand = np.einsum("rk,rk->r", means, counts) / n_obs
            ss_between = np.einsum("rk,rk->r", (means - grand[:, None]) ** 2, counts)
            f = (ss_between / (k - 1)) / (ss_within / (n_obs - k))
            p = stats.f.sf(f, k - 1, n_obs - k)
        return hand_over(self, batch, BatchResult(pvalue=np.where(bad, np.nan, p)), bad)


