"""Resampling analyses (permutation test, bootstrap CI) and the t-test on log outcomes.

Layouts: one sample (column ``y``), paired (``y``, ``arm``, ``pair``: the
within-pair differences arm 1 - arm 0), or two independent arms (``y`` and
``arm`` in {0, 1}). Missing outcomes are dropped.

Reproducible resampling without an ``rng``
-------------------------------------------
An analysis sees only the data, so the permutation and bootstrap analyses draw
their resamples from a generator seeded by ``SeedSequence([seed, h...])``,
where ``h`` are words of a SHA-256 hash of the data's bytes and ``seed`` is
the analysis parameter. The resamples are therefore a fixed function of the
data set: a run gives the same numbers for any number of jobs or executor,
two analyses with the same ``seed`` on one data set use the same resamples,
and different data sets (replicates) get unrelated streams. Change ``seed`` to
get another set of resamples.

Batch paths (two independent arms)
----------------------------------
``permutation_test`` and ``bootstrap_ci`` also run on a batch of replicates
(the ``two_arm`` layout, arms not paired) and give the very numbers of the
per-replicate path, bit for bit: each replicate still gets its own generator
``data_rng(seed, ...)`` and draws the same random numbers in the same order as
scipy does with it -- the permutation test ``n_resamples`` calls of
``Generator.permutation(n)`` (scipy's ``permutation_type='independent'``
loop), the bootstrap one ``Generator.integers(0, n_j, (n_resamples, n_j))``
per arm -- while the statistic of every resample of every replicate, the
p-values, the bootstrap quantiles and the BCa jackknife are computed as whole
arrays (replicates with the same observed arm sizes together, in blocks of at
most about 2e6 resampled values). The permutations come from a compiled
Fisher-Yates kernel reading the generator's raw 64-bit stream as numpy's
``Generator.shuffle`` does (bounded integers by masked rejection on 32-bit
halves); on first use it is checked against ``Generator.permutation`` and,
where numba is missing or the check fails, the per-replicate
``Generator.permutation`` loop is used instead (same numbers, slower).
Replicates the batch path does not compute are handed to the per-replicate
path: an arm with fewer than two observed outcomes or a label missing (scipy
raises), an exact permutation test (``comb(n0 + n1, n1) <= n_resamples``:
scipy enumerates every split), and a BCa interval or p-value that is not finite
(scipy warns).
"""

from __future__ import annotations

import hashlib
import math
import sys

import numpy as np
from scipy import special, stats

from .._validation import Bool, Choice, Int, Real
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import masked_t_parts, mean_var, p_from_t, paired_differences, split_arms, two_sample_se_df
from .numeric import t_ppf  # scipy.stats.t.ppf bit for bit, without its argument handling

POSITIVE = Real(0.0, low_open=True)
SEED = Int(low=0)


def data_rng(seed: int, *arrays) -> np.random.Generator:
    """A generator that depends only on ``seed`` and the bytes (and lengths) of ``arrays``."""
    h = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a, dtype=np.float64)
        h.update(a.size.to_bytes(8, "little"))
        h.update(a.tobytes())
    words = np.frombuffer(h.digest()[:16], dtype=np.uint32).tolist()
    return np.random.default_rng(np.random.SeedSequence([int(seed), *words]))


def _layout(data):
    """('one', d) for one sample or pairs (values or differences), ('two', (y0, y1)) for two arms."""
    if "arm" not in data:
        y = np.asarray(data["y"], float)
        return "one", y[np.isfinite(y)]
    if "pair" in data:
        return "one", paired_differences(data)
    return "two", split_arms(data)


_LOCATION = {"mean": np.mean, "median": np.median}


def _two_arm_supported(layout) -> bool:
    """Two independent arms (paired data take the per-replicate path, which analyses differences)."""
    return "pair" not in layout


#: the batch layouts of the resampling tests: two independent arms (any missing outcomes or padding);
#: pairs run per replicate
_TWO_ARMS = (("two_arm",), staticmethod(_two_arm_supported))


