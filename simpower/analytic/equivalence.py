"""Equivalence by two one-sided t-tests (TOST): exact power under normality.

The TOST at level alpha rejects H0 (theta <= low or theta >= high) when both
one-sided t statistics clear the critical value ``c = t_{1-alpha, df}``
(Schuirmann 1987, J Pharmacokinet Biopharm 15:657-680), that is when

    low + c * SE_hat < theta_hat < high - c * SE_hat.

With normal data ``theta_hat ~ N(effect, tau**2)`` (``tau = sd * sqrt(g / n)``,
``g`` as for the t-test) is independent of ``SE_hat = tau * sqrt(V / df)`` with
``V ~ chi2(df)``, so the power is one integral over V (Phillips 1990,
J Pharmacokinet Biopharm 18:137-144; the same probability as the difference
of Owen's (1965) Q functions):

    power = E[ max(0, Phi((high - effect)/tau - c S) - Phi((low - effect)/tau + c S)) ],
    S = sqrt(V / df).

The integrand is zero once ``S >= (high - low) / (2 c tau)`` (the interval
``theta_hat`` must fall in is then empty). The integral is taken over
``u = log V`` by adaptive quadrature, as in :mod:`._nct`.

At ``effect = high`` (or ``low``) the power is the TOST's type I error on the
boundary of H0; it is at most alpha and falls below it when ``tau`` is large
against ``high - low``.

Welch's variant (:func:`welch_tost_power`) uses the same integral with
``tau**2 = sd0**2/n0 + sd1**2/n1`` and the Welch-Satterthwaite df from the
population SDs: an approximation, as for :func:`simpower.analytic.welch_power`.
"""

from __future__ import annotations

import numpy as np
from scipy import integrate, special

from ..errors import ParameterError
from . import _common as c
from .ttest import family
from .normal import DESIGNS
from .welch import _check_n as _welch_check_n
from .welch import welch_df


def _bounds(low, high):
    lo = c.real("low", low)
    hi = c.real("high", high)
    bad = np.broadcast_to(lo >= hi, np.broadcast(lo, hi).shape)
    if np.any(bad):
        lb, hb = np.broadcast_arrays(lo, hi)
        raise ParameterError(f"`low` must be < `high`; got low = {float(lb[bad][0]):g}, "
                             f"high = {float(hb[bad][0]):g}.")
    return lo, hi


def _tost_one(effect: float, tau: float, df: float, alpha: float, low: float, high: float) -> float:
    """P(low + c tau S < D < high - c tau S), D ~ N(effect, tau^2), S = sqrt(chi2(df) / df)."""
    crit = -float(special.stdtrit(df, alpha))
    a = (high - effect) / tau
    b = (low - effect) / tau
    half = df / 2.0
    log_norm = half * np.log(2.0) + special.gammaln(half)
    s_max = (high - low) / (2.0 * crit * tau)
    u_max = np.log(df) + 2.0 * np.log(s_max)  # V at which the interval closes

    def integrand(u):
        v = np.exp(u)
        s = np.sqrt(v / df)
        inside = special.ndtr(a - crit * s) - special.ndtr(b + crit * s)
        return np.exp(half * u - v / 2.0 - log_norm) * max(inside, 0.0)

    centre = np.log(df)
    lo = centre - 80.0 / df - 12.0 * np.sqrt(2.0 / df)
    hi = min(np.log(df + 12.0 * np.sqrt(2.0 * df) + 60.0), u_max)
    if hi <= lo:
        return 0.0
    points = [centre] if lo < centre < hi else None
    val, _ = integrate.quad(integrand, lo, hi, points=points, epsabs=1e-15, epsrel=1e-12, limit=200)
    return float(min(max(val, 0.0), 1.0))


def tost_power(effect, n, *, low, high, sd=1.0, alpha=0.05, design="one-sample", ratio=1.0):
    """Exact power of the TOST equivalence test with Student's t (normal data, one SD).

    Parameters
    ----------
    effect : float or array_like
        True mean (one-sample), mean within-pair difference (paired), or
        treatment minus control mean (two-sample), in outcome units.
    n : float or array_like
        Observations, pairs, or the control arm's size; df must be > 0.
    low, high : float or array_like
        The equivalence range, low < high (H1: low < effect < high).
    sd : float or array_like
        SD of an observation (of a within-pair difference for "paired"); both
        arms share it for "two-sample".
    alpha : float or array_like
        Level of each one-sided test (the TOST's level).
    design : {"one-sample", "paired", "two-sample"}
    ratio : float or array_like
        Treatment-arm size over control-arm size (two-sample only).

    Returns
    -------
    float or ndarray
        The probability that both one-sided tests reject; at ``effect = high``
        (or ``low``) the type I error on the boundary of H0.

    Examples
    --------
    30 per arm, range +-0.5 SD: power 0.21 at no difference; on the margin the
    rejection rate is the test's size there, 0.036, below alpha = 0.05:

    >>> from simpower.analytic import tost_power
    >>> round(tost_power(0.0, 30, low=-0.5, high=0.5, design="two-sample"), 3)
    0.214
    >>> round(tost_power(0.5, 30, low=-0.5, high=0.5, design="two-sample"), 4)
    0.0358
    """
    scalar = c.is_scalar(effect, n, low, high, sd, alpha, ratio)
    c.choice("design", design, DESIGNS)
    s = c.real("sd", sd, 0.0, low_open=True)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    a = c.alpha_power(alpha)
    lo, hi = _bounds(low, high)
    e = c.real("effect", effect)
    fam = family(design, r)
    m = fam.check_n(n)
    tau = s * np.sqrt(fam.g / m)
    return c.finish(c.each(_tost_one, e, tau, fam.df(m), a, lo, hi), scalar)


def welch_tost_power(effect, n, *, low, high, sd0=1.0, sd1=1.0, ratio=1.0, alpha=0.05):
    """Approximate power of the TOST with Welch's t (Welch-Satterthwaite df from the population SDs).

    Parameters
    ----------
    effect : float or array_like
        Treatment minus control mean, in outcome units.
    n : float or array_like
        Control-arm size (> 1); the treatment arm has ``ratio * n`` (> 1).
    low, high : float or array_like
        The equivalence range, low < high.
    sd0, sd1 : float or array_like
        Population SDs of the control and treatment arms.
    ratio : float or array_like
    alpha : float or array_like

    Returns
    -------
    float or ndarray
        :func:`tost_power`'s integral with ``tau**2 = sd0**2/n + sd1**2/(ratio n)``
        and df from :func:`simpower.analytic.welch_df`.

    Examples
    --------
    With equal arms and SDs it differs from the pooled TOST only through df:

    >>> from simpower.analytic import tost_power, welch_tost_power
    >>> w = welch_tost_power(0.0, 30, low=-0.5, high=0.5)
    >>> p = tost_power(0.0, 30, low=-0.5, high=0.5, design="two-sample")
    >>> abs(w - p) < 1e-9
    True
    """
    scalar = c.is_scalar(effect, n, low, high, sd0, sd1, ratio, alpha)
    s0 = c.real("sd0", sd0, 0.0, low_open=True)
    s1 = c.real("sd1", sd1, 0.0, low_open=True)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    a = c.alpha_power(alpha)
    lo, hi = _bounds(low, high)
    e = c.real("effect", effect)
    m = _welch_check_n(n, r)
    tau = np.sqrt(s0**2 / m + s1**2 / (r * m))
    return c.finish(c.each(_tost_one, e, tau, welch_df(m, s0, s1, r), a, lo, hi), scalar)
