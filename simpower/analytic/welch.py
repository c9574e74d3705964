"""Welch's unequal-variance t-test: approximate power, required n, detectable effect.

With ``n0 = n`` control and ``n1 = ratio * n`` treatment observations and
population SDs ``sd0``, ``sd1``, write ``a0 = sd0**2 / n0`` and ``a1 = sd1**2 / n1``.
The statistic is referred to a noncentral t with noncentrality
``effect / sqrt(a0 + a1)`` and the Welch-Satterthwaite degrees of freedom
computed from the population values (Satterthwaite 1946; Welch 1947):

    df = (a0 + a1)**2 / (a0**2 / (n0 - 1) + a1**2 / (n1 - 1))

This is the usual approximation: the Welch statistic is not exactly
noncentral t, because its df are estimated from the sample.
"""

from __future__ import annotations

import numpy as np

from ..errors import ParameterError
from . import _common as c
from .normal import required_delta
from .ttest import t_tails


def welch_df(n, sd0=1.0, sd1=1.0, ratio=1.0):
    """Welch-Satterthwaite df from population SDs (no input checks)."""
    n0, n1 = n, ratio * n
    a0, a1 = sd0**2 / n0, sd1**2 / n1
    return (a0 + a1) ** 2 / (a0**2 / (n0 - 1) + a1**2 / (n1 - 1))


def _se(n, sd0, sd1, ratio):
    return np.sqrt(sd0**2 / n + sd1**2 / (ratio * n))


def _check(sd0, sd1, ratio, alpha, alternative, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    s0 = c.real("sd0", sd0, 0.0, low_open=True)
    s1 = c.real("sd1", sd1, 0.0, low_open=True)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    return s0, s1, r, c.alpha_power(alpha, power)


def _check_n(n, ratio):
    m = c.real("n", n, 1.0, low_open=True)
    bad = np.broadcast_to(ratio * m <= 1.0, np.broadcast(m, ratio).shape)
    if np.any(bad):
        mb = np.broadcast_to(m, bad.shape)
        raise ParameterError(
            f"`n` must leave more than 1 treatment observation (ratio * n > 1); got {c._show(mb, bad)}."
        )
    return m


def _power(effect, n, s0, s1, r, alpha, alternative):
    return t_tails(effect / _se(n, s0, s1, r), welch_df(n, s0, s1, r), alpha, alternative)


def welch_power(effect, n, *, sd0=1.0, sd1=1.0, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Power of Welch's t-test (noncentral t with Welch-Satterthwaite df).

    Parameters
    ----------
    effect : float or array_like
        Treatment minus control mean, in outcome units.
    n : float or array_like
        Control-arm size (> 1); the treatment arm has ``ratio * n`` (> 1).
    sd0, sd1 : float or array_like
        Population SDs of the control and treatment arms.
    ratio : float or array_like
        Treatment-arm size over control-arm size.
    alpha : float or array_like
        Significance level.
    alternative : {"two-sided", "greater", "less"}
        H1: effect != 0, > 0, < 0.

    Returns
    -------
    float or ndarray
        Approximate power; both tails for "two-sided".

    Examples
    --------
    Equal SDs and arms reduce to the pooled t-test up to df: 64 per arm,
    d = 0.5 gives about 80% power (Cohen 1988, Table 2.4.1). Doubling the
    treatment arm's SD costs a lot of it:

    >>> from simpower.analytic import welch_power
    >>> round(welch_power(0.5, 64), 3), round(welch_power(0.5, 64, sd1=2.0), 3)
    (0.801, 0.425)
    """
    scalar = c.is_scalar(effect, n, sd0, sd1, ratio, alpha)
    s0, s1, r, a = _check(sd0, sd1, ratio, alpha, alternative)
    e = c.real("effect", effect)
    m = _check_n(n, r)
    return c.finish(_power(e, m, s0, s1, r, a, alternative), scalar)


def welch_n(effect, power, *, sd0=1.0, sd1=1.0, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Continuous control-arm size at which Welch's test reaches ``power``.

    Solves :func:`welch_power` ``= power`` in continuous n by Brent's method.

    Parameters
    ----------
    effect : float or array_like
        On the side H1 names (> 0 "greater", < 0 "less", non-zero "two-sided").
    power : float or array_like
        Target power in (alpha, 1).
    sd0, sd1, ratio, alpha, alternative
        As in :func:`welch_power`.

    Returns
    -------
    float or ndarray
        Continuous control-arm n; the treatment arm needs ``ratio`` times it.

    Raises
    ------
    ParameterError
        On bad input, or when 2 observations in the smaller arm already exceed
        ``power``.

    Examples
    --------
    With equal SDs the answer is within a fraction of a participant of the
    pooled t-test's 64 per arm for d = 0.5:

    >>> from simpower.analytic import welch_n, ceil_n
    >>> ceil_n(welch_n(0.5, 0.8))
    64
    """
    scalar = c.is_scalar(effect, power, sd0, sd1, ratio, alpha)
    s0, s1, r, (a, p) = _check(sd0, sd1, ratio, alpha, alternative, power)
    e = c.real("effect", effect)
    c.directed("effect", e, alternative)

    def one(e_, p_, s0_, s1_, r_, a_):
        f = lambda m: float(_power(e_, m, s0_, s1_, r_, a_, alternative))  # noqa: E731
        floor = 2.0 * max(1.0, 1.0 / r_)  # at least 2 per arm
        at_floor = f(floor)
        if at_floor >= p_:
            raise ParameterError(
                f"`power` = {p_:g} is already exceeded with 2 observations in the smaller arm for "
                f"effect {e_:g} (n = {floor:g}, power {at_floor:.3g}); ask for more power."
            )
        # z-test with the same SE reaches the power at n_z; Welch's test (a t-test) needs more.
        n_z = (float(required_delta(p_, a_, alternative)) / e_) ** 2 * (s0_**2 + s1_**2 / r_)
        lo = max(n_z, floor)
        return c.root_increasing(f, p_, lo, 2.0 * lo + 1.0)

    return c.finish(c.each(one, e, p, s0, s1, r, a), scalar)


def welch_effect(n, power, *, sd0=1.0, sd1=1.0, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Minimal detectable mean difference of Welch's test at control-arm size ``n``.

    Parameters
    ----------
    n : float or array_like
        Control-arm size, as in :func:`welch_power`.
    power : float or array_like
        Target power in (alpha, 1).
    sd0, sd1, ratio, alpha, alternative
        As in :func:`welch_power`.

    Returns
    -------
    float or ndarray
        Positive for "two-sided"/"greater", negative for "less".

    Examples
    --------
    >>> from simpower.analytic import welch_effect
    >>> round(welch_effect(64, 0.8), 3)
    0.499
    """
    scalar = c.is_scalar(n, power, sd0, sd1, ratio, alpha)
    s0, s1, r, (a, p) = _check(sd0, sd1, ratio, alpha, alternative, power)
    m = _check_n(n, r)
    side = "two-sided" if alternative == "two-sided" else "greater"
    sign = -1.0 if alternative == "less" else 1.0

    def one(m_, p_, s0_, s1_, r_, a_):
        df = welch_df(m_, s0_, s1_, r_)
        f = lambda nc: float(t_tails(nc, df, a_, side))  # noqa: E731
        lo = float(required_delta(p_, a_, side))
        return sign * c.root_increasing(f, p_, lo, 2.0 * lo + 1.0) * float(_se(m_, s0_, s1_, r_))

    return c.finish(c.each(one, m, p, s0, s1, r, a), scalar)