class PermutationTest(Analysis):
    """Permutation test of a difference in location (``scipy.stats.permutation_test``).

    H0: the two arms' outcomes are exchangeable once ``null_value`` is
    subtracted from arm 1 (two arms); the within-pair differences (or the
    one-sample values) minus ``null_value`` are symmetric about 0 (pairs / one
    sample: random sign flips).

    Parameters
    ----------
    statistic : {'mean', 'median'}, default 'mean'
        Difference of arm means (medians), or the mean (median) of the values.
    n_resamples : int >= 1, default 1999
        Random permutations; when it is at least the number of distinct
        permutations, scipy enumerates them all (exact test).
    seed : int >= 0, default 0
        Combined with a hash of the data (see the module notes).
    alternative : {'two-sided', 'greater', 'less'}
    null_value : float, default 0

    The estimate is the observed statistic (no SE or CI). The p-value counts
    the observed arrangement among the resamples, as scipy does.
    """

    name = "permutation_test"
    null_hypothesis = "arm labels are exchangeable (or differences symmetric about null_value)"
    params = {"statistic": Choice(("mean", "median")), "n_resamples": Int(low=1), "seed": SEED,
              "alternative": ALTERNATIVE, "null_value": Real()}
    defaults = {"statistic": "mean", "n_resamples": 1999, "seed": 0, "alternative": "two-sided",
                "null_value": 0.0}

    @property
    def estimand_label(self) -> str | None:
        return "median difference" if self.statistic == "median" else None

    def __call__(self, data):
        kind, values = _layout(data)
        loc = _LOCATION[self.statistic]
        if kind == "two":
            y0, y1 = values
            x1 = y1 - self.null_value
            samples, ptype = (x1, y0), "independent"

            def stat(a, b, axis):
                return loc(a, axis=axis) - loc(b, axis=axis)
        else:
            x = values - self.null_value
            samples, ptype = (x, np.zeros_like(x)), "samples"

            def stat(a, b, axis):
                return loc(a - b, axis=axis)
        rng = data_rng(self.seed, *samples)
        r = stats.permutation_test(samples, stat, permutation_type=ptype, vectorized=True,
                                   n_resamples=self.n_resamples, alternative=self.alternative, rng=rng)
        return TestResult(pvalue=float(r.pvalue), estimate=float(r.statistic) + self.null_value,
                          statistic=float(r.statistic))

    layouts, _supports = _TWO_ARMS

    def batch(self, batch):
        """Every replicate's scipy permutation test, with its own draws, the statistics as arrays."""
        layout = self.batch_layout(batch)
        groups, bad = _arm_groups(layout)
        R, B = batch.size, self.n_resamples
        loc = _LOCATION[self.statistic]
        pvalue, estimate = np.full(R, np.nan), np.full(R, np.nan)
        exact = bad.copy()
        eps = np.finfo(np.float64).eps * 100  # scipy's tolerance for ties with the observed statistic
        for (n0, n1), (rows, Y0, Y1) in groups.items():
            n = n0 + n1
            if math.comb(n, n1) <= B:  # scipy enumerates every split: the per-replicate path
                exact[rows] = True
                continue
            X = np.concatenate([Y1 - self.null_value, Y0], axis=1)  # scipy's data: (arm 1 - null, arm 0)
            observed = loc(X[:, :n1], axis=-1) - loc(X[:, n1:], axis=-1)
            for blk in _blocks(rows.size, B * n):
                Xb = X[blk]
                perm = np.empty((Xb.shape[0], B, n))  # C order, rows as scipy's (B, n) resamples
                for x, out in zip(Xb, perm):
                    _permuted(data_rng(self.seed, x[:n1], x[n1:]), x, out)
                null = loc(perm[..., :n1], axis=-1) - loc(perm[..., n1:], axis=-1)
                obs = observed[blk][:, None]
                gamma = np.abs(eps * obs)
                p_less = (np.count_nonzero(null <= obs + gamma, axis=-1) + 1).astype(float) / (B + 1)
                p_greater = (np.count_nonzero(null >= obs - gamma, axis=-1) + 1).astype(float) / (B + 1)
                p = {"less": p_less, "greater": p_greater}.get(self.alternative)
                if p is None:
                    p = np.minimum(p_less, p_greater) * 2
                pvalue[rows[blk]] = np.clip(p, 0.0, 1.0)
            estimate[rows] = observed + self.null_value
        return hand_over(self, batch, BatchResult(pvalue=pvalue, estimate=estimate), exact)


