"""Several arms against one control: Dunnett's many-to-one test and the one-way ANOVA F test.

Dunnett's test
--------------
With k treatment arms of sizes n_1..n_k, a control arm of size n_0, a common
SD sigma and the pooled SD s over all k + 1 arms (df = N - k - 1), the
statistics T_i = (mean_i - mean_0) / (s sqrt(1/n_i + 1/n_0)) are jointly a
multivariate t with correlations (Dunnett 1955, JASA 50:1096-1121, p. 1103)

    rho_ij = lambda_i lambda_j,   lambda_i = sqrt(n_i / (n_i + n_0)).

Because the correlation is a product, Z_i = lambda_i Z_0 + sqrt(1 - lambda_i^2) E_i
with Z_0, E_1..E_k independent standard normals (the one-factor representation
of Dunnett 1955 and Gupta 1963, Ann Math Stat 34:792-828 -- both from memory).
Given the factor Z_0 = z and the pooled SD ratio S = s / sigma = u, the
comparisons are independent, so any rectangle probability is

    P(a_i < T_i < b_i for all i)
      = E_S E_Z0 prod_i [Phi((b_i u - d_i - lambda_i z) / tau_i) - Phi((a_i u - d_i - lambda_i z) / tau_i)],

tau_i = sqrt(1 - lambda_i^2), d_i the noncentrality (mean difference / its SE at
sigma). The outer expectation over S ~ sqrt(chi2_df / df) is a Gauss-Legendre
rule on log S (df = None: S = 1, a known variance), the inner one over Z_0
Gauss-Hermite (64 nodes); probabilities are accurate to about 1e-8 for
df >= 2 (1e-12 for df >= 10; checked against finer rules). This is a deterministic evaluation of the
same integral ``scipy.stats.multivariate_t.cdf`` estimates by randomised
quasi-Monte Carlo (as ``scipy.stats.dunnett`` does); it agrees with scipy to
scipy's own error and repeats bit for bit, which a simulation needs (the
batch and per-replicate paths must agree, and a seed must give the same
numbers).

From it: the critical value (:func:`dunnett_critical`), the adjusted p-values
1 - P(max_j T_j < t_i) in the direction of the alternative
(:func:`dunnett_pvalues`, as ``scipy.stats.dunnett`` defines them), and the
exact power (:func:`dunnett_power`): per comparison (a noncentral t
probability), any rejection (disjunctive) and all rejections (conjunctive).

One-way ANOVA F test
--------------------
Under H1 the F statistic on (k - 1, N - k) df is noncentral F with
noncentrality lambda = f^2 N, where Cohen's f = sigma_m / sigma and sigma_m^2
= sum_j (n_j / N)(mu_j - mu_bar)^2 with mu_bar the size-weighted mean (Cohen
1988, Statistical Power Analysis, ch. 8, eq. 8.2.1 and 8.3.1 for equal n;
the weighted form gives the exact noncentrality sum_j n_j (mu_j - mu_bar)^2 /
sigma^2 for unequal n). ``statsmodels.stats.power.FTestAnovaPower`` uses the
same lambda = f^2 N (checked in the tests).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from scipy import optimize, special, stats

from ..errors import ParameterError
from . import _common as c

_Z_NODES = 64
_S_TAIL = 1e-13


@lru_cache(maxsize=8)
def _z_rule(nodes: int = _Z_NODES):
    """Gauss-Hermite nodes and weights for E over a standard normal Z_0."""
    z, w = hermegauss(nodes)
    return z, w / math.sqrt(2 * math.pi)


@lru_cache(maxsize=256)
def _s_rule(df: float | None):
    """Nodes u and weights of S = sqrt(chi2_df / df): Gauss-Legendre on log S between its 1e-13 quantiles.

    64 nodes below df = 10, 32 from there on (S is then concentrated near 1); df None: S = 1.
    """
    if df is None or math.isinf(df):
        return np.ones(1), np.ones(1)
    nodes = 64 if df < 10 else 32
    lo = 0.5 * math.log(stats.chi2.ppf(_S_TAIL, df) / df)
    hi = 0.5 * math.log(stats.chi2.isf(_S_TAIL, df) / df)
    x, w = np.polynomial.legendre.leggauss(nodes)
    v = 0.5 * (hi - lo) * x + 0.5 * (hi + lo)  # v = log S; chi2 = df exp(2v)
    q = df * np.exp(2 * v)
    dens = stats.chi2.pdf(q, df) * 2 * q  # density of v
    return np.exp(v), w * 0.5 * (hi - lo) * dens


def many_to_one_lambdas(sizes) -> np.ndarray:
    """lambda_i = sqrt(n_i / (n_i + n_0)) of each treatment arm; ``sizes`` control first.

    The many-to-one correlation is rho_ij = lambda_i lambda_j (Dunnett 1955, p. 1103).
    """
    s = np.asarray(sizes, float)
    return np.sqrt(s[1:] / (s[1:] + s[0]))


def many_to_one_corr(sizes) -> np.ndarray:
    """The k x k correlation matrix of the many-to-one statistics (unit diagonal)."""
    lam = many_to_one_lambdas(sizes)
    r = np.outer(lam, lam)
    np.fill_diagonal(r, 1.0)
    return r


def box_probability(lower, upper, lambdas, df=None, shift=None) -> np.ndarray:
    """P(lower_i < T_i < upper_i for every i) for many-to-one statistics T.

    ``lower``, ``upper``: arrays (..., k) of limits (+-inf allowed); ``shift``
    (k,) the noncentralities d_i (T_i = (Z_i + d_i) / S); ``df`` the pooled
    df (None: known variance, normal statistics). Returns an array of the
    leading shape. One-factor quadrature, see the module docstring.
    """
    lam = np.asarray(lambdas, float)
    tau = np.sqrt(1.0 - lam * lam)
    lower = np.asarray(lower, float)
    upper = np.asarray(upper, float)
    lower, upper = np.broadcast_arrays(lower, upper)
    d = np.zeros(lam.size) if shift is None else np.asarray(shift, float)
    z, wz = _z_rule()
    u, wu = _s_rule(None if df is None else float(df))
    lead = lower.shape[:-1]
    lo = lower.reshape(-1, 1, lam.size)
    hi = upper.reshape(-1, 1, lam.size)
    out = np.zeros(lo.shape[0])
    base = (d[None, :] + lam[None, :] * z[:, None])  # (Z, k)
    with np.errstate(invalid="ignore"):
        for ui, wi in zip(u, wu):
            a = np.where(np.isneginf(lo), -np.inf, (lo * ui - base) / tau)
            b = np.where(np.isposinf(hi), np.inf, (hi * ui - base) / tau)
            cell = special.ndtr(b) - special.ndtr(a)  # (M, Z, k)
            out += wi * (np.prod(cell, axis=2) @ wz)
    return np.clip(out, 0.0, 1.0).reshape(lead)


def _limits(t, alternative):
    t = np.asarray(t, float)
    if alternative == "two-sided":
        return -np.abs(t), np.abs(t)
    if alternative == "greater":
        return np.full_like(t, -np.inf), t
    return t, np.full_like(t, np.inf)


def _check_sizes(k, allocation):
    k = int(c.real("k", k, 1.0))
    if allocation is None:
        return np.ones(k + 1)
    alloc = np.asarray(allocation, float)
    if alloc.ndim != 1 or alloc.size != k + 1 or not np.all(np.isfinite(alloc)) or np.any(alloc <= 0):
        raise ParameterError(f"`allocation` must list {k + 1} positive relative arm sizes (control first); "
                             f"got {allocation!r}.")
    return alloc


def _check_df(df):
    if df is None:
        return None
    return float(c.real("df", df, 0.0, low_open=True))


def dunnett_pvalues(statistics, sizes, df=None, alternative="two-sided") -> np.ndarray:
    """Adjusted p-values of Dunnett's single-step test, 1 - P(max_j T_j < t_i) in the alternative's direction.

    ``statistics`` (..., k): the t statistics of the k comparisons with control;
    ``sizes``: arm sizes (or relative sizes), control first; ``df``: pooled df
    (None: normal). Same definition as ``scipy.stats.dunnett`` (its
    ``_pvalue_dunnett``), computed by quadrature instead of randomised QMC.
    """
    c.choice("alternative", alternative, c.ALTERNATIVES)
    t = np.asarray(statistics, float)
    lam = many_to_one_lambdas(sizes)
    k = lam.size
    flat = t.reshape(-1)
    out = np.full(flat.shape, np.nan)
    ok = np.isfinite(flat)
    lo, hi = _limits(flat[ok], alternative)
    out[ok] = np.clip(1.0 - _common_box(lo, hi, lam, df), 0.0, 1.0)
    return out.reshape(t.shape)


def _common_box(lo, hi, lam, df) -> np.ndarray:
    """:func:`box_probability` with the same limits (lo[m], hi[m]) for every coordinate, no shift.

    Coordinates with equal lambda have equal factors given (Z_0, S), so each distinct
    lambda is evaluated once and raised to its multiplicity (equal treatment arms: one).
    """
    values, counts = np.unique(np.asarray(lam, float), return_counts=True)
    tau = np.sqrt(1.0 - values * values)
    z, wz = _z_rule()
    u, wu = _s_rule(None if df is None else float(df))
    lo = np.asarray(lo, float)[:, None, None]
    hi = np.asarray(hi, float)[:, None, None]
    base = values[None, :] * z[:, None]  # (Z, L)
    out = np.zeros(lo.shape[0])
    with np.errstate(invalid="ignore"):
        for ui, wi in zip(u, wu):
            a = np.where(np.isneginf(lo), -np.inf, (lo * ui - base) / tau)
            b = np.where(np.isposinf(hi), np.inf, (hi * ui - base) / tau)
            cell = (special.ndtr(b) - special.ndtr(a)) ** counts  # (M, Z, L)
            out += wi * (np.prod(cell, axis=2) @ wz)
    return np.clip(out, 0.0, 1.0)


def _critical(k, df, alpha, alternative, alloc):
    lam = many_to_one_lambdas(alloc)

    def excess(x):
        lo, hi = _limits(np.array([x]), alternative)
        return float(1.0 - _common_box(lo, hi, lam, df)[0]) - alpha

    if alternative == "less":
        return -_critical(k, df, alpha, "greater", alloc)
    hi = 1.0
    while excess(hi) > 0:
        hi *= 2.0
    return optimize.brentq(excess, 0.0 if alternative == "two-sided" else -10.0, hi, xtol=1e-12, rtol=1e-12)


def dunnett_critical(k, df=None, alpha=0.05, alternative="two-sided", allocation=None) -> float:
    """Critical value c of Dunnett's many-to-one test: reject comparison i when T_i is beyond c.

    Parameters
    ----------
    k : int >= 1
        Treatment arms compared with the control.
    df : float > 0 or None
        Pooled df (N - k - 1); None for a known variance (multivariate normal).
    alpha : float in (0, 1)
        Family-wise error rate.
    alternative : {'two-sided', 'greater', 'less'}
        'two-sided': reject when |T_i| > c; 'greater': T_i > c; 'less': T_i < c (c < 0).
    allocation : k + 1 positive numbers, optional
        Relative arm sizes, control first (default equal).

    Examples
    --------
    Dunnett (1955, Table 1a, one-sided; from memory) gives 2.03 for k = 2, df = 20, alpha = 0.05:

    >>> round(dunnett_critical(2, 20, 0.05, "greater"), 2)
    2.03
    """
    c.choice("alternative", alternative, c.ALTERNATIVES)
    a = float(c.alpha_power(alpha))
    alloc = _check_sizes(k, allocation)
    return float(_critical(int(k), _check_df(df), a, alternative, tuple(alloc)))


def dunnett_power(effects, n, sd=1.0, alpha=0.05, alternative="two-sided", allocation=None,
                  known_sd=False) -> dict:
    """Exact power of Dunnett's many-to-one test (normal outcome, common SD).

    Parameters
    ----------
    effects : k numbers
        Mean difference of each treatment arm from control (outcome units).
    n : float > 1
        Control-arm size; arm j has ``n * allocation[j] / allocation[0]``.
    sd : float > 0
        Common SD.
    alpha, alternative, allocation : as in :func:`dunnett_critical`
    known_sd : bool
        True: the test uses the known SD (normal statistics, df None).

    Returns
    -------
    dict with ``per_comparison`` (k,) -- P(comparison i rejects), a
    noncentral-t probability; ``any`` -- P(at least one rejects) (disjunctive
    power, the power of the primary p-value = the smallest adjusted one);
    ``all`` -- P(every comparison rejects) (conjunctive); ``critical``, ``df``.
    """
    c.choice("alternative", alternative, c.ALTERNATIVES)
    a = float(c.alpha_power(alpha))
    eff = np.atleast_1d(np.asarray(c.real("effects", effects), float))
    k = eff.size
    n0 = float(c.real("n", n, 1.0, low_open=True))
    s = float(c.real("sd", sd, 0.0, low_open=True))
    alloc = _check_sizes(k, allocation)
    sizes = n0 * alloc / alloc[0]
    df = None if known_sd else float(sizes.sum() - k - 1)
    if df is not None and df <= 0:
        raise ParameterError(f"`n` must leave df = N - k - 1 > 0; got n = {n0:g} (df {df:g}).")
    crit = _critical(k, df, a, alternative, tuple(sizes))
    lam = many_to_one_lambdas(sizes)
    d = eff / (s * np.sqrt(1.0 / sizes[1:] + 1.0 / sizes[0]))
    inf = np.full(k, np.inf)
    if alternative == "two-sided":
        accept = (-crit * np.ones(k), crit * np.ones(k))
    elif alternative == "greater":
        accept = (-inf, crit * np.ones(k))
    else:
        accept = (crit * np.ones(k), inf)
    # per comparison: a single coordinate's acceptance interval (others unbounded)
    per = np.empty(k)
    for i in range(k):
        lo, hi = -inf.copy(), inf.copy()
        lo[i], hi[i] = accept[0][i], accept[1][i]
        per[i] = 1.0 - box_probability(lo[None], hi[None], lam, df, d)[0]
    any_ = 1.0 - box_probability(accept[0][None], accept[1][None], lam, df, d)[0]
    all_ = _all_reject(accept, lam, df, d, alternative)
    return {"per_comparison": per, "any": float(any_), "all": float(all_), "critical": crit, "df": df}


def _all_reject(accept, lam, df, d, alternative):
    """P(every T_i outside its acceptance interval): the product of the rejection cells given (Z_0, S)."""
    tau = np.sqrt(1.0 - lam * lam)
    z, wz = _z_rule()
    u, wu = _s_rule(df)
    base = d[None, :] + lam[None, :] * z[:, None]
    total = 0.0
    for ui, wi in zip(u, wu):
        with np.errstate(invalid="ignore"):
            a = np.where(np.isneginf(accept[0]), -np.inf, (accept[0] * ui - base) / tau)
            b = np.where(np.isposinf(accept[1]), np.inf, (accept[1] * ui - base) / tau)
        reject = special.ndtr(a) + special.ndtr(-b)  # below the lower or above the upper limit
        total += wi * float(np.prod(reject, axis=1) @ wz)
    return min(max(total, 0.0), 1.0)


# -- one-way ANOVA ---------------------------------------------------------------------------
def cohen_f(means, sizes=None, sd=1.0) -> float:
    """Cohen's f = sigma_m / sigma, sigma_m^2 = sum_j w_j (mu_j - mu_bar)^2 with w_j = n_j / N (Cohen 1988, ch. 8)."""
    m = np.asarray(c.real("means", means), float)
    w = np.ones(m.size) if sizes is None else np.asarray(c.real("sizes", sizes, 0.0, low_open=True), float)
    w = w / w.sum()
    mbar = float(w @ m)
    return float(math.sqrt(float(w @ (m - mbar) ** 2)) / float(c.real("sd", sd, 0.0, low_open=True)))


