"""Log-rank test: events needed for a hazard ratio (Schoenfeld 1981, Biometrika).

With allocation ``ratio`` (treatment : control) and ``D`` events in total, the
log-rank statistic is approximately ``N(log(HR) * sqrt(D * ratio) / (1 + ratio), 1)``
under proportional hazards. So for a one-sided test

    D = (z_{1-alpha} + z_{power})**2 * (1 + ratio)**2 / ratio / log(HR)**2,

and with ``z_{1-alpha/2}`` for a two-sided test, the familiar formula. As
everywhere in :mod:`simpower.analytic`, two-sided power counts both rejection
tails (power at HR = 1 is alpha) and :func:`schoenfeld_events` inverts that
power exactly, which is below the one-tail formula by a negligible amount
except at very low power.
"""

from __future__ import annotations

import numpy as np

from . import _common as c
from .normal import required_delta, standardized_power


def _check(hazard_ratio, alpha, alternative, ratio, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    hr = c.real("hazard_ratio", hazard_ratio, 0.0, low_open=True)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    return hr, r, c.alpha_power(alpha, power)


def schoenfeld_events(hazard_ratio, power, *, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Number of events the log-rank test needs to detect ``hazard_ratio``.

    Parameters
    ----------
    hazard_ratio : float or array_like
        Treatment-over-control hazard ratio, > 0. H1 for "greater" is HR > 1,
        for "less" HR < 1 (treatment lowers the hazard); "two-sided" needs HR != 1.
    power : float or array_like
        Target power in (alpha, 1).
    alpha : float or array_like
        Significance level.
    alternative : {"two-sided", "greater", "less"}
    ratio : float or array_like
        Allocation ratio, treatment : control.

    Returns
    -------
    float or ndarray
        Continuous number of events (both arms together); round up with :func:`ceil_n`.

    Examples
    --------
    HR = 0.5, two-sided alpha 0.05, power 0.8, 1:1 allocation:
    4 * (1.96 + 0.8416)**2 / log(0.5)**2 = 65.3, i.e. 66 events (Schoenfeld 1981):

    >>> from simpower.analytic import schoenfeld_events, ceil_n
    >>> d = schoenfeld_events(0.5, 0.8)
    >>> round(d, 1), ceil_n(d)
    (65.3, 66)
    """
    scalar = c.is_scalar(hazard_ratio, power, alpha, ratio)
    hr, r, (a, p) = _check(hazard_ratio, alpha, alternative, ratio, power)
    log_hr = np.log(hr)
    c.directed("log(hazard_ratio)", log_hr, alternative)
    delta = required_delta(p, a, alternative)
    return c.finish(delta**2 * (1.0 + r) ** 2 / r / log_hr**2, scalar)


def schoenfeld_power(hazard_ratio, events, *, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Power of the log-rank test with ``events`` events (inverse of :func:`schoenfeld_events`).

    Parameters
    ----------
    hazard_ratio : float or array_like
        Treatment-over-control hazard ratio, > 0.
    events : float or array_like
        Total number of events, > 0.
    alpha, alternative, ratio
        As in :func:`schoenfeld_events`.

    Returns
    -------
    float or ndarray
        ``Phi(delta - z) [+ Phi(-delta - z)]`` with ``delta = log(HR) * sqrt(D * ratio) / (1 + ratio)``.

    Examples
    --------
    >>> from simpower.analytic import schoenfeld_power
    >>> round(schoenfeld_power(0.5, 66), 3)
    0.804
    """
    scalar = c.is_scalar(hazard_ratio, events, alpha, ratio)
    hr, r, a = _check(hazard_ratio, alpha, alternative, ratio)
    d = c.real("events", events, 0.0, low_open=True)
    delta = np.log(hr) * np.sqrt(d * r) / (1.0 + r)
    return c.finish(standardized_power(delta, a, alternative), scalar)
