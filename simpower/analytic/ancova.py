"""Two-arm comparison adjusted for a baseline covariate (ANCOVA).

Borm, Fransen & Lemmens (2007, J Clin Epidemiol): adjusting for a covariate
correlated ``rho`` with the outcome leaves residual SD ``sd * sqrt(1 - rho**2)``;
the treatment effect is then tested with a two-sample t-test on
``n + ratio*n - 3`` df (one more lost to the slope). Power is exact for that
t-test (noncentral t); it ignores the small extra variance from estimating the
slope, as Borm et al. do.
"""

from __future__ import annotations

import numpy as np

from . import _common as c
from .ttest import family


def _check(rho, sd, alpha, alternative, ratio, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    corr = c.real("rho", rho, -1.0, 1.0, low_open=True, high_open=True)
    s = c.real("sd", sd, 0.0, low_open=True)
    return s * np.sqrt(1.0 - corr**2), family("two-sample", r, lost_extra=1.0), c.alpha_power(alpha, power)


def ancova_power(effect, n, *, rho, sd=1.0, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Power of the covariate-adjusted two-arm comparison.

    Parameters
    ----------
    effect : float or array_like
        Treatment minus control mean, in outcome units.
    n : float or array_like
        Control-arm size; df = n + ratio*n - 3 must be > 0.
    rho : float or array_like
        Outcome-covariate correlation in (-1, 1).
    sd : float or array_like
        Unadjusted outcome SD.
    alpha, alternative, ratio
        As in :func:`t_power`.

    Returns
    -------
    float or ndarray

    Examples
    --------
    A baseline correlated 0.5 with the outcome turns 64 per arm at d = 0.4
    (power about 0.61 unadjusted) into about 0.74:

    >>> from simpower.analytic import ancova_power, t_power
    >>> round(t_power(0.4, 64, design="two-sample"), 2), round(ancova_power(0.4, 64, rho=0.5), 2)
    (0.61, 0.74)
    """
    scalar = c.is_scalar(effect, n, rho, sd, alpha, ratio)
    s, fam, a = _check(rho, sd, alpha, alternative, ratio)
    e = c.real("effect", effect)
    m = fam.check_n(n)
    return c.finish(fam.power(e, m, s, a, alternative), scalar)


def ancova_n(effect, power, *, rho, sd=1.0, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Continuous control-arm size for the covariate-adjusted comparison.

    Close to the unadjusted t-test size times ``1 - rho**2`` (Borm et al. 2007),
    plus a fraction for the lost df.

    Parameters
    ----------
    effect : float or array_like
        On the side H1 names.
    power : float or array_like
        Target power in (alpha, 1).
    rho, sd, alpha, alternative, ratio
        As in :func:`ancova_power`.

    Returns
    -------
    float or ndarray

    Examples
    --------
    d = 0.5 needs 64 per arm unadjusted (Cohen 1988); with rho = 0.5 about
    0.75 * 64 = 48 per arm (49 after rounding up):

    >>> from simpower.analytic import ancova_n, ceil_n
    >>> ceil_n(ancova_n(0.5, 0.8, rho=0.5))
    49
    """
    scalar = c.is_scalar(effect, power, rho, sd, alpha, ratio)
    s, fam, (a, p) = _check(rho, sd, alpha, alternative, ratio, power)
    e = c.real("effect", effect)
    c.directed("effect", e, alternative)
    return c.finish(fam.n(e, p, s, a, alternative), scalar)


def ancova_effect(n, power, *, rho, sd=1.0, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Minimal detectable effect of the covariate-adjusted comparison.

    Parameters
    ----------
    n : float or array_like
        Control-arm size.
    power : float or array_like
        Target power in (alpha, 1).
    rho, sd, alpha, alternative, ratio
        As in :func:`ancova_power`.

    Returns
    -------
    float or ndarray
        Positive for "two-sided"/"greater", negative for "less".

    Examples
    --------
    >>> from simpower.analytic import ancova_effect
    >>> round(ancova_effect(64, 0.8, rho=0.5), 3)
    0.432
    """
    scalar = c.is_scalar(n, power, rho, sd, alpha, ratio)
    s, fam, (a, p) = _check(rho, sd, alpha, alternative, ratio, power)
    m = fam.check_n(n)
    return c.finish(fam.effect(m, p, s, a, alternative), scalar)