class BootstrapCI(Analysis):
    """Bootstrap confidence interval (``scipy.stats.bootstrap``) and its dual p-value.

    H0: the estimand (difference of arm means or medians; the mean or median
    of one sample or of within-pair differences) equals ``null_value``.

    A bootstrap interval has no p-value of its own; this analysis reports the
    p-value of the test that inverts the interval family: the smallest
    ``1 - level`` at which the interval of the same ``method`` excludes
    ``null_value`` (one-sided intervals for one-sided alternatives). So
    ``pvalue <= 1 - ci_level`` exactly when the reported two-sided CI excludes
    ``null_value``, up to the 1/B granularity of the bootstrap distribution.
    With G the bootstrap distribution function at a point
    (G(x) = (#{t* < x} + #{t* <= x}) / 2B, as scipy's percentile of score) the
    one-sided p-values for H1 'greater' are:

    * percentile: G(null_value);
    * basic: 1 - G(2 t - null_value);
    * bca: Phi(u - z0), u = (w - z0) / (1 + a (w - z0)), w = Phi^-1(G(null_value)),
      with z0 and the acceleration a as in Efron & Tibshirani (1993, An
      Introduction to the Bootstrap, eqs. 14.14-14.15; jackknife per sample),
      the inverse of the BCa endpoint formula (Efron 1987, JASA 82:171-185);

    'less' takes 1 minus these, 'two-sided' twice the smaller (at most 1).
    The coverage of the CI is this analysis's main use.

    Parameters
    ----------
    statistic : {'mean', 'median'}, default 'mean'
    method : {'percentile', 'basic', 'bca'}, default 'bca'
    n_resamples : int >= 1, default 1999
    ci_level : float in (0, 1), default 0.95
        Level of the reported two-sided CI.
    seed : int >= 0, default 0
        Combined with a hash of the data (see the module notes).
    alternative : {'two-sided', 'greater', 'less'}
    null_value : float, default 0

    The SE is the SD of the bootstrap distribution.
    """

    name = "bootstrap_ci"
    null_hypothesis = "the difference in means (or medians), or the mean (median), equals null_value"
    params = {"statistic": Choice(("mean", "median")), "method": Choice(("percentile", "basic", "bca")),
              "n_resamples": Int(low=1), "ci_level": CI_LEVEL, "seed": SEED, "alternative": ALTERNATIVE,
              "null_value": Real()}
    defaults = {"statistic": "mean", "method": "bca", "n_resamples": 1999, "ci_level": 0.95, "seed": 0,
                "alternative": "two-sided", "null_value": 0.0}

    @property
    def estimand_label(self) -> str | None:
        return "median difference" if self.statistic == "median" else None

    def _statistic(self, kind):
        loc = _LOCATION[self.statistic]
        if kind == "two":
            return lambda a, b, axis=-1: loc(b, axis=axis) - loc(a, axis=axis)
        return lambda a, axis=-1: loc(a, axis=axis)

    def __call__(self, data):
        kind, values = _layout(data)
        samples = tuple(values) if kind == "two" else (values,)
        stat = self._statistic(kind)
        rng = data_rng(self.seed, *samples)
        r = stats.bootstrap(samples, stat, n_resamples=self.n_resamples, vectorized=True,
                            confidence_level=self.ci_level, method=self.method, rng=rng)
        theta = float(stat(*samples))
        p_greater = self._p_greater(samples, stat, theta, np.asarray(r.bootstrap_distribution, float))
        p = {"greater": p_greater, "less": 1.0 - p_greater}.get(self.alternative)
        if p is None:
            p = min(1.0, 2.0 * min(p_greater, 1.0 - p_greater))
        ci = r.confidence_interval
        return TestResult(pvalue=float(p), estimate=theta, se=float(r.standard_error), ci_low=float(ci.low),
                          ci_high=float(ci.high))

    def _p_greater(self, samples, stat, theta, boot):
        def g(x):
            return (np.count_nonzero(boot < x) + np.count_nonzero(boot <= x)) / (2.0 * boot.size)

        if self.method == "percentile":
            return g(self.null_value)
        if self.method == "basic":
            return 1.0 - g(2.0 * theta - self.null_value)
        z0 = special.ndtri(g(theta))
        a = acceleration(samples, stat)
        q = g(self.null_value)
        if q <= 0.0 or q >= 1.0:
            return float(q >= 1.0)
        v = special.ndtri(q) - z0
        denom = 1.0 + a * v
        if denom <= 0.0:  # beyond every BCa endpoint
            return float(v > 0)
        return float(special.ndtr(v / denom - z0))

    layouts, _supports = _TWO_ARMS

    def batch(self, batch):
        """Every replicate's scipy bootstrap, with its own draws, the statistics and intervals as arrays."""
        layout = self.batch_layout(batch)
        groups, bad = _arm_groups(layout)
        R, B = batch.size, self.n_resamples
        out = {f: np.full(R, np.nan) for f in ("pvalue", "estimate", "se", "ci_low", "ci_high")}
        loc = _LOCATION[self.statistic]
        alpha = (1 - self.ci_level) / 2  # scipy's, two-sided
        handover = bad.copy()
        with np.errstate(all="ignore"):
            for (n0, n1), (rows, Y0, Y1) in groups.items():
                theta = loc(Y1, axis=-1) - loc(Y0, axis=-1)
                boot = np.empty((rows.size, B))
                for blk in _blocks(rows.size, B * (n0 + n1)):
                    y0s, y1s = Y0[blk], Y1[blk]
                    r0, r1 = np.empty((len(y0s), B, n0)), np.empty((len(y0s), B, n1))  # C order, as scipy's
                    for a, b, o0, o1 in zip(y0s, y1s, r0, r1):
                        rng = data_rng(self.seed, a, b)
                        # scipy draws arm 0's resamples, then arm 1's:
                        # rng_integers(rng, 0, n, (B, n)) = Generator.integers(0, n, (B, n), int64)
                        np.take(a, rng.integers(0, n0, (B, n0)), out=o0, mode="clip")  # in range: unbuffered
                        np.take(b, rng.integers(0, n1, (B, n1)), out=o1, mode="clip")
                    boot[blk] = loc(r1, axis=-1) - loc(r0, axis=-1)
                se = np.std(boot, ddof=1, axis=-1)
                G = _scores(boot)
                if self.method == "bca":
                    z0 = special.ndtri(G(theta))
                    jack = [np.empty((rows.size, n0)), np.empty((rows.size, n1))]  # leave one out of arm 0, 1
                    m0, m1 = loc(Y0, axis=-1), loc(Y1, axis=-1)
                    for blk in _blocks(rows.size, n0 * n0 + n1 * n1):
                        jack[0][blk] = m1[blk, None] - loc(_jackknife(Y0[blk]), axis=-1)
                        jack[1][blk] = loc(_jackknife(Y1[blk]), axis=-1) - m0[blk, None]
                    a_scipy, a_ours, den = _accelerations(jack)
                    z_alpha = float(special.ndtri(alpha))
                    num1 = z0 + z_alpha
                    num2 = z0 - z_alpha
                    interval = np.stack([special.ndtr(z0 + num1 / (1 - a_scipy * num1)),
                                         special.ndtr(z0 + num2 / (1 - a_scipy * num2))], axis=-1)
                else:
                    a = np.asarray(alpha, dtype=float)
                    interval = np.broadcast_to(np.stack([a, 1 - a]), (rows.size, 2))
                ci = stats.quantile(boot, interval, axis=-1)
                lo, hi = ci[:, 0], ci[:, 1]
                if self.method == "basic":
                    lo, hi = 2 * theta - hi, 2 * theta - lo
                pg = self._p_greater_rows(G, theta, z0 if self.method == "bca" else None,
                                          a_ours if self.method == "bca" else None)
                p = {"greater": pg, "less": 1.0 - pg}.get(self.alternative)
                if p is None:
                    p = np.minimum(1.0, 2.0 * np.minimum(pg, 1.0 - pg))
                for f, v in (("pvalue", p), ("estimate", theta), ("se", se), ("ci_low", lo), ("ci_high", hi)):
                    out[f][rows] = v
                # scipy warns (degenerate data) where the interval is NaN; the scalar BCa arithmetic may
                # warn where z0 or the acceleration is not finite: those replicates run per replicate
                trouble = np.isnan(ci).any(axis=-1)
                if self.method == "bca":
                    trouble |= ~np.isfinite(z0) | ~np.isfinite(a_scipy) | ~(den > 0) | ~np.isfinite(pg)
                handover[rows[trouble]] = True
        return hand_over(self, batch, BatchResult(**out), handover)

    def _p_greater_rows(self, G, theta, z0, a):
        """:meth:`_p_greater` for many replicates (``G`` the bootstrap distribution functions)."""
        if self.method == "percentile":
            return G(np.full(theta.shape, self.null_value))
        if self.method == "basic":
            return 1.0 - G(2.0 * theta - self.null_value)
        q = G(np.full(theta.shape, self.null_value))
        v = special.ndtri(q) - z0
        denom = 1.0 + a * v
        p = special.ndtr(v / denom - z0)
        p = np.where(denom <= 0.0, (v > 0).astype(float), p)
        return np.where((q <= 0.0) | (q >= 1.0), (q >= 1.0).astype(float), p)


