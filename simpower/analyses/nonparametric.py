"""Rank tests: Mann-Whitney (two arms) and Wilcoxon signed rank (one sample / pairs).

Both use the normal approximation with the tie correction, as
``scipy.stats.mannwhitneyu(method="asymptotic")`` and
``scipy.stats.wilcoxon(method="asymptotic")`` do; the per-replicate paths call
scipy, and the batch paths sort every replicate of a chunk at once
(:func:`rank_rows`) and agree with scipy to about 1e-10. The Mann-Whitney batch
sorts the pooled arms once: the rank sum, the tie term and the placement values of
the probability index all come from that one sort (with the numba kernel and the
shift estimand or 'none' it sorts each arm instead and runs one compiled kernel over the
rows, :func:`simpower.analyses._rank_kernels.rank_test_rows`: U and the tie term by one merge
of the two sorted arms -- integer counts, so the same floats -- and the Hodges-Lehmann order
statistics; the signed-rank test likewise). With missing outcomes the kernel takes ragged rows
(each row's observed values sorted first, the unobserved cells set to +inf); without numba the
replicates are grouped by their observed counts and compacted (:func:`_by_counts`). Both give
the same floats as the per-replicate path's arithmetic on the observed values.

Estimates are Hodges-Lehmann estimates (Hodges & Lehmann 1963, Ann Math Stat
34:598-611): the median of the pairwise differences between arms (a location
shift) or of the Walsh averages (a pseudo-median), with the distribution-free
confidence interval given by order statistics of those differences (Hollander &
Wolfe 1999, Nonparametric Statistical Methods, 2nd ed., sections 3.2 and 4.3,
large-sample approximation). The shift is the estimand of the built-in
processes' ``true_effect`` under a location-shift model, so bias and coverage
are meaningful there; the Mann-Whitney test can report the probability index
P(Y1 > Y0) + P(Y1 = Y0)/2 instead.

The order statistics come from one of two paths that give the same floats
(:func:`order_statistic_backend`): with numba (a dependency of simpower), a
compiled selection on the sorted samples
(:mod:`simpower.analyses._rank_kernels`, a few O(n0 + n1) staircase walks per
order statistic); otherwise, or with the environment variable
``SIMPOWER_NO_NUMBA=1`` (read at each call), or where numba cannot be imported,
the numpy reference path that forms
all m differences (or Walsh averages) and partitions them. Every order statistic is
one of those values, computed by the same floating-point operation on both paths,
so a seed gives the same numbers with or without numba.
"""

from __future__ import annotations

import math
import os

import numpy as np
from scipy import special, stats

from .._validation import Bool, Choice, Real
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import p_from_z, paired_differences, split_arms

#: largest number of pairwise differences held in memory at once by the numpy path
_BLOCK = 2_000_000

#: environment variable: set to 1 (or true/yes), the Hodges-Lehmann estimates use the numpy path
NO_NUMBA_ENV = "SIMPOWER_NO_NUMBA"


def order_statistic_backend() -> str:
    """Which path computes the Hodges-Lehmann order statistics now: 'numba' or 'numpy'.

    'numba' when numba is importable and ``SIMPOWER_NO_NUMBA`` is unset (or 0,
    false, no); read at each call, so a test or a session can switch paths. Both
    paths return the same floats.
    """
    if os.environ.get(NO_NUMBA_ENV, "").strip().lower() not in ("", "0", "false", "no"):
        return "numpy"
    from . import _rank_kernels  # imports numba (if there) on first use only

    return "numba" if _rank_kernels.HAVE_NUMBA else "numpy"


# -- ranks for many replicates at once ------------------------------------------------
def _sorted_rows(a: np.ndarray):
    """Argsort, sorted values and group starts (``new[:, p]``: position p starts a tie group) of each row.

    Any sort kind serves: the ranks and tie terms derived from it do not depend on
    the order of tied values.
    """
    order = np.argsort(a, axis=1)
    s = np.take_along_axis(a, order, axis=1)
    new = np.ones(a.shape, bool)
    new[:, 1:] = s[:, 1:] != s[:, :-1]
    return order, s, new


def _tie_groups(new: np.ndarray):
    """First and last sorted position of the tie group of each sorted position."""
    r, n = new.shape
    idx = np.broadcast_to(np.arange(n), (r, n))
    last = np.ones((r, n), bool)
    last[:, :-1] = new[:, 1:]
    start = np.maximum.accumulate(np.where(new, idx, 0), axis=1)
    end = np.minimum.accumulate(np.where(last, idx, n - 1)[:, ::-1], axis=1)[:, ::-1]
    return start, end


