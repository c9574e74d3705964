"""z-test with a known SD: power, required n and minimal detectable effect.

The statistic is ``Z = effect_hat / SE`` with ``SE = sd * sqrt(g / n)``, where
``g = 1`` for one sample (or paired differences) and ``g = 1 + 1/ratio`` for
two independent arms (``n`` in the control arm, ``ratio * n`` in the other).
Under H1, ``Z ~ N(delta, 1)`` with ``delta = effect / SE``; power is the
probability of the rejection region, both tails for a two-sided test.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, special

from . import _common as c

DESIGNS = ("one-sample", "paired", "two-sample")


def variance_factor(design: str, ratio) -> np.ndarray:
    """``g`` such that Var(effect_hat) = sd**2 * g / n for the design."""
    if design == "two-sample":
        return 1.0 + 1.0 / np.asarray(ratio, dtype=float)
    return np.ones_like(np.asarray(ratio, dtype=float))


def z_critical(alpha=0.05, alternative="two-sided"):
    """Critical value of the standard normal used by the z-test.

    Parameters
    ----------
    alpha : float or array_like
        Significance level in (0, 1).
    alternative : {"two-sided", "greater", "less"}
        For "two-sided" the value is ``z_{1 - alpha/2}``, otherwise ``z_{1 - alpha}``
        (the test rejects for Z > z* with "greater", Z < -z* with "less").

    Returns
    -------
    float or ndarray
        The positive critical value z*.

    Examples
    --------
    The familiar one-sided 5% and 1% points, and the two-sided 5% point:

    >>> from simpower.analytic import z_critical
    >>> round(z_critical(0.05, "greater"), 3), round(z_critical(0.01, "greater"), 3)
    (1.645, 2.326)
    >>> round(z_critical(0.05), 2)
    1.96
    """
    scalar = c.is_scalar(alpha)
    a = c.alpha_power(alpha)
    c.choice("alternative", alternative, c.ALTERNATIVES)
    return c.finish(c.critical_z(a, alternative), scalar)


def standardized_power(delta, alpha, alternative):
    """Power of a test whose statistic is N(delta, 1) under H1 (no input checks)."""
    return c.normal_tails(delta, c.critical_z(alpha, alternative), alternative)


def _delta_two_sided(power: float, alpha: float) -> float:
    """delta > 0 with Phi(delta - z) + Phi(-delta - z) = power, z = z_{1-alpha/2}."""
    z = -special.ndtri(alpha / 2)
    one_tail = z - special.ndtri(1 - power)  # ignores the far tail: an upper bound
    f = lambda d: standardized_power(d, alpha, "two-sided") - power  # noqa: E731
    if f(one_tail) <= 0:  # far tail below floating resolution
        return float(one_tail)
    return optimize.brentq(f, 0.0, one_tail, xtol=c._XTOL, rtol=c._RTOL)


def required_delta(power, alpha, alternative):
    """Standardised shift ``delta >= 0`` at which the test has the given power.

    One-sided: ``z_{1-alpha} + z_{power}`` exactly. Two-sided: solved by root
    finding so that both rejection tails are counted.
    """
    power, alpha = np.broadcast_arrays(np.asarray(power, float), np.asarray(alpha, float))
    if alternative != "two-sided":
        return -special.ndtri(alpha) + special.ndtri(power)
    return c.each(_delta_two_sided, power, alpha)


def _check_common(sd, alpha, alternative, design, ratio, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    c.choice("design", design, DESIGNS)
    s = c.real("sd", sd, 0.0, low_open=True)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    return s, r, c.alpha_power(alpha, power)


def z_power(effect, n, *, sd=1.0, alpha=0.05, alternative="two-sided", design="one-sample", ratio=1.0):
    """Power of the z-test with known SD.

    Parameters
    ----------
    effect : float or array_like
        True mean (one-sample), mean difference (paired), or treatment minus
        control mean (two-sample), in outcome units.
    n : float or array_like
        Sample size (> 0): observations, pairs, or the control arm's size.
    sd : float or array_like
        Known SD of an observation (of a difference for "paired"); default 1,
        so that ``effect`` is Cohen's d.
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
        ``Phi(delta - z) + Phi(-delta - z)`` for two-sided tests (``z = z_{1-alpha/2}``),
        ``Phi(delta - z)`` / ``Phi(-delta - z)`` for "greater" / "less"
        (``z = z_{1-alpha}``), with ``delta = effect / (sd * sqrt(g / n))``.

    Examples
    --------
    A one-sided test at alpha = 0.05 of a 0.875-SD shift with 10 observations
    misses it with probability beta = 1 - power of about 0.131:

    >>> from simpower.analytic import z_power
    >>> round(1 - z_power(0.875, 10, alternative="greater"), 3)
    0.131

    With no effect the power is the type I error rate:

    >>> round(z_power(0.0, 50, alpha=0.05), 12)
    0.05
    """
    scalar = c.is_scalar(effect, n, sd, alpha, ratio)
    s, r, a = _check_common(sd, alpha, alternative, design, ratio)
    e = c.real("effect", effect)
    m = c.real("n", n, 0.0, low_open=True)
    delta = e / (s * np.sqrt(variance_factor(design, r) / m))
    return c.finish(standardized_power(delta, a, alternative), scalar)


def z_n(effect, power, *, sd=1.0, alpha=0.05, alternative="two-sided", design="one-sample", ratio=1.0):
    """Continuous sample size at which the z-test reaches ``power``.

    Solves ``z_power(effect, n) = power`` exactly: for one-sided tests
    ``n = g * ((z_{1-alpha} + z_{power}) * sd / effect)**2``; for two-sided
    tests the far rejection tail is counted too (root finding), which gives a
    slightly smaller n than the usual one-tail formula with ``z_{1-alpha/2}``.

    Parameters
    ----------
    effect : float or array_like
        Effect in outcome units; must be on the side H1 names (> 0 for
        "greater", < 0 for "less", non-zero for "two-sided").
    power : float or array_like
        Target power in (alpha, 1).
    sd, alpha, alternative, design, ratio
        As in :func:`z_power`.

    Returns
    -------
    float or ndarray
        Continuous n (control-arm size for two-sample); round up with
        :func:`ceil_n`.

    Examples
    --------
    Two arms, d = 0.5, two-sided alpha 0.05, power 0.8: the one-tail formula
    2 * (1.96 + 0.8416)**2 / 0.25 = 62.8, i.e. 63 per arm:

    >>> from simpower.analytic import z_n, ceil_n
    >>> n = z_n(0.5, 0.8, design="two-sample")
    >>> round(n, 2), ceil_n(n)
    (62.79, 63)
    """
    scalar = c.is_scalar(effect, power, sd, alpha, ratio)
    s, r, (a, p) = _check_common(sd, alpha, alternative, design, ratio, power)
    e = c.real("effect", effect)
    c.directed("effect", e, alternative)
    delta = required_delta(p, a, alternative)
    return c.finish(variance_factor(design, r) * (delta * s / e) ** 2, scalar)


def z_effect(n, power, *, sd=1.0, alpha=0.05, alternative="two-sided", design="one-sample", ratio=1.0):
    """Minimal detectable effect of the z-test: the effect with the given power.

    Parameters
    ----------
    n : float or array_like
        Sample size (> 0), as in :func:`z_power`.
    power : float or array_like
        Target power in (alpha, 1).
    sd, alpha, alternative, design, ratio
        As in :func:`z_power`.

    Returns
    -------
    float or ndarray
        ``delta * sd * sqrt(g / n)``: positive for "two-sided" and "greater",
        negative for "less".

    Examples
    --------
    With 100 per arm, a two-sided 5% test has 80% power for d of about 0.40:

    >>> from simpower.analytic import z_effect
    >>> round(z_effect(100, 0.8, design="two-sample"), 3)
    0.396
    """
    scalar = c.is_scalar(n, power, sd, alpha, ratio)
    s, r, (a, p) = _check_common(sd, alpha, alternative, design, ratio, power)
    m = c.real("n", n, 0.0, low_open=True)
    sign = -1.0 if alternative == "less" else 1.0
    delta = required_delta(p, a, alternative)
    return c.finish(sign * delta * s * np.sqrt(variance_factor(design, r) / m), scalar)
