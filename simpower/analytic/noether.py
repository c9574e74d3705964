"""Wilcoxon-Mann-Whitney test: Noether's (1987) power and sample size.

The effect is the probability of superiority ``p = P(Y1 > Y0) + P(Y1 = Y0) / 2``
of a treatment observation over a control one (the probabilistic index; 1/2 under
H0). With ``n0`` control and ``n1`` treatment observations, ``N = n0 + n1`` and
``c = n0 / N``, the statistic ``U / (n0 n1)`` estimates ``p``, and its null
variance is ``(N + 1) / (12 n0 n1)``, about ``1 / (12 c (1 - c) N)``. Noether
(1987, Journal of the American Statistical Association 82:645-647) uses that
null variance under H1 as well, so the standardised shift is

    delta = (p - 1/2) * sqrt(12 c (1 - c) N)

and the total size for a one-sided test is

    N = (z_{1-alpha} + z_power)**2 / (12 c (1 - c) (p - 1/2)**2).

Here, as in the rest of :mod:`simpower.analytic`, ``n`` is the control arm and
``ratio`` = n1 / n0, so ``c (1 - c) = ratio / (1 + ratio)**2`` and ``N = n (1 + ratio)``.
The formula is approximate: the variance of U under H1 is smaller than the null
one when ``p`` is far from 1/2 (the formula then asks for a little too much),
and the normal approximation is poor for very small arms.

For a normal location shift of ``d`` SDs, ``p = Phi(d / sqrt(2))`` (the
difference of two independent N(0, 1) variables is N(0, 2));
:func:`superiority_normal` gives it.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ..errors import ParameterError
from . import _common as c
from .normal import required_delta, standardized_power


def _check(ratio, alpha, alternative, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    return r, c.alpha_power(alpha, power)


def _prob(value):
    return c.real("p_superior", value, 0.0, 1.0)


def _information(r):
    """``12 c (1 - c) (1 + ratio)`` per control-arm observation: delta = (p - 1/2) sqrt(n * this)."""
    return 12.0 * r / (1.0 + r)


def superiority_normal(effect, *, sd=1.0):
    """Probability of superiority ``P(Y1 > Y0)`` for a normal shift: ``Phi(effect / (sd sqrt 2))``.

    Parameters
    ----------
    effect : float or array_like
        Treatment minus control mean, in outcome units.
    sd : float or array_like
        Common SD (default 1, so ``effect`` is Cohen's d).

    Returns
    -------
    float or ndarray

    Examples
    --------
    A half-SD shift puts a treated observation above a control one 64% of the time:

    >>> from simpower.analytic import superiority_normal
    >>> round(superiority_normal(0.5), 4)
    0.6382
    """
    scalar = c.is_scalar(effect, sd)
    e = c.real("effect", effect)
    s = c.real("sd", sd, 0.0, low_open=True)
    return c.finish(special.ndtr(e / (s * np.sqrt(2.0))), scalar)


def noether_power(p_superior, n, *, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Power of the Wilcoxon-Mann-Whitney test by Noether's (1987) approximation.

    Parameters
    ----------
    p_superior : float or array_like
        ``P(Y1 > Y0) + P(Y1 = Y0) / 2`` in [0, 1]; 1/2 under H0.
    n : float or array_like
        Control-arm size (> 0); the treatment arm has ``ratio * n``.
    ratio : float or array_like
        Treatment-arm size over control-arm size.
    alpha : float or array_like
        Significance level.
    alternative : {"two-sided", "greater", "less"}
        H1: p != 1/2, p > 1/2 (treatment tends to be larger), p < 1/2.

    Returns
    -------
    float or ndarray
        ``Phi(delta - z*) [+ Phi(-delta - z*)]``, ``delta = (p - 1/2) sqrt(12 n ratio / (1 + ratio))``.

    Examples
    --------
    >>> from simpower.analytic import noether_power, superiority_normal
    >>> round(noether_power(superiority_normal(0.5), 69), 3)
    0.803
    """
    scalar = c.is_scalar(p_superior, n, ratio, alpha)
    r, a = _check(ratio, alpha, alternative)
    q = _prob(p_superior)
    m = c.real("n", n, 0.0, low_open=True)
    delta = (q - 0.5) * np.sqrt(m * _information(r))
    return c.finish(standardized_power(delta, a, alternative), scalar)


def noether_n(p_superior, power, *, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Control-arm size for the Wilcoxon-Mann-Whitney test by Noether's (1987) formula.

    ``delta*^2 (1 + ratio) / (12 ratio (p - 1/2)^2)``, i.e. Noether's total
    ``N = delta*^2 / (12 c (1 - c) (p - 1/2)^2)`` divided by ``1 + ratio``, with
    ``delta* = z_{1-alpha} + z_power`` for one-sided tests and the exact
    two-tailed root otherwise.

    Parameters
    ----------
    p_superior : float or array_like
        Probability of superiority, on the side of 1/2 that H1 names.
    power : float or array_like
        Target power in (alpha, 1).
    ratio, alpha, alternative
        As in :func:`noether_power`.

    Returns
    -------
    float or ndarray
        Continuous control-arm n; round up with :func:`ceil_n`.

    Examples
    --------
    A half-SD normal shift, two-sided 5%, power 0.8: 68.5, i.e. 69 per arm
    (the t-test needs 64):

    >>> from simpower.analytic import noether_n, superiority_normal, ceil_n
    >>> n = noether_n(superiority_normal(0.5), 0.8)
    >>> round(n, 1), ceil_n(n)
    (68.5, 69)
    """
    scalar = c.is_scalar(p_superior, power, ratio, alpha)
    r, (a, pw) = _check(ratio, alpha, alternative, power)
    q = _prob(p_superior)
    c.directed("p_superior - 1/2", q - 0.5, alternative)
    delta = required_delta(pw, a, alternative)
    return c.finish(delta**2 / (_information(r) * (q - 0.5) ** 2), scalar)


def noether_effect(n, power, *, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Probability of superiority detectable with the given power (Noether 1987).

    ``1/2 +- delta* / sqrt(12 n ratio / (1 + ratio))``: above 1/2 for
    "two-sided" and "greater", below for "less".

    Parameters
    ----------
    n : float or array_like
        Control-arm size (> 0).
    power : float or array_like
        Target power in (alpha, 1).
    ratio, alpha, alternative
        As in :func:`noether_power`.

    Returns
    -------
    float or ndarray

    Raises
    ------
    ParameterError
        If the answer would lie outside [0, 1] (``n`` too small).

    Examples
    --------
    >>> from simpower.analytic import noether_effect
    >>> round(noether_effect(69, 0.8), 4)
    0.6377
    """
    scalar = c.is_scalar(n, power, ratio, alpha)
    r, (a, pw) = _check(ratio, alpha, alternative, power)
    m = c.real("n", n, 0.0, low_open=True)
    sign = -1.0 if alternative == "less" else 1.0
    shift = sign * required_delta(pw, a, alternative) / np.sqrt(m * _information(r))
    q = 0.5 + shift
    bad = np.abs(shift) > 0.5
    if np.any(bad):
        mb, _ = np.broadcast_arrays(m, q)
        raise ParameterError(
            f"`n` = {float(mb[bad][0]):g} is too small: no probability of superiority reaches "
            f"power {float(np.broadcast_to(pw, q.shape)[bad][0]):g}; raise n or lower the power."
        )
    return c.finish(q, scalar)