def _anova_parts(n, k, allocation):
    k = int(c.real("k", k, 2.0))
    alloc = np.ones(k) if allocation is None else np.asarray(allocation, float)
    if alloc.size != k or np.any(alloc <= 0):
        raise ParameterError(f"`allocation` must list {k} positive relative arm sizes; got {allocation!r}.")
    return k, float(np.sum(alloc) / alloc[0])


def anova_power(f, n, k, alpha=0.05, allocation=None):
    """Power of the one-way ANOVA F test: noncentral F(k - 1, N - k, f^2 N) (Cohen 1988, ch. 8).

    ``f``: Cohen's f (:func:`cohen_f`); ``n``: size of the first arm
    (all arms when equal); ``k``: arms; ``allocation``: relative arm sizes
    (default equal), so N = n * sum(allocation) / allocation[0].
    """
    scalar = c.is_scalar(f, n, alpha)
    k, per_n = _anova_parts(n, k, allocation)
    fv = c.real("f", f, 0.0)
    nv = c.real("n", n, 0.0, low_open=True)
    a = c.alpha_power(alpha)
    big_n = nv * per_n
    if np.any(big_n - k <= 0):
        raise ParameterError(f"`n` must leave df = N - k > 0; got n = {c._show(np.asarray(nv), big_n - k <= 0)}.")
    crit = stats.f.isf(a, k - 1, big_n - k)
    return c.finish(1.0 - special.ncfdtr(k - 1, big_n - k, fv**2 * big_n, crit), scalar)


