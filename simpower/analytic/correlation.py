"""Pearson correlation: power and sample size through Fisher's z transform.

For ``n`` pairs from a bivariate normal with correlation ``r``,
``atanh(r_hat)`` is approximately ``N(atanh(r), 1 / (n - 3))`` (Fisher 1921,
Metron 1:3-32). The test of H0: correlation = ``r0`` is therefore a z-test of
the shift

    delta = (atanh(r) - atanh(r0)) * sqrt(n - 3),

so ``power = Phi(delta - z*) [+ Phi(-delta - z*)]`` and, one-sided,
``n = 3 + ((z_{1-alpha} + z_power) / (atanh(r) - atanh(r0)))**2``; two-sided
sizes count the far tail (exact root). Cohen (1988, ch. 3) tabulates the same
approximation for r0 = 0: Table 3.4.1 has n = 783 for r = 0.1 and 85 for
r = 0.3 at two-sided alpha 0.05 and power 0.8 (values from memory; also in
Cohen 1992, Psychological Bulletin 112:155-159, Table 2). For r0 = 0 the exact
test is the t-test of ``r_hat sqrt(n - 2) / sqrt(1 - r_hat**2)``
(``scipy.stats.pearsonr``); the Fisher-z power approximates its power closely
for n above about 20. Fisher's transform ignores the small bias
``r / (2 (n - 1))`` of ``atanh(r_hat)``.
"""

from __future__ import annotations

import numpy as np

from ..errors import ParameterError
from . import _common as c
from .normal import required_delta, standardized_power


def _corr(name, value):
    return c.real(name, value, -1.0, 1.0, low_open=True, high_open=True)


def _check(r0, alpha, alternative, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    return _corr("r0", r0), c.alpha_power(alpha, power)


def corr_power(n, r, *, r0=0.0, alpha=0.05, alternative="two-sided"):
    """Power of the Fisher-z test of a Pearson correlation.

    Parameters
    ----------
    n : float or array_like
        Number of pairs, > 3.
    r : float or array_like
        True correlation in (-1, 1).
    r0 : float or array_like
        Correlation under H0 (default 0), in (-1, 1).
    alpha : float or array_like
        Significance level.
    alternative : {"two-sided", "greater", "less"}
        H1: r != r0, r > r0, r < r0.

    Returns
    -------
    float or ndarray
        ``Phi(delta - z*) [+ Phi(-delta - z*)]``, ``delta = (atanh r - atanh r0) sqrt(n - 3)``.

    Examples
    --------
    85 pairs give 80% power for r = 0.3 at two-sided 5% (Cohen 1988, Table 3.4.1):

    >>> from simpower.analytic import corr_power
    >>> round(corr_power(85, 0.3), 3)
    0.8
    """
    scalar = c.is_scalar(n, r, r0, alpha)
    q0, a = _check(r0, alpha, alternative)
    q = _corr("r", r)
    m = c.real("n", n, 3.0, low_open=True)
    delta = (np.arctanh(q) - np.arctanh(q0)) * np.sqrt(m - 3.0)
    return c.finish(standardized_power(delta, a, alternative), scalar)


def corr_n(r, power, *, r0=0.0, alpha=0.05, alternative="two-sided"):
    """Continuous number of pairs at which :func:`corr_power` reaches ``power``.

    ``3 + (delta* / (atanh r - atanh r0))**2``, ``delta* = z_{1-alpha} + z_power``
    one-sided, the exact two-tailed root otherwise.

    Parameters
    ----------
    r : float or array_like
        True correlation, on the side of ``r0`` that H1 names.
    power : float or array_like
        Target power in (alpha, 1).
    r0, alpha, alternative
        As in :func:`corr_power`.

    Returns
    -------
    float or ndarray
        Continuous n; round up with :func:`ceil_n`.

    Examples
    --------
    >>> from simpower.analytic import corr_n, ceil_n
    >>> ceil_n(corr_n(0.1, 0.8)), ceil_n(corr_n(0.3, 0.8))
    (783, 85)
    """
    scalar = c.is_scalar(r, power, r0, alpha)
    q0, (a, pw) = _check(r0, alpha, alternative, power)
    q = _corr("r", r)
    shift = np.arctanh(q) - np.arctanh(q0)
    c.directed("atanh(r) - atanh(r0)", shift, alternative)
    delta = required_delta(pw, a, alternative)
    return c.finish(3.0 + (delta / shift) ** 2, scalar)


def corr_effect(n, power, *, r0=0.0, alpha=0.05, alternative="two-sided"):
    """Correlation detectable with the given power: ``tanh(atanh r0 +- delta* / sqrt(n - 3))``.

    Parameters
    ----------
    n : float or array_like
        Number of pairs, > 3.
    power : float or array_like
        Target power in (alpha, 1).
    r0, alpha, alternative
        As in :func:`corr_power`.

    Returns
    -------
    float or ndarray
        Above ``r0`` for "two-sided" and "greater", below for "less".

    Examples
    --------
    >>> from simpower.analytic import corr_effect
    >>> round(corr_effect(85, 0.8), 3)
    0.3
    """
    scalar = c.is_scalar(n, power, r0, alpha)
    q0, (a, pw) = _check(r0, alpha, alternative, power)
    m = c.real("n", n, 3.0, low_open=True)
    sign = -1.0 if alternative == "less" else 1.0
    out = np.tanh(np.arctanh(q0) + sign * required_delta(pw, a, alternative) / np.sqrt(m - 3.0))
    bad = np.abs(out) >= 1.0  # tanh rounds to +-1 when n is barely above 3
    if np.any(bad):
        mb, _ = np.broadcast_arrays(m, out)
        raise ParameterError(
            f"`n` = {float(mb[bad][0]):g} is too small: the detectable correlation rounds to +-1; raise n."
        )
    return c.finish(out, scalar)
