"""Log-rank test: events needed for a hazard ratio by Freedman's (1982) formula.

Freedman (1982, Statistics in Medicine 1:121-129) approximates the log-rank
statistic by treating the two risk sets as staying in the allocation ratio
``ratio`` (treatment : control) throughout. An event then falls in the
treatment arm with probability ``ratio * HR / (1 + ratio * HR)`` (``ratio / (1 + ratio)``
under H0), and with ``D`` events the standardised statistic has mean

    delta = sqrt(D * ratio) * (HR - 1) / (1 + ratio * HR)

and variance 1 (its null variance). Hence

    D = (z* + z_power)**2 * (1 + ratio * HR)**2 / (ratio * (1 - HR)**2),

which for 1:1 allocation is Freedman's ``(z* + z_power)**2 (1 + HR)**2 / (1 - HR)**2``.

**Against Schoenfeld (1981)** (:func:`schoenfeld_events`): with 1:1 allocation,
writing HR = exp(2u), Freedman's factor is ``coth(u)**2`` and Schoenfeld's
``1 / u**2``; since ``|coth u| > 1 / |u|`` for every u != 0, Freedman asks for
more events at every HR != 1 (about 8% more at HR = 0.5; the excess factor
tends to 1 as HR -> 1). With unequal allocation the order can flip: at
HR = 0.5 Freedman asks for 25% fewer events than Schoenfeld with ratio 3 (the
arm with the lower hazard three times as large), 6% fewer with ratio 1.5, yet
2% more with ratio 1.2 and 47% more with ratio 1/3. Hsieh (1992, Statistics in Medicine 11:1091-1098)
compared the two formulas by simulation under unequal allocation (reference
from memory).

As everywhere in :mod:`simpower.analytic`, two-sided power counts both
rejection tails and :func:`freedman_events` inverts :func:`freedman_power` exactly.
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


def freedman_events(hazard_ratio, power, *, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Number of events the log-rank test needs by Freedman's (1982) formula.

    Parameters
    ----------
    hazard_ratio : float or array_like
        Treatment-over-control hazard ratio, > 0. H1 for "greater" is HR > 1,
        for "less" HR < 1; "two-sided" needs HR != 1.
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
    HR = 0.5, two-sided alpha 0.05, power 0.8, 1:1:
    (1.96 + 0.8416)**2 * 1.5**2 / 0.5**2 = 70.6, i.e. 71 events (Schoenfeld: 66):

    >>> from simpower.analytic import freedman_events, ceil_n
    >>> d = freedman_events(0.5, 0.8)
    >>> round(d, 1), ceil_n(d)
    (70.6, 71)
    """
    scalar = c.is_scalar(hazard_ratio, power, alpha, ratio)
    hr, r, (a, p) = _check(hazard_ratio, alpha, alternative, ratio, power)
    c.directed("log(hazard_ratio)", np.log(hr), alternative)
    delta = required_delta(p, a, alternative)
    return c.finish(delta**2 * (1.0 + r * hr) ** 2 / (r * (1.0 - hr) ** 2), scalar)


def freedman_power(hazard_ratio, events, *, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Power of the log-rank test with ``events`` events by Freedman's (1982) approximation.

    Parameters
    ----------
    hazard_ratio : float or array_like
        Treatment-over-control hazard ratio, > 0.
    events : float or array_like
        Total number of events, > 0.
    alpha, alternative, ratio
        As in :func:`freedman_events`.

    Returns
    -------
    float or ndarray
        ``Phi(delta - z*) [+ Phi(-delta - z*)]`` with
        ``delta = sqrt(D ratio) (HR - 1) / (1 + ratio HR)``.

    Examples
    --------
    The 66 events that give Schoenfeld's 80% give Freedman's 77%:

    >>> from simpower.analytic import freedman_power
    >>> round(freedman_power(0.5, 66), 3)
    0.773
    """
    scalar = c.is_scalar(hazard_ratio, events, alpha, ratio)
    hr, r, a = _check(hazard_ratio, alpha, alternative, ratio)
    d = c.real("events", events, 0.0, low_open=True)
    delta = np.sqrt(d * r) * (hr - 1.0) / (1.0 + r * hr)
    return c.finish(standardized_power(delta, a, alternative), scalar)