def anova_n(f, power=0.8, k=3, alpha=0.05, allocation=None):
    """Size of the first arm (real-valued) giving ``power`` to the F test (inverts :func:`anova_power`)."""
    scalar = c.is_scalar(f, power, alpha)
    k, per_n = _anova_parts(2, k, allocation)
    fv = c.real("f", f, 0.0, low_open=True)
    a, p = c.alpha_power(alpha, power)
    floor = (k + 1.0) / per_n  # df = 1
    out = c.each(lambda ff, pp, aa: c.root_increasing(
        lambda m: float(anova_power(ff, m, k, aa, allocation)), pp, floor, max(2 * floor, 4.0)), fv, p, a)
    return c.finish(out, scalar)


def anova_effect(n, power=0.8, k=3, alpha=0.05, allocation=None):
    """Cohen's f the F test detects with ``power`` at first-arm size ``n`` (inverts :func:`anova_power`)."""
    scalar = c.is_scalar(n, power, alpha)
    a, p = c.alpha_power(alpha, power)
    nv = c.real("n", n, 0.0, low_open=True)
    out = c.each(lambda nn, pp, aa: c.root_increasing(
        lambda ff: float(anova_power(ff, nn, k, aa, allocation)), pp, 0.0, 1.0), nv, p, a)
    return c.finish(out, scalar)