def acceleration(samples, stat) -> float:
    """Jackknife acceleration of the BCa interval, pooled over samples (Efron & Tibshirani 1993, eq. 14.15)."""
    num = den = 0.0
    for j, x in enumerate(samples):
        n = x.size
        keep = ~np.eye(n, dtype=bool)
        jack = np.broadcast_to(x, (n, n))[keep].reshape(n, n - 1)
        args = [np.broadcast_to(s, (n, s.size)) for s in samples]
        args[j] = jack
        t = stat(*args, axis=-1)
        u = (n - 1) * (t.mean() - t)
        num += np.sum(u**3) / n**3
        den += np.sum(u**2) / n**2
    return float(num / (6.0 * den**1.5)) if den > 0 else 0.0


# --- batch paths (two independent arms) -------------------------------------------------------------

#: resampled values formed at once (replicates x resamples x observations), to bound memory
_BLOCK_VALUES = 2_000_000


def _arm_groups(layout):
    """Observed arm outcomes per replicate, grouped by arm sizes.

    Returns ``(groups, bad)``: ``groups`` maps ``(n0, n1)`` to ``(rows, Y0, Y1)`` (rows (g,), outcomes
    (g, n0) and (g, n1) in table order, as :func:`split_arms` gives them), ``bad`` (R,) marks the
    replicates whose table lacks an arm label or has fewer than two observed outcomes in an arm.
    """
    y = np.asarray(layout.y, dtype=float)
    obs = layout.observed
    arm = np.broadcast_to(np.asarray(layout.arm), y.shape)
    present = layout.present if layout.present is not None else np.ones(y.shape, bool)
    in0, in1 = arm == 0, arm == 1
    bad = ~(np.any(present & in0, axis=1) & np.any(present & in1, axis=1))
    o0, o1 = obs & in0, obs & in1
    n0, n1 = np.count_nonzero(o0, axis=1), np.count_nonzero(o1, axis=1)
    bad |= (n0 < 2) | (n1 < 2)
    groups = {}
    for key in sorted(set(zip(n0[~bad].tolist(), n1[~bad].tolist()))):
        rows = np.flatnonzero(~bad & (n0 == key[0]) & (n1 == key[1]))
        sub = y[rows]
        groups[key] = (rows, sub[o0[rows]].reshape(rows.size, key[0]), sub[o1[rows]].reshape(rows.size, key[1]))
    return groups, bad