def _tied_ranks(order, new):
    """Average ranks and tie terms of rows with ties (``order``: argsort, ``new``: group starts)."""
    start, end = _tie_groups(new)
    ranks = np.empty(order.shape)
    np.put_along_axis(ranks, order, (start + end) / 2.0 + 1.0, axis=1)
    t = (end - start + 1).astype(float)
    # each member of a tie group of size t adds t^2 - 1: t (t^2 - 1) per group
    return ranks, np.sum(t * t - 1.0, axis=1)


def rank_rows(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Average ranks along axis 1 and the tie term sum(t^3 - t) of each row.

    Parameters
    ----------
    a : ndarray, shape (R, N)

    Returns
    -------
    ranks : ndarray, shape (R, N)
        1-based ranks, ties given their mean rank (as ``scipy.stats.rankdata``).
    tie_term : ndarray, shape (R,)
        Sum over groups of tied values of t^3 - t (t = group size).
    """
    a = np.asarray(a, float)
    r, n = a.shape
    order, _, new = _sorted_rows(a)
    tied = ~new.all(axis=1)
    tie = np.zeros(r)
    if tied.all():
        ranks, tie = _tied_ranks(order, new)
        return ranks, tie
    ranks = np.empty((r, n))  # continuous data: ranks are the inverse permutation
    np.put_along_axis(ranks, order, np.broadcast_to(np.arange(1.0, n + 1.0), (r, n)), axis=1)
    if tied.any():
        ranks[tied], tie[tied] = _tied_ranks(order[tied], new[tied])
    return ranks, tie


class _PooledRanking:
    """One sort of the pooled rows ``[x1 (n1 columns), y0 (n0 columns)]`` and what follows from it.

    ``rank_sum1``: rank sum of the first n1 columns (arm 1); ``tie``: the tie term.
    """

    def __init__(self, pooled: np.ndarray, n1: int):
        self.n1 = n1
        self.order, _, self.new = _sorted_rows(pooled)
        r, n = pooled.shape
        self.tied = ~self.new.all(axis=1)
        # tie-free rows: the rank of a value is its sorted position + 1 (sums of integers: exact)
        self.rank_sum1 = (self.order < n1) @ np.arange(1.0, n + 1.0)
        self.tie = np.zeros(r)
        if self.tied.any():
            ranks, self.tie[self.tied] = _tied_ranks(self.order[self.tied], self.new[self.tied])
            self.rank_sum1[self.tied] = ranks[:, :n1].sum(axis=1)

    def placement_variances(self):
        """Sample variances (ddof 1) of the placement values (DeLong et al. 1988) of each row.

        Arm 1's placements are the shares of arm 0 below each arm-1 value, arm 0's
        the shares of arm 1 above each arm-0 value; ties count half. Returns two
        arrays (R,). Rows without ties use sums of integer counts (exact); rows
        with ties use the counts of their tie groups.
        """
        r, n = self.order.shape
        n1 = self.n1
        n0 = n - n1
        var10, var01 = np.empty(r), np.empty(r)
        free = ~self.tied
        with np.errstate(invalid="ignore", divide="ignore"):
            if free.any():
                var10[free], var01[free] = self._untied_variances(self.order[free] if self.tied.any()
                                                                  else self.order, n0, n1)
            if self.tied.any():
                v10, v01 = self._tied_placements(self.order[self.tied], self.new[self.tied], n0, n1)
                var10[self.tied], var01[self.tied] = v10.var(axis=1, ddof=1), v01.var(axis=1, ddof=1)
        return var10, var01

    @staticmethod
    def _untied_variances(order, n0, n1):
        # at sorted position p: c0[p] arm-0 values at or before p; an arm-1 value there has c0[p]
        # arm-0 values below it, an arm-0 value has p + 1 - c0[p] arm-1 values below it
        n = n0 + n1
        is0 = order >= n1
        c0 = np.cumsum(is0, axis=1, dtype=np.int32).astype(float)
        in1 = (~is0).astype(float)
        in0 = is0.astype(float)
        b1 = np.arange(1.0, n + 1.0) - c0
        s1, s2 = np.einsum("ij,ij->i", in1, c0), np.einsum("ij,ij,ij->i", in1, c0, c0)
        t1, t2 = np.einsum("ij,ij->i", in0, b1), np.einsum("ij,ij,ij->i", in0, b1, b1)
        # integer sums, exact: n S2 - S1^2 = n (n - 1) times the sample variance of the counts
        return (np.maximum(n1 * s2 - s1 * s1, 0.0) / (n1 * (n1 - 1.0)) / (n0 * n0),
                np.maximum(n0 * t2 - t1 * t1, 0.0) / (n0 * (n0 - 1.0)) / (n1 * n1))

    @staticmethod
    def _tied_placements(order, new, n0, n1):
        # per sorted position: arm-0 values before its tie group and in it, the group's start and size
        is0 = order >= n1
        cum0 = np.cumsum(is0, axis=1)
        st, en = _tie_groups(new)
        before = np.where(st > 0, np.take_along_axis(cum0, np.maximum(st - 1, 0), axis=1), 0)
        in0 = np.take_along_axis(cum0, en, axis=1) - before
        size = en - st + 1
        r = order.shape[0]
        # twice the counts, integers: arm 0 below an arm-1 value, arm 1 below an arm-0 value
        twice10 = (2 * before + in0)[~is0].reshape(r, n1)
        twice01 = (2 * (st - before) + (size - in0))[is0].reshape(r, n0)
        return twice10 / (2.0 * n0), 1.0 - twice01 / (2.0 * n1)


def _order_stats(d: np.ndarray, ks) -> dict:
    """The 0-based order statistics ``ks`` of each row of ``d``, as a dict k -> values (R,)."""
    ks = sorted(set(int(k) for k in ks))
    part = np.partition(d, ks, axis=1)
    return {k: part[:, k] for k in ks}


def _hl_ranks(m: int, k_ci: int) -> list[int]:
    """0-based ranks needed: the two middle ones and, when k >= 1, the interval's k-1 and m-k."""
    ks = [(m - 1) // 2, m // 2]
    if k_ci >= 1:
        ks += [k_ci - 1, m - k_ci]
    return ks


def _hl_from_order_stats(v: dict, m: int, k_ci: int, rows: int):
    """Median and the (k, m + 1 - k) order-statistic interval (1-based k) from the order statistics ``v``."""
    est = 0.5 * (v[(m - 1) // 2] + v[m // 2])
    if k_ci >= 1:
        return est, v[k_ci - 1], v[m - k_ci]
    inf = np.full(rows, np.inf)
    return est, -inf, inf


def _ci_index(m: int, sd0: float, ci_level: float) -> int:
    """1-based order statistic k of the interval: the integer closest to m/2 - z sd0."""
    z = stats.norm.ppf(0.5 + ci_level / 2)
    return int(math.floor(m / 2.0 - z * sd0 + 0.5))


def _blocks(rows: int, per_row: int):
    step = max(1, _BLOCK // max(per_row, 1))
    for lo in range(0, rows, step):
        yield slice(lo, min(rows, lo + step))


def _pairwise_order_stats(kind: str, arrays, ks, m: int) -> dict:
    """Order statistics ``ks`` of the pairwise values of each row, by the current backend.

    ``kind`` 'difference' (``arrays`` = (y0, y1): all y1_j - y0_i) or 'walsh'
    (``arrays`` = (d,): (d_i + d_j) / 2, i <= j). Both backends return the same floats.
    """
    rows = arrays[0].shape[0]
    if order_statistic_backend() == "numba":
        from . import _rank_kernels

        if kind == "difference":
            return _rank_kernels.difference_order_stats(arrays[1], arrays[0], ks)
        return _rank_kernels.walsh_order_stats(arrays[0], ks)
    out = {k: np.empty(rows) for k in ks}
    if kind == "walsh":
        i, j = np.triu_indices(arrays[0].shape[1])
    for b in _blocks(rows, m):
        if kind == "difference":
            y0, y1 = arrays
            w = (y1[b, None, :] - y0[b, :, None]).reshape(-1, m)
        else:
            w = 0.5 * (arrays[0][b][:, i] + arrays[0][b][:, j])
        for k, v in _order_stats(w, ks).items():
            out[k][b] = v
    return out


def shift_estimate(y0: np.ndarray, y1: np.ndarray, ci_level: float):
    """Hodges-Lehmann shift (median of y1_j - y0_i) with its order-statistic CI, row by row.

    ``y0`` (R, n0) and ``y1`` (R, n1). The interval is [D_(k), D_(m+1-k)] of
    the m = n0 n1 sorted differences, k the integer closest to
    m/2 - z sqrt(m (n0 + n1 + 1) / 12) (Hollander & Wolfe 1999, eq. 4.41,
    no tie correction); infinite when k < 1.
    """
    r, n0 = y0.shape
    n1 = y1.shape[1]
    m = n0 * n1
    k = _ci_index(m, math.sqrt(m * (n0 + n1 + 1) / 12.0), ci_level)
    v = _pairwise_order_stats("difference", (y0, y1), _hl_ranks(m, k), m)
    return _hl_from_order_stats(v, m, k, r)


def _shift_test_sorted(y0: np.ndarray, x1: np.ndarray, ci_level: float):
    """U1, the tie term and the Hodges-Lehmann shift of each row from the two sorted arms (numba path).

    The shift kernel sorts each arm anyway; U1 and the tie term then follow from
    staircase counts, without the pooled sort. U1 = #(x1 > y0) + #(x1 = y0) / 2 from
    the counts of differences <= 0 and < 0 (the largest float below 0 is the
    smallest subnormal); both are integer counts, so U1 and the tie term are the
    same floats as from the pooled ranks.
    """
    from . import _rank_kernels

    r, n0 = y0.shape
    n1 = x1.shape[1]
    m = n0 * n1
    u, v = _rank_kernels.sorted_difference_terms(x1, y0)
    counts = _rank_kernels.count_sorted_sums(u, v, [0.0, -np.nextafter(0.0, 1.0)])
    le, lt = counts[:, 0], counts[:, 1]
    u1 = (m - le) + 0.5 * (le - lt)
    tie = np.zeros(r)
    tied = (le != lt) | np.any(v[:, 1:] == v[:, :-1], axis=1) | np.any(u[:, 1:] == u[:, :-1], axis=1)
    if tied.any():
        tie[tied] = rank_rows(np.concatenate([x1[tied], y0[tied]], axis=1))[1]
    k = _ci_index(m, math.sqrt(m * (n0 + n1 + 1) / 12.0), ci_level)
    est = _hl_from_order_stats(_rank_kernels.select_sorted_sums(u, v, _hl_ranks(m, k)), m, k, r)
    return u1, tie, est


def pseudo_median(d: np.ndarray, ci_level: float):
    """Hodges-Lehmann one-sample estimate (median of Walsh averages) and its CI, row by row.

    ``d`` (R, n); the M = n (n + 1) / 2 Walsh averages (d_i + d_j) / 2, i <= j.
    The interval is [W_(k), W_(M+1-k)], k the integer closest to
    M/2 - z sqrt(n (n + 1) (2n + 1) / 24) (Hollander & Wolfe 1999, eq. 3.26).
    """
    r, n = d.shape
    mm = n * (n + 1) // 2
    k = _ci_index(mm, math.sqrt(n * (n + 1) * (2 * n + 1) / 24.0), ci_level)
    v = _pairwise_order_stats("walsh", (d,), _hl_ranks(mm, k), mm)
    return _hl_from_order_stats(v, mm, k, r)


def _count_groups(counts: np.ndarray):
    """Replicates grouped by their observed counts: yields (counts row, replicate indices), in order.

    ``counts`` (R, k) integers (one column per sample). Rows of a group have the same
    counts, so their observed values compact into dense (rows, count) arrays.
    """
    keys, inv = np.unique(counts, axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    order = np.argsort(inv, kind="stable")
    bounds = np.cumsum(np.bincount(inv, minlength=keys.shape[0]))[:-1]
    for key, rows in zip(keys, np.split(order, bounds)):
        yield key, rows


def _compact(y: np.ndarray, mask: np.ndarray, rows: np.ndarray, count: int) -> np.ndarray:
    """The masked values of ``rows`` of ``y`` as a dense (len(rows), count) array, in column order."""
    return y[rows][mask[rows]].reshape(rows.size, count)


def _by_counts(analysis, batch, samples, dense) -> BatchResult:
    """A batch path with missing outcomes: ``dense`` run on replicates grouped by observed counts.

    ``samples``: [(y, mask)] per sample, (R, N) each. Replicates of one group have the
    same count in every sample, so their observed values form dense arrays and ``dense``
    (the complete-data computation, a function of those arrays returning a
    :class:`BatchResult`) applies unchanged. Replicates with fewer than two observed
    values in a sample go to the per-replicate path (:func:`hand_over`).
    """
    r = batch.size
    counts = np.column_stack([np.count_nonzero(m, axis=1) for _, m in samples])
    few = np.any(counts < 2, axis=1)
    out: dict[str, np.ndarray] = {"pvalue": np.full(r, np.nan)}
    for key, rows in _count_groups(counts):
        if np.any(key < 2):
            continue
        res = dense(*(_compact(y, m, rows, int(c)) for (y, m), c in zip(samples, key)))
        for f, v in res.items():
            if f in ("trouble", "trouble_messages", "names", "pvalues"):
                continue
            out.setdefault(f, np.full(r, np.nan))[rows] = v
    return hand_over(analysis, batch, BatchResult(**out), few)


# -- the compiled whole-test path (numba): ragged rows, no grouping -----------------------------
def _sorted_observed(y: np.ndarray, mask):
    """Rows of ``y`` sorted with the unobserved cells (``mask`` False) set to +inf, and the observed counts.

    The first ``counts[r]`` values of row r are its observed values, sorted: the same
    numbers as sorting the compacted values (observed values are finite).
    """
    if mask is None:
        return np.sort(y, axis=1), np.full(y.shape[0], y.shape[1], np.int64)
    return np.sort(np.where(mask, y, np.inf), axis=1), np.count_nonzero(mask, axis=1).astype(np.int64)


def _hl_rank_table(m: np.ndarray, sd0: np.ndarray, ci_level: float, use: np.ndarray):
    """Per row: the 0-based ranks [(m-1)//2, m//2, k-1, m-k] (the last two -1 when k < 1; all -1
    where not ``use``), the normal model's guess of each (speed only) and k.

    k is :func:`_ci_index` row by row (the same floating-point operations), so the ranks
    are those of :func:`_hl_ranks`.
    """
    z = stats.norm.ppf(0.5 + ci_level / 2)
    k = np.floor(m / 2.0 - z * sd0 + 0.5).astype(np.int64)
    a, b = (m - 1) // 2, m // 2
    has = k >= 1
    c = np.where(has, k - 1, -1)
    d = np.where(has, m - k, -1)
    kq = np.column_stack([a, b, c, d])
    kq[~use] = -1
    with np.errstate(divide="ignore", invalid="ignore"):
        zm = special.ndtri((0.5 * (a + b + 1)) / m)   # as select_sorted_sums: the pair's middle
        zq = np.column_stack([zm, zm, special.ndtri((0.5 * (2 * c + 1)) / m), special.ndtri((0.5 * (2 * d + 1)) / m)])
    zq[~np.isfinite(zq)] = 0.0
    return kq, zq, k


def _hl_from_table(est: np.ndarray, k: np.ndarray):
    """Median and interval from the order statistics of :func:`_hl_rank_table`'s ranks (as _hl_from_order_stats)."""
    has = k >= 1
    return (0.5 * (est[:, 0] + est[:, 1]), np.where(has, est[:, 2], -np.inf), np.where(has, est[:, 3], np.inf))


def _nan_rows(res: BatchResult, rows: np.ndarray) -> BatchResult:
    """Fields of ``res`` set to NaN on ``rows`` (replicates handed over to the per-replicate path)."""
    for f, v in res.items():
        if f in ("trouble", "trouble_messages", "names", "pvalues"):
            continue
        v[rows] = np.nan
    return res


# -- Mann-Whitney ------------------------------------------------------------------------
class MannWhitney(Analysis):
    """Mann-Whitney (Wilcoxon rank-sum) test of two arms, normal approximation.

    H0: arm 1 minus ``null_value`` and arm 0 have the same distribution,
    against ``alternative`` ('greater': arm 1 tends to be larger). The
    z statistic uses the tie-corrected variance and, with ``continuity``, a
    continuity correction of 1/2 -- exactly as
    ``scipy.stats.mannwhitneyu(y1, y0, method="asymptotic")``.

    Parameters
    ----------
    alternative : {'two-sided', 'greater', 'less'}
    continuity : bool, default True
        Continuity correction (scipy's ``use_continuity``).
    estimand : {'shift', 'probability', 'none'}, default 'shift'
        'shift': the Hodges-Lehmann estimate of the location shift (median of
        all differences arm 1 - arm 0) with the order-statistic CI (no SE).
        'probability': the probability index P(Y1 > Y0) + P(Y1 = Y0)/2 =
        U1 / (n0 n1), with the placement (DeLong et al. 1988, Biometrics
        44:837-845) SE and a Wald CI clipped to [0, 1].
        'none': the p-value only (fastest; for power alone).
    ci_level : float in (0, 1), default 0.95
        Level of the two-sided CI (two-sided whatever ``alternative``).
    null_value : float, default 0
        Shift under H0 (subtracted from arm 1 before ranking).

    Notes
    -----
    Bias and coverage: the shift is compared with the process's true effect
    (a mean difference, equal to the shift under a location-shift model; give
    the scenario's ``true_effects`` otherwise); the probability index only
    with ``true_effects``.
    Missing outcomes (NaN) are dropped. The batch path (contiguous arms, no
    missing values) sorts the pooled arms of all replicates at once; with missing
    outcomes it does so for each group of replicates with the same observed
    counts in the two arms (their observed values compacted); the
    Hodges-Lehmann order statistics use the compiled kernel when numba is
    installed (see the module notes).
    """

    name = "mann_whitney"
    null_hypothesis = "arm 1 shifted by null_value and arm 0 have the same distribution"
    params = {"alternative": ALTERNATIVE, "continuity": Bool(),
              "estimand": Choice(("shift", "probability", "none")),
              "ci_level": CI_LEVEL, "null_value": Real()}
    defaults = {"alternative": "two-sided", "continuity": True, "estimand": "shift", "ci_level": 0.95,
                "null_value": 0.0}

    @property
    def estimand_label(self) -> str | None:
        """'location shift' (equal to the mean difference only under a pure shift model), or the index."""
        return {"probability": "probability index", "shift": "location shift"}.get(self.estimand)

    def __call__(self, data):
        if "arm" not in data:
            raise ValueError("mann_whitney needs two arms (an 'arm' column); use wilcoxon_signed_rank for one sample")
        y0, y1 = split_arms(data)
        x1 = y1 - self.null_value
        r = stats.mannwhitneyu(x1, y0, use_continuity=self.continuity, alternative=self.alternative,
                               method="asymptotic")
        out = self._estimates(y0[None, :], x1[None, :], np.array([float(r.statistic)]))
        return TestResult(pvalue=float(r.pvalue), statistic=float(r.statistic),
                          **{k: float(v[0]) for k, v in out.items()})

    def _shift_fields(self, est, lo, hi):
        nv = self.null_value
        return {"estimate": est + nv, "se": np.full(est.shape, np.nan), "ci_low": lo + nv, "ci_high": hi + nv}

    def _estimates(self, y0, x1, u1, pooled=None):
        """Estimate, SE and CI; ``pooled`` (batch path): the :class:`_PooledRanking` of [x1, y0]."""
        n0, n1 = y0.shape[1], x1.shape[1]
        if self.estimand == "none":
            return {}
        if self.estimand == "shift":
            return self._shift_fields(*shift_estimate(y0, x1, self.ci_level))
        est = u1 / (n0 * n1)
        if pooled is None:  # per replicate: placements from scipy's ranks, the reference
            both = stats.rankdata(np.concatenate([y0, x1], axis=1), axis=1)
            v10 = (both[:, n0:] - stats.rankdata(x1, axis=1)) / n0       # share of arm 0 below each arm-1 value
            v01 = 1.0 - (both[:, :n0] - stats.rankdata(y0, axis=1)) / n1  # share of arm 1 above each arm-0 value
            with np.errstate(invalid="ignore", divide="ignore"):
                var10, var01 = v10.var(axis=1, ddof=1), v01.var(axis=1, ddof=1)
        else:
            var10, var01 = pooled.placement_variances()
        with np.errstate(invalid="ignore", divide="ignore"):
            se = np.sqrt(var10 / n1 + var01 / n0)
        z = stats.norm.ppf(0.5 + self.ci_level / 2)
        return {"estimate": est, "se": se, "ci_low": np.clip(est - z * se, 0, 1),
                "ci_high": np.clip(est + z * se, 0, 1)}

    layouts = ("two_arm",)

    def _supports(self, layout):
        """Complete batches with contiguous arms; batches of a process with missing outcomes."""
        return layout.missing or (layout.complete and layout.split is not None)

    def batch(self, batch):
        layout = self.batch_layout(batch)
        # the compiled path: U, the tie term and the shift by one kernel, row by row (ragged rows)
        compiled = self.estimand != "probability" and order_statistic_backend() == "numba"
        if not layout.complete:  # complete cases
            obs = layout.observed
            masks = (obs & (layout.arm == 0), obs & (layout.arm == 1))
            if compiled:
                few = (np.count_nonzero(masks[0], axis=1) < 2) | (np.count_nonzero(masks[1], axis=1) < 2)
                if not few.all():
                    s, y = layout.split, layout.y
                    parts = ((y, masks[0], y, masks[1]) if s is None else
                             (y[:, :s], masks[0][:, :s], y[:, s:], masks[1][:, s:]))
                    return hand_over(self, batch, _nan_rows(self._compiled(*parts), few), few)
            # grouped by the observed counts of the two arms
            return _by_counts(self, batch, [(layout.y, masks[0]), (layout.y, masks[1])], self._dense)
        y0, y1 = layout.arms()
        if compiled and np.isfinite(y0).all() and np.isfinite(y1).all():
            return self._compiled(y0, None, y1, None)
        return self._dense(y0, y1)

    def _compiled(self, y0, mask0, y1, mask1):
        """The batch statistics by the compiled kernel: arms ``y0``, ``y1`` (R, W) with their observed
        masks (None: every value); the same floats as :meth:`_dense` on each replicate's observed values."""
        from . import _rank_kernels

        y0s, n0 = _sorted_observed(y0, mask0)
        x1s, n1 = _sorted_observed(y1 - self.null_value, mask1)
        m = n0 * n1
        use = (n0 >= 1) & (n1 >= 1) & (self.estimand == "shift")
        kq, zq, k = _hl_rank_table(m, np.sqrt(m * (n0 + n1 + 1) / 12.0), self.ci_level, use)
        twice, tie, _, est = _rank_kernels.rank_test_rows(y0s, n0, x1s, n1, "two", kq, zq)
        fields = self._shift_fields(*_hl_from_table(est, k)) if self.estimand == "shift" else {}
        with np.errstate(divide="ignore", invalid="ignore"):
            return BatchResult(pvalue=self._pvalue(twice / 2.0, tie, n0, n1), **fields)

    def _pvalue(self, u1, tie, n0, n1):
        """p-value of U1 with the tie term (scipy's asymptotic method); ``n0``, ``n1`` ints or arrays."""
        n = n0 + n1
        u0 = n0 * n1 - u1
        u = {"greater": u1, "less": u0}.get(self.alternative)
        if u is None:
            u = np.maximum(u1, u0)
        s = np.sqrt(n0 * n1 / 12.0 * ((n + 1) - tie / (n * (n - 1))))
        num = u - n0 * n1 / 2.0 - (0.5 if self.continuity else 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = num / s
        p = special.ndtr(-z) * (2.0 if self.alternative == "two-sided" else 1.0)
        return np.clip(p, 0.0, 1.0)

    def _dense(self, y0, y1):
        """The batch statistics of dense arms ``y0`` (R, n0) and ``y1`` (R, n1)."""
        x1 = y1 - self.null_value
        n0, n1 = y0.shape[1], x1.shape[1]
        pooled = shift = None
        if self.estimand == "shift" and order_statistic_backend() == "numba":
            u1, tie, shift = _shift_test_sorted(y0, x1, self.ci_level)
        else:
            pooled = _PooledRanking(np.concatenate([x1, y0], axis=1), n1)
            u1, tie = pooled.rank_sum1 - n1 * (n1 + 1) / 2.0, pooled.tie
        fields = self._estimates(y0, x1, u1, pooled) if shift is None else self._shift_fields(*shift)
        return BatchResult(pvalue=self._pvalue(u1, tie, n0, n1), **fields)


# -- Wilcoxon signed rank ---------------------------------------------------------------------
class WilcoxonSignedRank(Analysis):
    """Wilcoxon signed-rank test, normal approximation with tie correction.

    One sample (no ``arm`` column: the values ``y``) or paired data (``arm``
    and ``pair``: the within-pair differences arm 1 - arm 0).
    H0: the distribution of the values (differences) is symmetric about
    ``null_value``. Zero differences are dropped (Wilcoxon's method); the
    z statistic uses the tie-corrected variance and, with ``continuity``, a
    continuity correction of 1/2 -- exactly as
    ``scipy.stats.wilcoxon(d - null_value, method="asymptotic")``.

    Parameters
    ----------
    alternative : {'two-sided', 'greater', 'less'}
        'greater': the centre of symmetry exceeds ``null_value``.
    continuity : bool, default False
        Continuity correction (scipy's ``correction``).
    ci_level : float in (0, 1), default 0.95
    null_value : float, default 0

    The estimate is the Hodges-Lehmann pseudo-median (median of the Walsh
    averages) with the order-statistic CI (no SE).
    """

    name = "wilcoxon_signed_rank"
    null_hypothesis = "the values (or within-pair differences) are symmetric about null_value"
    params = {"alternative": ALTERNATIVE, "continuity": Bool(), "ci_level": CI_LEVEL, "null_value": Real()}
    defaults = {"alternative": "two-sided", "continuity": False, "ci_level": 0.95, "null_value": 0.0}

    def __call__(self, data):
        if "arm" in data:
            d = paired_differences(data)
        else:
            d = np.asarray(data["y"], float)
            d = d[np.isfinite(d)]
        x = d - self.null_value
        r = stats.wilcoxon(x, correction=self.continuity, alternative=self.alternative, method="asymptotic")
        est, lo, hi = pseudo_median(x[None, :], self.ci_level)
        nv = self.null_value
        return TestResult(pvalue=float(r.pvalue), statistic=float(r.statistic), estimate=float(est[0]) + nv,
                          ci_low=float(lo[0]) + nv, ci_high=float(hi[0]) + nv)

    layouts = ("one_sample", "paired")

    def _supports(self, layout):
        """Complete batches (no missingness, no padding), or of a process with missing outcomes."""
        return layout.complete or layout.missing

    def batch(self, batch):
        layout = self.batch_layout(batch)
        d = layout.y if layout.kind == "one_sample" else layout.y1 - layout.y0
        compiled = order_statistic_backend() == "numba"   # ranks and pseudo-median by one kernel, row by row
        if not layout.complete:  # complete cases (pairs)
            mask = layout.observed if layout.kind == "one_sample" else layout.pair_observed
            if compiled:
                few = np.count_nonzero(mask, axis=1) < 2
                if not few.all():
                    return hand_over(self, batch, _nan_rows(self._compiled(d, mask), few), few)
            # grouped by their observed count
            return _by_counts(self, batch, [(d, mask)], self._dense)
        if compiled and np.isfinite(d).all():
            return self._compiled(d, None)
        return self._dense(d)

    def _compiled(self, d, mask):
        """The batch statistics by the compiled kernel: values ``d`` (R, W) with their observed mask
        (None: every value); the same floats as :meth:`_dense` on each replicate's observed values."""
        from . import _rank_kernels

        xs, n = _sorted_observed(d - self.null_value, mask)
        mm = n * (n + 1) // 2
        kq, zq, k = _hl_rank_table(mm, np.sqrt(n * (n + 1) * (2 * n + 1) / 24.0), self.ci_level, n >= 1)
        twice, tie, nz, est = _rank_kernels.rank_test_rows(xs, n, xs, n, "one", kq, zq)
        nz = nz.astype(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = self._z(twice / 2.0, tie, nz, n)
        est, lo, hi = _hl_from_table(est, k)
        nv = self.null_value
        return BatchResult(pvalue=p_from_z(z, self.alternative), estimate=est + nv, ci_low=lo + nv,
                           ci_high=hi + nv)

    def _z(self, r_plus, tie, nz, n):
        """z statistic of the positive rank sum (zeros dropped), tie-corrected, with the continuity option."""
        c = n - nz
        mn = c * (c + 1) / 4.0
        with np.errstate(divide="ignore", invalid="ignore"):
            se = np.sqrt((c * (c + 1) * (2 * c + 1) - tie / 2.0) / 24.0)
            z = (r_plus - mn) / se
            if self.continuity:
                sign = {"greater": 1.0, "less": -1.0}.get(self.alternative)
                z = z - (np.sign(z) if sign is None else sign) * 0.5 / se
        return z

    def _dense(self, d):
        """The batch statistics of dense values (or within-pair differences) ``d`` (R, n)."""
        x = d - self.null_value
        zero = x == 0
        nz = zero.sum(axis=1).astype(float)
        ranks, tie = rank_rows(np.abs(x))
        # zeros share the lowest ranks: dropping them lowers the other ranks by their count
        r_plus = np.where(x > 0, ranks - nz[:, None], 0.0).sum(axis=1)
        tie = tie - (nz**3 - nz)
        z = self._z(r_plus, tie, nz, x.shape[1])
        est, lo, hi = pseudo_median(x, self.ci_level)
        nv = self.null_value
        return BatchResult(pvalue=p_from_z(z, self.alternative), estimate=est + nv, ci_low=lo + nv,
                           ci_high=hi + nv)
