"""Two event rates (Poisson or negative binomial counts): power and size for a rate ratio.

Zhu & Lakkis (2014, Statistics in Medicine 33:376-387). Each participant is
followed for ``exposure`` time units; control counts have mean
``mu0 = rate0 * exposure``, treatment counts ``mu1 = rate0 * rate_ratio * exposure``.
Counts are negative binomial with variance ``mu + mu**2 / k`` (``dispersion`` = k,
the gamma shape, as in :class:`simpower.processes.counts.CountTwoArm`; Zhu & Lakkis
write the dispersion as ``1 / k``), or Poisson when ``dispersion`` is None. The test
is the z-test of the log rate ratio, ``log(ybar1 / ybar0)``, whose variance with
``n`` control and ``ratio * n`` treatment participants is ``V / n`` with

    V(l0, l1) = 1 / (exposure * l0) + 1 / (ratio * exposure * l1) + (1 + ratio) / (ratio * k)

(delta method; the last term is 0 for Poisson counts). Under H1 the spread is
``V1 = V(rate0, rate1)``. The critical value is set with a null variance ``V0``:

* ``null_variance="pooled"`` (default): both rates at the pooled rate
  ``(rate0 + ratio * rate1) / (1 + ratio)``, the maximum likelihood estimate of the
  common rate under H0 (the score-test choice; Zhu & Lakkis's method 3);
* ``"control"``: both rates at ``rate0`` (Zhu & Lakkis's method 2);
* ``"alternative"``: ``V0 = V1``, the Wald test with the variance at the true rates
  (Zhu & Lakkis's method 1).

(The numbering of the three methods is from memory.) Then, with
``theta = log(rate_ratio)``,

    power = Phi((theta sqrt(n) - z* sqrt(V0)) / sqrt(V1)) [+ the far tail if two-sided]
    n     = (z_{1-alpha} sqrt(V0) + z_power sqrt(V1))**2 / theta**2     (one-sided)

and two-sided sizes are the exact root counting both tails. With Poisson
counts and ``"alternative"`` this is the classic ``n = (z* + z_power)**2 (1/mu0 +
1/(ratio mu1)) / theta**2``. The approximation holds for a fixed, common
exposure; with varying follow-up use the mean exposure and expect a slight
optimism (simulate with :class:`~simpower.processes.counts.CountTwoArm` to check).
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, special

from ..errors import ParameterError
from . import _common as c

NULL_VARIANCES = ("pooled", "control", "alternative")

# log rate ratios searched by rate_ratio_effect: |log RR| up to log(1e6)
_GRID = np.linspace(0.0, np.log(1e6), 6001)[1:]


def _v(l0, l1, expo, inv_k, r):
    return 1.0 / (expo * l0) + 1.0 / (r * expo * l1) + (1.0 + r) / r * inv_k


def _variances(rate0, rr, expo, inv_k, r, null_variance):
    rate1 = rate0 * rr
    v1 = _v(rate0, rate1, expo, inv_k, r)
    if null_variance == "alternative":
        v0 = v1
    elif null_variance == "control":
        v0 = _v(rate0, rate0, expo, inv_k, r)
    else:
        pooled = (rate0 + r * rate1) / (1.0 + r)
        v0 = _v(pooled, pooled, expo, inv_k, r)
    return v0, v1


def _power(rate0, rr, n, expo, inv_k, r, alpha, alternative, null_variance):
    v0, v1 = _variances(rate0, rr, expo, inv_k, r, null_variance)
    crit = c.critical_z(alpha, alternative) * np.sqrt(v0 / n)
    return c.normal_tails(np.log(rr), crit, alternative, scale=np.sqrt(v1 / n))


def _one_tail_n(rate0, rr, power, expo, inv_k, r, alpha_one_tail, null_variance):
    v0, v1 = _variances(rate0, rr, expo, inv_k, r, null_variance)
    z_a, z_b = -special.ndtri(alpha_one_tail), special.ndtri(power)
    return (z_a * np.sqrt(v0) + z_b * np.sqrt(v1)) ** 2 / np.log(rr) ** 2


def _check(rate0, exposure, dispersion, ratio, alpha, alternative, null_variance, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    c.choice("null_variance", null_variance, NULL_VARIANCES)
    l0 = c.real("rate0", rate0, 0.0, low_open=True)
    expo = c.real("exposure", exposure, 0.0, low_open=True)
    inv_k = 0.0 if dispersion is None else 1.0 / c.real("dispersion", dispersion, 0.0, low_open=True)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    return l0, expo, np.asarray(inv_k, float), r, c.alpha_power(alpha, power)


def rate_ratio_power(rate0, rate_ratio, n, *, exposure=1.0, dispersion=None, ratio=1.0, alpha=0.05,
                     alternative="two-sided", null_variance="pooled"):
    """Power of the z-test of a rate ratio, Poisson or negative binomial counts (Zhu & Lakkis 2014).

    Parameters
    ----------
    rate0 : float or array_like
        Control-arm event rate per unit exposure, > 0.
    rate_ratio : float or array_like
        Treatment-over-control rate ratio, > 0.
    n : float or array_like
        Control-arm size (> 0); the treatment arm has ``ratio * n``.
    exposure : float or array_like
        Follow-up time per participant (> 0), in the rate's time unit.
    dispersion : float or array_like, optional
        Negative binomial shape k (variance ``mu + mu**2 / k``); None (default) for Poisson.
    ratio : float or array_like
        Treatment-arm size over control-arm size.
    alpha : float or array_like
        Significance level.
    alternative : {"two-sided", "greater", "less"}
        H1: rate ratio != 1, > 1, < 1.
    null_variance : {"pooled", "control", "alternative"}
        Rates at which the null variance V0 is evaluated (module docstring).

    Returns
    -------
    float or ndarray

    Examples
    --------
    Control rate 1.2 events a year, one year of follow-up, k = 2, rate ratio 0.7,
    200 per arm: 83% power (two-sided 5%):

    >>> from simpower.analytic import rate_ratio_power
    >>> round(rate_ratio_power(1.2, 0.7, 200, dispersion=2.0), 3)
    0.832
    """
    scalar = c.is_scalar(rate0, rate_ratio, n, exposure, dispersion, ratio, alpha)
    l0, expo, inv_k, r, a = _check(rate0, exposure, dispersion, ratio, alpha, alternative, null_variance)
    rr = c.real("rate_ratio", rate_ratio, 0.0, low_open=True)
    m = c.real("n", n, 0.0, low_open=True)
    return c.finish(_power(l0, rr, m, expo, inv_k, r, a, alternative, null_variance), scalar)


def rate_ratio_n(rate0, rate_ratio, power, *, exposure=1.0, dispersion=None, ratio=1.0, alpha=0.05,
                 alternative="two-sided", null_variance="pooled"):
    """Continuous control-arm size at which :func:`rate_ratio_power` reaches ``power``.

    One-sided: Zhu & Lakkis's (2014) closed form
    ``(z_{1-alpha} sqrt(V0) + z_power sqrt(V1))**2 / log(rate_ratio)**2``.
    Two-sided: the exact root of the power counting both tails, bracketed by the
    same formula with ``alpha / 2``.

    Parameters
    ----------
    rate0, rate_ratio
        As in :func:`rate_ratio_power`; the rate ratio on the side of 1 that H1 names.
    power : float or array_like
        Target power in (alpha, 1).
    exposure, dispersion, ratio, alpha, alternative, null_variance
        As in :func:`rate_ratio_power`.

    Returns
    -------
    float or ndarray
        Continuous control-arm n; round up with :func:`ceil_n`.

    Examples
    --------
    The design above needs 184 per arm for 80% power with the pooled null
    variance, 171 with the control-rate one and 187 with the Wald one:

    >>> from simpower.analytic import rate_ratio_n, ceil_n
    >>> [ceil_n(rate_ratio_n(1.2, 0.7, 0.8, dispersion=2.0, null_variance=v))
    ...  for v in ("pooled", "control", "alternative")]
    [184, 171, 187]
    """
    scalar = c.is_scalar(rate0, rate_ratio, power, exposure, dispersion, ratio, alpha)
    l0, expo, inv_k, r, (a, pw) = _check(rate0, exposure, dispersion, ratio, alpha, alternative,
                                          null_variance, power)
    rr = c.real("rate_ratio", rate_ratio, 0.0, low_open=True)
    c.directed("log(rate_ratio)", np.log(rr), alternative)
    if alternative != "two-sided":
        return c.finish(_one_tail_n(l0, rr, pw, expo, inv_k, r, a, null_variance), scalar)

    def one(l0_, rr_, pw_, expo_, ik_, r_, a_):
        hi = float(_one_tail_n(l0_, rr_, pw_, expo_, ik_, r_, a_ / 2.0, null_variance))
        f = lambda m: float(_power(l0_, rr_, m, expo_, ik_, r_, a_, "two-sided", null_variance))  # noqa: E731
        lo = hi * 1e-12
        if f(lo) >= pw_:
            raise ParameterError(
                f"`power` = {pw_:g} is reached by any n for rate_ratio = {rr_:g} with null_variance = "
                f"{null_variance!r} (the null and alternative variances differ too much); ask for more power."
            )
        return c.root_increasing(f, pw_, lo, hi)

    return c.finish(c.each(one, l0, rr, pw, expo, inv_k, r, a), scalar)


def rate_ratio_effect(rate0, n, power, *, exposure=1.0, dispersion=None, ratio=1.0, alpha=0.05,
                      alternative="two-sided", null_variance="pooled"):
    """Rate ratio nearest 1 that the test detects with the given power.

    Searched on a fine grid of log rate ratios (out to 1e6 and 1e-6), then
    solved by Brent's method between the last grid point below the target and
    the first at or above it. Below 1 the power does not rise to 1: as the
    treatment rate vanishes so does its information (V1 grows like
    ``1 / rate_ratio``), so a small ``n`` may reach no rate ratio below 1 at all.

    Parameters
    ----------
    rate0 : float or array_like
        Control-arm event rate per unit exposure, > 0.
    n : float or array_like
        Control-arm size (> 0).
    power : float or array_like
        Target power in (alpha, 1).
    exposure, dispersion, ratio, alpha, alternative, null_variance
        As in :func:`rate_ratio_power`.

    Returns
    -------
    float or ndarray
        Above 1 for "two-sided" and "greater", below 1 for "less".

    Raises
    ------
    ParameterError
        If no rate ratio on that side reaches the power.

    Examples
    --------
    184 per arm detect a 30% reduction with one-sided alpha 0.025 (power 0.8):

    >>> from simpower.analytic import rate_ratio_effect
    >>> round(rate_ratio_effect(1.2, 184, 0.8, dispersion=2.0, alpha=0.025, alternative="less"), 3)
    0.7
    """
    scalar = c.is_scalar(rate0, n, power, exposure, dispersion, ratio, alpha)
    l0, expo, inv_k, r, (a, pw) = _check(rate0, exposure, dispersion, ratio, alpha, alternative,
                                          null_variance, power)
    m = c.real("n", n, 0.0, low_open=True)
    sign = -1.0 if alternative == "less" else 1.0

    def one(l0_, m_, pw_, expo_, ik_, r_, a_):
        f = lambda t: _power(l0_, np.exp(sign * t), m_, expo_, ik_, r_, a_, alternative, null_variance)  # noqa: E731
        hit = np.flatnonzero(f(_GRID) >= pw_)
        if hit.size == 0:
            side = "below" if alternative == "less" else "above"
            raise ParameterError(
                f"`n` = {m_:g} is too small: no rate ratio {side} 1 reaches power {pw_:g}; raise n."
            )
        hi = _GRID[hit[0]]
        lo = _GRID[hit[0] - 1] if hit[0] > 0 else 0.0
        t = optimize.brentq(lambda t: float(f(t)) - pw_, lo, hi, xtol=c._XTOL, rtol=c._RTOL)
        return np.exp(sign * t)

    return c.finish(c.each(one, l0, m, pw, expo, inv_k, r, a), scalar)
