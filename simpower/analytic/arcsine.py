"""Two proportions on the arcsine scale: Cohen's h and the power of its z-test.

Cohen (1988, *Statistical Power Analysis for the Behavioral Sciences*, 2nd ed.,
ch. 6) measures the distance between two proportions by

    h = phi(p1) - phi(p0),   phi(p) = 2 * asin(sqrt(p)),

the variance-stabilising transform of a binomial proportion: ``phi(p_hat)`` has
variance ``1 / n`` whatever ``p`` (to first order). With ``n`` in the control arm
and ``ratio * n`` in the treatment arm, ``h_hat`` is approximately
``N(h, g / n)`` with ``g = 1 + 1/ratio``, so the test is a z-test of a
standardised shift ``delta = h / sqrt(g / n)``:

    power = Phi(delta - z*) [+ Phi(-delta - z*) if two-sided]
    n     = g * ((z_{1-alpha} + z_power) / h)**2        (one-sided; exact root if two-sided)

For equal arms the one-tail formula is Cohen's ``n = 2 * ((z* + z_power) / h)**2``
per arm (his Table 6.4.1 rounds it: 392, 63 and 25 per arm for h = 0.2, 0.5 and
0.8 at two-sided alpha 0.05 and power 0.8; values from memory). Unlike :mod:`.proportions` the
variance does not depend on the proportions, so power depends on ``p0`` and
``p1`` only through ``h``.
"""

from __future__ import annotations

import numpy as np

from ..errors import ParameterError
from . import _common as c
from .normal import required_delta, standardized_power


def _phi(p):
    return 2.0 * np.arcsin(np.sqrt(p))


def _prob(name, value):
    return c.real(name, value, 0.0, 1.0)


