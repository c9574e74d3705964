"""Two independent proportions, normal approximation: power, required n, detectable p1.

Control arm: ``n`` observations with success probability ``p0``; treatment arm:
``ratio * n`` with ``p1``. Let ``D = p1 - p0``, ``pbar = (p0 + ratio*p1) / (1 + ratio)``,

    A = sqrt(pbar * (1 - pbar) * (1 + 1/ratio))      (SE * sqrt(n) under H0, pooled)
    B = sqrt(p0*(1 - p0) + p1*(1 - p1) / ratio)        (SE * sqrt(n) under H1, unpooled)

The test rejects when ``D_hat - cc > z * A / sqrt(n)`` ("greater"; mirrored for
"less", either for "two-sided"), ``cc = (1 + 1/ratio) / (2n)`` with the
continuity correction and 0 without. With ``D_hat ~ N(D, B**2 / n)``:

    power = Phi((D*sqrt(n) - cc*sqrt(n) - z*A) / B)  [+ the far tail if two-sided]

For one-sided tests this inverts to Fleiss, Levin & Paik (2003, eq. 4.14 and
its unequal-allocation form) without correction, and, with it, exactly to the
Fleiss, Tytun & Ury (1980) formula in its unequal-allocation form,
``n_cc = n/4 * (1 + sqrt(1 + 2*(ratio + 1) / (ratio * n * |D|)))**2``.
Two-sided sizes also count the far tail (root finding); the difference from the
one-tail formulas is negligible except at very low power.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, special

from ..errors import ParameterError
from . import _common as c


def _a_b(p0, p1, ratio):
    pbar = (p0 + ratio * p1) / (1.0 + ratio)
    a = np.sqrt(pbar * (1.0 - pbar) * (1.0 + 1.0 / ratio))
    b = np.sqrt(p0 * (1.0 - p0) + p1 * (1.0 - p1) / ratio)
    return a, b


def _power(p0, p1, n, ratio, alpha, alternative, continuity):
    a, b = _a_b(p0, p1, ratio)
    root_n = np.sqrt(n)
    cc = (1.0 + 1.0 / ratio) / (2.0 * n) if continuity else 0.0
    crit = c.critical_z(alpha, alternative) * a / root_n
    return c.normal_tails(p1 - p0, crit, alternative, scale=b / root_n, offset=cc)


def _one_tail_n(p0, p1, power, ratio, alpha_one_tail, continuity):
    """Closed form: FLP (2003) eq. 4.14 form, then Fleiss-Tytun-Ury (1980) if corrected."""
    a, b = _a_b(p0, p1, ratio)
    d = abs(p1 - p0)
    n = ((-special.ndtri(alpha_one_tail) * a + special.ndtri(power) * b) / d) ** 2
    if continuity:
        n = n / 4.0 * (1.0 + np.sqrt(1.0 + 2.0 * (ratio + 1.0) / (ratio * n * d))) ** 2
    return n


def _check(ratio, alpha, alternative, continuity, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    c.flag("continuity", continuity)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    return r, c.alpha_power(alpha, power)


def _prob(name, value):
    return c.real(name, value, 0.0, 1.0, low_open=True, high_open=True)


def prop2_power(p0, p1, n, *, ratio=1.0, alpha=0.05, alternative="two-sided", continuity=False):
    """Power of the two-sample z-test for proportions (pooled SE under H0).

    Parameters
    ----------
    p0, p1 : float or array_like
        Success probabilities in the control and treatment arms, in (0, 1).
    n : float or array_like
        Control-arm size (> 0); the treatment arm has ``ratio * n``.
    ratio : float or array_like
        Treatment-arm size over control-arm size.
    alpha : float or array_like
        Significance level.
    alternative : {"two-sided", "greater", "less"}
        H1: p1 != p0, p1 > p0, p1 < p0.
    continuity : bool
        Apply the continuity correction (Fleiss 1981), which makes the test
        conservative: with it, power at ``p1 == p0`` is below alpha.

    Returns
    -------
    float or ndarray
        Normal-approximation power (both tails for "two-sided").

    Examples
    --------
    0.6 versus 0.8 with 82 per arm: just over 80% power without correction,
    just under with it (the corrected test needs 91 per arm):

    >>> from simpower.analytic import prop2_power
    >>> round(prop2_power(0.6, 0.8, 82), 3), round(prop2_power(0.6, 0.8, 82, continuity=True), 3)
    (0.804, 0.752)
    """
    scalar = c.is_scalar(p0, p1, n, ratio, alpha)
    r, a = _check(ratio, alpha, alternative, continuity)
    q0, q1 = _prob("p0", p0), _prob("p1", p1)
    m = c.real("n", n, 0.0, low_open=True)
    return c.finish(_power(q0, q1, m, r, a, alternative, continuity), scalar)


def prop2_n(p0, p1, power, *, ratio=1.0, alpha=0.05, alternative="two-sided", continuity=False):
    """Continuous control-arm size at which :func:`prop2_power` reaches ``power``.

    One-sided: the closed forms of the module docstring (FLP 2003 eq. 4.14,
    Fleiss-Tytun-Ury 1980 when ``continuity=True``), which invert the power
    exactly. Two-sided: root finding on the power including the far tail,
    bracketed by the same formulas with ``alpha/2``.

    Parameters
    ----------
    p0, p1 : float or array_like
        Control and treatment probabilities; ``p1 - p0`` on the side H1 names.
    power : float or array_like
        Target power in (alpha, 1).
    ratio, alpha, alternative, continuity
        As in :func:`prop2_power`.

    Returns
    -------
    float or ndarray
        Continuous control-arm n; round up with :func:`ceil_n`.

    Examples
    --------
    0.6 versus 0.8, two-sided alpha 0.05, power 0.8: 81.2, i.e. 82 per arm;
    90.9, i.e. 91 per arm with the continuity correction:

    >>> from simpower.analytic import prop2_n, ceil_n
    >>> ceil_n(prop2_n(0.6, 0.8, 0.8)), ceil_n(prop2_n(0.6, 0.8, 0.8, continuity=True))
    (82, 91)
    """
    scalar = c.is_scalar(p0, p1, power, ratio, alpha)
    r, (a, p) = _check(ratio, alpha, alternative, continuity, power)
    q0, q1 = _prob("p0", p0), _prob("p1", p1)
    c.directed("p1 - p0", q1 - q0, alternative)
    if alternative != "two-sided":
        return c.finish(_one_tail_n(q0, q1, p, r, a, continuity), scalar)

    def one(q0_, q1_, p_, r_, a_):
        hi = float(_one_tail_n(q0_, q1_, p_, r_, a_ / 2.0, continuity))
        f = lambda m: float(_power(q0_, q1_, m, r_, a_, "two-sided", continuity))  # noqa: E731
        lo = hi * 1e-12
        if f(lo) >= p_:
            raise ParameterError(
                f"`power` = {p_:g} is reached by any n for p0 = {q0_:g}, p1 = {q1_:g}, ratio = {r_:g} "
                f"(the pooled and unpooled SEs differ too much); ask for more power."
            )
        return c.root_increasing(f, p_, lo, hi)

    return c.finish(c.each(one, q0, q1, p, r, a), scalar)


def prop2_effect(p0, n, power, *, ratio=1.0, alpha=0.05, alternative="two-sided", continuity=False):
    """Treatment-arm probability ``p1`` detectable with the given power.

    Parameters
    ----------
    p0 : float or array_like
        Control-arm probability in (0, 1).
    n : float or array_like
        Control-arm size.
    power : float or array_like
        Target power in (alpha, 1).
    ratio, alpha, alternative, continuity
        As in :func:`prop2_power`.

    Returns
    -------
    float or ndarray
        ``p1 > p0`` for "two-sided" and "greater", ``p1 < p0`` for "less".

    Raises
    ------
    ParameterError
        If no ``p1`` on that side reaches the power with this ``n``.

    Examples
    --------
    With 82 per arm and p0 = 0.6 the detectable p1 is just under 0.8:

    >>> from simpower.analytic import prop2_effect
    >>> round(prop2_effect(0.6, 82, 0.8), 3)
    0.799
    """
    scalar = c.is_scalar(p0, n, power, ratio, alpha)
    r, (a, p) = _check(ratio, alpha, alternative, continuity, power)
    q0 = _prob("p0", p0)
    m = c.real("n", n, 0.0, low_open=True)
    edge = 1e-12

    def one(q0_, m_, p_, r_, a_):
        end = edge if alternative == "less" else 1.0 - edge
        f = lambda q1: float(_power(q0_, q1, m_, r_, a_, alternative, continuity)) - p_  # noqa: E731
        if f(end) < 0:
            side = "below" if alternative == "less" else "above"
            raise ParameterError(
                f"`n` = {m_:g} is too small: no p1 {side} p0 = {q0_:g} reaches power {p_:g}."
            )
        return optimize.brentq(f, q0_, end, xtol=c._XTOL, rtol=c._RTOL)

    return c.finish(c.each(one, q0, m, p, r, a), scalar)
