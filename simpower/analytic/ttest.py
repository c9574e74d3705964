"""Student t-tests: exact power from the noncentral t, required n, detectable effect.

Under H1 the t statistic follows a noncentral t with ``df`` degrees of freedom
and noncentrality ``nc = effect / (sd * sqrt(g / n))``:

=============  =====================  ==========================
design         g                      df
=============  =====================  ==========================
one-sample     1                      n - 1
paired         1 (sd of differences)  n - 1  (n = number of pairs)
two-sample     1 + 1/ratio            n + ratio * n - 2
=============  =====================  ==========================

Power is the noncentral-t probability of the rejection region (both tails for
a two-sided test), computed with :func:`scipy.special.nctdtr` (NaN far tails filled in by
:mod:`._nct`).
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ..errors import ParameterError
from . import _common as c
from ._nct import nct_cdf
from .normal import DESIGNS, required_delta, variance_factor


def t_tails(nc, df, alpha, alternative):
    """Probability that a noncentral t(df, nc) statistic falls in the rejection region."""
    if alternative == "two-sided":
        crit = -special.stdtrit(df, alpha / 2)
        return nct_cdf(df, -nc, -crit) + nct_cdf(df, nc, -crit)
    crit = -special.stdtrit(df, alpha)
    if alternative == "greater":
        return nct_cdf(df, -nc, -crit)  # P(T > crit) by symmetry
    return nct_cdf(df, nc, -crit)


class TFamily:
    """A t-test layout: Var(effect_hat) = sd**2 * g / n and df = n * per_n - lost.

    Used by the t-test, ANCOVA and cluster helpers; the arrays ``g`` and
    ``per_n`` broadcast against the other arguments.
    """

    def __init__(self, g, per_n, lost: float, label: str):
        self.g, self.per_n, self.lost, self.label = g, per_n, lost, label

    def df(self, n):
        return n * self.per_n - self.lost

    def check_n(self, n) -> np.ndarray:
        m = c.real("n", n, 0.0, low_open=True)
        bad = np.broadcast_to(self.df(m) <= 0, np.broadcast(m, self.per_n).shape)
        if np.any(bad):
            mb = np.broadcast_to(m, bad.shape)
            raise ParameterError(f"`n` must leave df = {self.label} > 0; got {c._show(mb, bad)}.")
        return m

    def power(self, effect, n, sd, alpha, alternative):
        nc = effect / (sd * np.sqrt(self.g / n))
        return t_tails(nc, self.df(n), alpha, alternative)

    def n(self, effect, power, sd, alpha, alternative) -> np.ndarray:
        def one(e, p, s, a, g, per_n):
            fam = TFamily(g, per_n, self.lost, self.label)
            f = lambda m: fam.power(e, m, s, a, alternative)  # noqa: E731
            n_floor = (self.lost + 1.0) / per_n  # df = 1
            at_floor = float(f(n_floor))
            if at_floor >= p:
                raise ParameterError(
                    f"`power` = {p:g} is already exceeded at the smallest t-test sample for effect {e:g} "
                    f"(n = {n_floor:g}, df = 1, power {at_floor:.3g}); ask for more power."
                )
            # The t-test never beats the z-test at the same n (the z-test is UMP /
            # UMP unbiased with known SD), so the z-test's n is a lower bracket.
            n_z = g * (float(required_delta(p, a, alternative)) * s / e) ** 2
            lo = max(n_z, n_floor)
            return c.root_increasing(f, p, lo, 2.0 * lo + 1.0)

        return c.each(one, effect, power, sd, alpha, self.g, self.per_n)

    def effect(self, n, power, sd, alpha, alternative) -> np.ndarray:
        side = "two-sided" if alternative == "two-sided" else "greater"
        sign = -1.0 if alternative == "less" else 1.0

        def one(m, p, s, a, g, per_n):
            df = m * per_n - self.lost
            f = lambda nc: t_tails(nc, df, a, side)  # noqa: E731
            lo = float(required_delta(p, a, side))  # z-test's shift: t power there <= p
            nc = c.root_increasing(f, p, lo, 2.0 * lo + 1.0)
            return sign * nc * s * np.sqrt(g / m)

        return c.each(one, n, power, sd, alpha, self.g, self.per_n)


def family(design: str, ratio, lost_extra: float = 0.0) -> TFamily:
    """The :class:`TFamily` of a one-sample, paired or two-sample t-test."""
    if design == "two-sample":
        label = "n + ratio*n - 2" + (f" - {lost_extra:g}" if lost_extra else "")
        return TFamily(variance_factor(design, ratio), 1.0 + ratio, 2.0 + lost_extra, label)
    label = "n - 1" + (f" - {lost_extra:g}" if lost_extra else "")
    return TFamily(variance_factor(design, ratio), np.ones_like(ratio), 1.0 + lost_extra, label)


def _check(sd, alpha, alternative, design, ratio, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    c.choice("design", design, DESIGNS)
    s = c.real("sd", sd, 0.0, low_open=True)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    return s, family(design, r), c.alpha_power(alpha, power)


def t_power(effect, n, *, sd=1.0, alpha=0.05, alternative="two-sided", design="one-sample", ratio=1.0):
    """Exact power of Student's t-test (noncentral t).

    Parameters
    ----------
    effect : float or array_like
        True mean (one-sample), mean within-pair difference (paired), or
        treatment minus control mean (two-sample), in outcome units.
    n : float or array_like
        Observations, pairs, or the control arm's size; df must be > 0.
    sd : float or array_like
        SD of an observation (of a within-pair difference for "paired");
        both arms share it for "two-sample". Default 1 (effect = Cohen's d).
    alpha : float or array_like
        Significance level.
    alternative : {"two-sided", "greater", "less"}
        H1: effect != 0, effect > 0, effect < 0.
    design : {"one-sample", "paired", "two-sample"}
    ratio : float or array_like
        Treatment-arm size over control-arm size (two-sample only).

    Returns
    -------
    float or ndarray
        P(T > t*) + P(T < -t*) for two-sided tests (t* = t_{1-alpha/2, df}),
        one tail otherwise, with T ~ noncentral t(df, nc).

    Examples
    --------
    64 per arm give d = 0.5 just over 80% power (Cohen 1988, Table 2.4.1):

    >>> from simpower.analytic import t_power
    >>> round(t_power(0.5, 64, design="two-sample"), 3)
    0.801
    """
    scalar = c.is_scalar(effect, n, sd, alpha, ratio)
    s, fam, a = _check(sd, alpha, alternative, design, ratio)
    e = c.real("effect", effect)
    m = fam.check_n(n)
    return c.finish(fam.power(e, m, s, a, alternative), scalar)


def t_n(effect, power, *, sd=1.0, alpha=0.05, alternative="two-sided", design="one-sample", ratio=1.0):
    """Continuous sample size at which the t-test reaches ``power`` exactly.

    Solves :func:`t_power` ``= power`` in continuous n by Brent's method
    (df varies with n). Round up with :func:`ceil_n`.

    Parameters
    ----------
    effect : float or array_like
        On the side H1 names (> 0 "greater", < 0 "less", non-zero "two-sided").
    power : float or array_like
        Target power in (alpha, 1).
    sd, alpha, alternative, design, ratio
        As in :func:`t_power`.

    Returns
    -------
    float or ndarray
        Continuous n (pairs for "paired", control-arm size for "two-sample").

    Raises
    ------
    ParameterError
        On bad input, or when the smallest sample with df = 1 already exceeds
        ``power`` (a low target with a large effect): no t-test size answers that.

    Examples
    --------
    Cohen (1988), Table 2.4.1 (two-sided alpha 0.05, power 0.80): 64 per arm
    for d = 0.5 and 26 per arm for d = 0.8:

    >>> from simpower.analytic import t_n, ceil_n
    >>> ceil_n(t_n(0.5, 0.8, design="two-sample")), ceil_n(t_n(0.8, 0.8, design="two-sample"))
    (64, 26)
    """
    scalar = c.is_scalar(effect, power, sd, alpha, ratio)
    s, fam, (a, p) = _check(sd, alpha, alternative, design, ratio, power)
    e = c.real("effect", effect)
    c.directed("effect", e, alternative)
    return c.finish(fam.n(e, p, s, a, alternative), scalar)


def t_effect(n, power, *, sd=1.0, alpha=0.05, alternative="two-sided", design="one-sample", ratio=1.0):
    """Minimal detectable effect of the t-test at sample size ``n``.

    Solves :func:`t_power` ``= power`` for the noncentrality at fixed df.

    Parameters
    ----------
    n : float or array_like
        As in :func:`t_power`.
    power : float or array_like
        Target power in (alpha, 1).
    sd, alpha, alternative, design, ratio
        As in :func:`t_power`.

    Returns
    -------
    float or ndarray
        Effect in outcome units: positive for "two-sided"/"greater", negative
        for "less".

    Examples
    --------
    With 64 per arm the detectable d at 80% power is just under 0.5:

    >>> from simpower.analytic import t_effect
    >>> round(t_effect(64, 0.8, design="two-sample"), 3)
    0.499
    """
    scalar = c.is_scalar(n, power, sd, alpha, ratio)
    s, fam, (a, p) = _check(sd, alpha, alternative, design, ratio, power)
    m = fam.check_n(n)
    return c.finish(fam.effect(m, p, s, a, alternative), scalar)