def _check(ratio, alpha, alternative, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    return r, c.alpha_power(alpha, power)


def cohen_h(p1, p0):
    """Cohen's h: ``2 asin(sqrt(p1)) - 2 asin(sqrt(p0))`` (Cohen 1988, ch. 6).

    Parameters
    ----------
    p1, p0 : float or array_like
        Proportions in [0, 1] (treatment and control).

    Returns
    -------
    float or ndarray
        In [-pi, pi]; positive when ``p1 > p0``. Cohen calls 0.2, 0.5 and 0.8
        small, medium and large.

    Examples
    --------
    0.65 against 0.45 is about 0.4, between Cohen's "small" and "medium":

    >>> from simpower.analytic import cohen_h
    >>> round(cohen_h(0.65, 0.45), 4)
    0.4049
    """
    scalar = c.is_scalar(p1, p0)
    return c.finish(_phi(_prob("p1", p1)) - _phi(_prob("p0", p0)), scalar)


def arcsine_power(p0, p1, n, *, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Power of the arcsine (Cohen's h) z-test of two proportions.

    Parameters
    ----------
    p0, p1 : float or array_like
        Control and treatment proportions, in [0, 1].
    n : float or array_like
        Control-arm size (> 0); the treatment arm has ``ratio * n``.
    ratio : float or array_like
        Treatment-arm size over control-arm size.
    alpha : float or array_like
        Significance level.
    alternative : {"two-sided", "greater", "less"}
        H1: p1 != p0, p1 > p0, p1 < p0.

    Returns
    -------
    float or ndarray
        ``Phi(delta - z*) [+ Phi(-delta - z*)]`` with ``delta = h / sqrt((1 + 1/ratio) / n)``
        (Cohen 1988, ch. 6).

    Examples
    --------
    h = 0.5 with 63 per arm: 80% power at two-sided alpha 0.05:

    >>> from simpower.analytic import arcsine_power
    >>> import math
    >>> p1 = math.sin(math.asin(math.sqrt(0.5)) + 0.25) ** 2   # h = 0.5 above p0 = 0.5
    >>> round(arcsine_power(0.5, p1, 63), 3)
    0.801
    """
    scalar = c.is_scalar(p0, p1, n, ratio, alpha)
    r, a = _check(ratio, alpha, alternative)
    h = _phi(_prob("p1", p1)) - _phi(_prob("p0", p0))
    m = c.real("n", n, 0.0, low_open=True)
    delta = h / np.sqrt((1.0 + 1.0 / r) / m)
    return c.finish(standardized_power(delta, a, alternative), scalar)


def arcsine_n(p0, p1, power, *, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Continuous control-arm size at which :func:`arcsine_power` reaches ``power``.

    ``(1 + 1/ratio) * (delta* / h)**2`` with ``delta* = z_{1-alpha} + z_power``
    for one-sided tests (Cohen 1988, ch. 6) and, for two-sided tests, the exact
    root of the power counting both tails (a hair below the one-tail formula).

    Parameters
    ----------
    p0, p1 : float or array_like
        Control and treatment proportions in [0, 1]; ``h`` on the side H1 names.
    power : float or array_like
        Target power in (alpha, 1).
    ratio, alpha, alternative
        As in :func:`arcsine_power`.

    Returns
    -------
    float or ndarray
        Continuous control-arm n; round up with :func:`ceil_n`.

    Examples
    --------
    0.6 against 0.8 (h = 0.442): 80.3, i.e. 81 per arm, beside 82 for the
    pooled-variance z-test of :func:`prop2_n`:

    >>> from simpower.analytic import arcsine_n, ceil_n
    >>> n = arcsine_n(0.6, 0.8, 0.8)
    >>> round(n, 1), ceil_n(n)
    (80.3, 81)
    """
    scalar = c.is_scalar(p0, p1, power, ratio, alpha)
    r, (a, p) = _check(ratio, alpha, alternative, power)
    h = _phi(_prob("p1", p1)) - _phi(_prob("p0", p0))
    c.directed("h", h, alternative)
    delta = required_delta(p, a, alternative)
    return c.finish((1.0 + 1.0 / r) * (delta / h) ** 2, scalar)


def arcsine_effect(p0, n, power, *, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Treatment proportion ``p1`` that the arcsine test detects with the given power.

    Closed form: ``h* = delta* sqrt((1 + 1/ratio) / n)`` and
    ``p1 = sin(asin(sqrt(p0)) +- h*/2)**2`` (above ``p0`` for "two-sided" and
    "greater", below for "less").

    Parameters
    ----------
    p0 : float or array_like
        Control proportion in [0, 1].
    n : float or array_like
        Control-arm size (> 0).
    power : float or array_like
        Target power in (alpha, 1).
    ratio, alpha, alternative
        As in :func:`arcsine_power`.

    Returns
    -------
    float or ndarray

    Raises
    ------
    ParameterError
        If the needed ``h`` would take ``p1`` past 1 (or below 0): ``n`` is too small.

    Examples
    --------
    >>> from simpower.analytic import arcsine_effect
    >>> round(arcsine_effect(0.6, 81, 0.8), 3)
    0.799
    """
    scalar = c.is_scalar(p0, n, power, ratio, alpha)
    r, (a, p) = _check(ratio, alpha, alternative, power)
    q0 = _prob("p0", p0)
    m = c.real("n", n, 0.0, low_open=True)
    sign = -1.0 if alternative == "less" else 1.0
    h = sign * required_delta(p, a, alternative) * np.sqrt((1.0 + 1.0 / r) / m)
    half = np.arcsin(np.sqrt(q0)) + h / 2.0
    bad = (half > np.pi / 2) | (half < 0.0)
    if np.any(bad):
        hb, nb, qb = np.broadcast_arrays(h, m, q0)
        side = "below 0" if alternative == "less" else "above 1"
        raise ParameterError(
            f"`n` = {float(nb[bad][0]):g} is too small: p0 = {float(qb[bad][0]):g} would need h = "
            f"{float(hb[bad][0]):.3g}, which puts p1 {side}; raise n or lower the power."
        )
    return c.finish(np.sin(half) ** 2, scalar)