def _scores(boot):
    """x (R,) -> (#{t* < x} + #{t* <= x}) / 2B per row of ``boot`` (R, B): scipy's percentile of score."""
    def g(x):
        x = np.asarray(x, float)[:, None]
        return (np.count_nonzero(boot < x, axis=-1) + np.count_nonzero(boot <= x, axis=-1)) / (2.0 * boot.shape[1])
    return g


def _jackknife(Y):
    """(R, n) -> (R, n, n - 1): row i of each replicate leaves out observation i (scipy's order)."""
    n = Y.shape[1]
    keep = ~np.eye(n, dtype=bool)
    idx = np.broadcast_to(np.arange(n), (n, n))[keep].reshape(n, n - 1)
    return np.ascontiguousarray(Y[:, idx])  # C order: row reductions then sum as scipy's 2-d arrays do


def _accelerations(jack):
    """BCa acceleration per replicate from the jackknife statistics (list of (R, n_j) per sample).

    Returns scipy's (``1/6 * sum(nums) / sum(dens)**1.5``, for the interval), this module's
    (:func:`acceleration`, for the p-value; 0 where the denominator is 0) and scipy's denominator.
    """
    nums, dens, num, den = [], [], 0.0, 0.0
    for t in jack:
        n = t.shape[1]
        u_scipy = (float(n) - 1) * (np.mean(t, axis=-1, keepdims=True) - t)
        nums.append(np.sum(u_scipy**3, axis=-1) / float(n) ** 3)
        dens.append(np.sum(u_scipy**2, axis=-1) / float(n) ** 2)
        u = (n - 1) * (t.mean(axis=-1, keepdims=True) - t)
        num = num + np.sum(u**3, axis=-1) / n**3
        den = den + np.sum(u**2, axis=-1) / n**2
    a_scipy = 1 / 6 * sum(nums) / sum(dens) ** (3 / 2)
    a_ours = np.where(den > 0, num / (6.0 * den**1.5), 0.0)
    return a_scipy, a_ours, sum(dens)


def _blocks(count, per_row):
    """Slices of ``range(count)`` holding about ``_BLOCK_VALUES / per_row`` rows each."""
    step = max(1, _BLOCK_VALUES // max(1, per_row))
    return [slice(i, min(count, i + step)) for i in range(0, count, step)]


def _fisher_yates(words, x, out):
    """Rows of ``out`` (B, n): ``x`` permuted as ``x[Generator.permutation(n)]``, from a stream of 32-bit words.

    numpy's ``Generator.permutation(n)`` shuffles ``arange(n)``: for i = n-1 .. 1 it swaps
    position i with j drawn uniformly from [0, i] by masked rejection (the smallest mask
    2^k - 1 >= i applied to the next 32-bit word until the value is <= i). Shuffling the values
    themselves by the same swaps gives the permuted data at once. Returns the words used, or -1
    when ``words`` ran out.
    """
    k = 0
    m = words.size
    n = x.size
    for p in range(out.shape[0]):
        for j in range(n):
            out[p, j] = x[j]
        for i in range(n - 1, 0, -1):
            mask = i
            mask |= mask >> 1
            mask |= mask >> 2
            mask |= mask >> 4
            mask |= mask >> 8
            mask |= mask >> 16
            while True:
                if k >= m:
                    return -1
                v = words[k] & mask
                k += 1
                if v <= i:
                    break
            t = out[p, i]
            out[p, i] = out[p, v]
            out[p, v] = t
    return k


_KERNEL: list = []


def _words(rng, count):
    """The next ``2 count`` 32-bit words of a fresh generator (low half of each 64-bit output first)."""
    raw = rng.bit_generator.random_raw(count)
    if sys.byteorder == "little":
        return raw.view(np.uint32)
    out = np.empty(2 * count, dtype=np.uint32)
    out[0::2] = raw & np.uint64(0xFFFFFFFF)
    out[1::2] = raw >> np.uint64(32)
    return out


def _compiled_permuter():
    """The compiled kernel when numba is there and it reproduces ``Generator.permutation``, else None."""
    if not _KERNEL:
        fn = None
        try:
            import numba

            fn = numba.njit(cache=True)(_fisher_yates)
            for n in (2, 3, 17, 64, 300):
                rng = np.random.default_rng(n)  # a fresh generator, as data_rng gives
                want = np.stack([rng.permutation(n) for _ in range(4)]).astype(float)
                got = np.empty((4, n))
                _permute_with(fn, np.random.default_rng(n), np.arange(n, dtype=float), got)
                if not np.array_equal(got, want):
                    fn = None
                    break
        except Exception:  # numba missing or the kernel differs: the Generator.permutation loop
            fn = None
        _KERNEL.append(fn)
    return _KERNEL[0]


def _permute_with(fn, rng, x, out):
    words = _words(rng, out.size)
    while fn(words, x, out) < 0:  # rare: more rejections than words drawn; the stream continues
        words = np.concatenate([words, _words(rng, out.size)])


def _permuted(rng, x, out):
    """``out[:] = x[np.stack([rng.permutation(n) for _ in range(len(out))])]``: scipy's draws, compiled when possible."""
    fn = _compiled_permuter()
    if fn is None:
        out[...] = x[np.stack([rng.permutation(x.size) for _ in range(out.shape[0])])]
    else:
        _permute_with(fn, rng, x, out)


class LogT(Analysis):
    """t-test on log-transformed positive outcomes: a ratio of geometric means.

    H0: the ratio of geometric means arm 1 / arm 0 (two arms) or the geometric
    mean (one sample; the geometric mean of within-pair ratios for pairs)
    equals ``null_ratio``.

    Parameters
    ----------
    equal_var : bool, default False
        Pooled variance (Student) instead of Welch's test on the log scale.
    alternative : {'two-sided', 'greater', 'less'}
    ci_level : float in (0, 1), default 0.95
    null_ratio : float > 0, default 1

    The estimate is the ratio exp(mean log y1 - mean log y0); the CI is the
    exponentiated t interval of the log ratio; the SE is the delta-method SE
    of the ratio (ratio x SE of the log ratio), so it compares with the
    empirical SE of the estimate. A replicate with an outcome <= 0 raises
    ``ValueError`` (counted by the engine as ``error:ValueError``).
    """

    name = "log_t"
    null_hypothesis = "the ratio of geometric means (or the geometric mean) equals null_ratio"
    estimand_label = "ratio of geometric means"
    params = {"equal_var": Bool(), "alternative": ALTERNATIVE, "ci_level": CI_LEVEL, "null_ratio": POSITIVE}
    defaults = {"equal_var": False, "alternative": "two-sided", "ci_level": 0.95, "null_ratio": 1.0}

    @staticmethod
    def _log(y):
        bad = int(np.count_nonzero(y <= 0))
        if bad:
            raise ValueError(f"log_t needs positive outcomes; got {bad} value(s) <= 0")
        return np.log(y)

    def __call__(self, data):
        mu = math.log(self.null_ratio)
        y = np.asarray(data["y"], float)
        ok = np.isfinite(y)
        ly = np.full(y.shape, np.nan)
        ly[ok] = self._log(y[ok])
        table = {**data, "y": ly}
        if "arm" not in data or "pair" in data:
            d = ly[ok] if "arm" not in data else paired_differences(table)
            r = stats.ttest_1samp(d, mu, alternative=self.alternative)
            est, se_log = float(d.mean()), float(d.std(ddof=1) / math.sqrt(d.size))
        else:
            l0, l1 = split_arms(table)
            r = stats.ttest_ind(l1 - mu, l0, equal_var=self.equal_var, alternative=self.alternative)
            est = float(l1.mean() - l0.mean())
            if self.equal_var:
                df = l0.size + l1.size - 2
                sp2 = ((l0.size - 1) * l0.var(ddof=1) + (l1.size - 1) * l1.var(ddof=1)) / df
                se_log = math.sqrt(sp2 * (1 / l0.size + 1 / l1.size))
            else:
                se_log = math.sqrt(l0.var(ddof=1) / l0.size + l1.var(ddof=1) / l1.size)
        crit = stats.t.ppf(0.5 + self.ci_level / 2, r.df)
        ratio = math.exp(est)
        return TestResult(pvalue=float(r.pvalue), estimate=ratio, se=ratio * se_log,
                          ci_low=math.exp(est - crit * se_log), ci_high=math.exp(est + crit * se_log),
                          statistic=float(r.statistic), df=float(r.df))

    layouts = ("one_sample", "paired", "two_arm")

    def _supports(self, layout):
        """Two arms not paired (paired data take the paired layout); complete batches in contiguous blocks.

        Batches of a process with missing outcomes take the masked path (complete cases).
        """
        if layout.kind == "two_arm" and "pair" in layout:
            return False
        if layout.missing:
            return True
        return layout.complete and (layout.kind != "two_arm" or layout.split is not None)

    def batch(self, batch):
        layout = self.batch_layout(batch)
        y = layout.y
        if not layout.complete:
            return self._masked(batch, layout)
        bad = np.any(y <= 0, axis=1)
        with np.errstate(all="ignore"):
            ly = np.log(np.where(y > 0, y, np.nan))
            if layout.kind != "two_arm":
                if layout.kind == "paired":
                    n0 = layout.y0.shape[1]
                    d = ly[:, n0:] - ly[:, :n0]
                else:
                    d = ly
                m, v = mean_var(d)
                est, se_log, df = m, np.sqrt(v / d.shape[1]), d.shape[1] - 1
            else:
                l0, l1 = ly[:, : layout.split], ly[:, layout.split:]
                n0, n1 = l0.shape[1], l1.shape[1]
                m0, v0 = mean_var(l0)
                m1, v1 = mean_var(l1)
                est = m1 - m0
                se_log, df = two_sample_se_df(n0, n1, v0, v1, self.equal_var)
            t = (est - math.log(self.null_ratio)) / se_log
            crit = t_ppf(0.5 + self.ci_level / 2, df)
            ratio = np.exp(est)
            out = BatchResult(pvalue=np.where(bad, np.nan, p_from_t(t, df, self.alternative)), estimate=ratio,
                              se=ratio * se_log, ci_low=np.exp(est - crit * se_log),
                              ci_high=np.exp(est + crit * se_log))
        if bad.any():
            out.mark("error:ValueError", bad, "ValueError: log_t needs positive outcomes")
        return out

    def _masked(self, batch, layout):
        """Missing outcomes or padding: the t statistic of the observed logarithms (complete cases)."""
        y, obs = layout.y, layout.observed
        bad = np.any(obs & (y <= 0), axis=1)
        with np.errstate(all="ignore"):
            ly = np.log(np.where(y > 0, y, np.nan))
            est, se_log, df, few = masked_t_parts(layout, self.equal_var, ly)
            est[bad] = np.nan
            t = (est - math.log(self.null_ratio)) / se_log
            crit = t_ppf(0.5 + self.ci_level / 2, df)
            ratio = np.exp(est)
            out = BatchResult(pvalue=p_from_t(t, df, self.alternative), estimate=ratio, se=ratio * se_log,
                              ci_low=np.exp(est - crit * se_log), ci_high=np.exp(est + crit * se_log))
        if bad.any():
            out.mark("error:ValueError", bad, "ValueError: log_t needs positive outcomes")
        return hand_over(self, batch, out, few & ~bad)
