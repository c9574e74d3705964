"""The AB/BA crossover: exact power and required size of the period-difference t-test and of the BE TOST.

In a two-period, two-sequence crossover (sequence AB: treatment A in period 1, B in
period 2; sequence BA the other way round) each subject's period difference
``d_i = y_i2 - y_i1`` removes the subject's own level. With ``pi`` the period effect
and ``tau`` = B minus A, ``E d = pi + tau`` in sequence AB and ``pi - tau`` in BA, so

    tau_hat = (mean d_AB - mean d_BA) / 2,
    Var(tau_hat) = sd_within**2 / 2 * (1 / n_AB + 1 / n_BA),

with ``sd_within`` the SD of the within-subject error (``Var d_i = 2 sd_within**2``), and
the pooled variance of the differences within sequences has ``n_AB + n_BA - 2`` df
(Senn 2002, *Cross-over Trials in Clinical Research*, 2nd ed., ch. 3; Jones & Kenward
2003, *Design and Analysis of Cross-Over Trials*, 2nd ed., ch. 2). The test is therefore
Student's two-sample t-test on the halved differences: its power is the noncentral t
of :func:`simpower.analytic.t_power` (design "two-sample", SD ``sd_within / sqrt(2)``,
``n = n_AB``, ``ratio = n_BA / n_AB``), exact for normal outcomes.

Bioequivalence (average BE on the log scale): the outcome is lognormal, the effect is
the ratio of geometric means B / A (``gmr``), the within-subject CV ``cv_within`` gives
``sd_within = sqrt(log(1 + cv_within**2))`` on the log scale (common practice), and
the two one-sided tests at level alpha against the margins ``low``, ``high`` (ratios,
default 0.80 and 1.25) are the 90% CI rule for alpha = 0.05 (Schuirmann 1987). Its
power is the exact TOST integral of :func:`simpower.analytic.tost_power` with the same
variance and df (Phillips 1990; Diletti, Hauschke & Steinijans 1991).

A first-order carryover ``lambda`` (of B, minus that of A, into period 2) shifts
``E d`` in sequence BA by ``lambda``, so ``E tau_hat = tau - lambda / 2`` (Grizzle 1965;
Jones & Kenward 2003, ch. 2): pass ``effect - carryover / 2`` for the power under it.
"""

from __future__ import annotations

import numpy as np

from ..errors import ParameterError
from . import _common as c
from .equivalence import tost_power
from .ttest import t_n, t_power

_HALF = np.sqrt(0.5)


def sigma_from_cv(cv):
    """SD of the log outcome from a lognormal CV: ``sqrt(log(1 + cv**2))`` (common practice)."""
    v = c.real("cv_within", cv, 0.0, low_open=True)
    return np.sqrt(np.log1p(v * v))


def _ratio_sizes(ratio):
    return c.real("ratio", ratio, 0.0, low_open=True)


def _total(n, ratio, total: bool):
    return n * (1.0 + ratio) if total else n


def crossover_power(effect, n, *, sd_within=1.0, alpha=0.05, alternative="two-sided", ratio=1.0):
    """Exact power of the period-difference t-test of an AB/BA crossover.

    Parameters
    ----------
    effect : float or array_like
        Treatment B minus A, in outcome units (on the log scale: the log ratio).
    n : float or array_like
        Subjects in sequence AB; sequence BA has ``ratio * n``. df = n + ratio n - 2 > 0.
    sd_within : float or array_like
        SD of the within-subject error (a period difference has SD ``sqrt(2) sd_within``).
    alpha : float or array_like
    alternative : {"two-sided", "greater", "less"}
        H1: B - A != 0, > 0, < 0.
    ratio : float or array_like
        Subjects in BA over subjects in AB.

    Returns
    -------
    float or ndarray
        Noncentral-t power with ``nc = effect / (sd_within sqrt((1/n + 1/(ratio n)) / 2))``.

    Examples
    --------
    12 subjects per sequence, a difference of one within-subject SD:

    >>> from simpower.analytic.crossover import crossover_power
    >>> round(crossover_power(1.0, 12), 3)
    0.911
    """
    scalar = c.is_scalar(effect, n, sd_within, alpha, ratio)
    s = c.real("sd_within", sd_within, 0.0, low_open=True)
    r = _ratio_sizes(ratio)
    return c.finish(t_power(effect, n, sd=s * _HALF, alpha=alpha, alternative=alternative, design="two-sample",
                            ratio=r), scalar)


def crossover_n(effect, power, *, sd_within=1.0, alpha=0.05, alternative="two-sided", ratio=1.0, total=False):
    """Continuous size at which the period-difference t-test reaches ``power``.

    Returns the subjects in sequence AB (``total=True``: in both sequences,
    ``n (1 + ratio)``). Round up per sequence with :func:`simpower.analytic.ceil_n`.

    Examples
    --------
    >>> from simpower.analytic import ceil_n
    >>> from simpower.analytic.crossover import crossover_n
    >>> ceil_n(crossover_n(1.0, 0.9)), ceil_n(crossover_n(1.0, 0.9, total=True))
    (12, 24)
    """
    scalar = c.is_scalar(effect, power, sd_within, alpha, ratio)
    s = c.real("sd_within", sd_within, 0.0, low_open=True)
    r = _ratio_sizes(ratio)
    n = t_n(effect, power, sd=s * _HALF, alpha=alpha, alternative=alternative, design="two-sample", ratio=r)
    return c.finish(_total(n, r, c.flag("total", total)), scalar)


def _be_args(gmr, cv_within, low, high):
    g = c.real("gmr", gmr, 0.0, low_open=True)
    lo = c.real("low", low, 0.0, low_open=True)
    hi = c.real("high", high, 0.0, low_open=True)
    bad = np.broadcast_to(lo >= hi, np.broadcast(lo, hi).shape)
    if np.any(bad):
        raise ParameterError(f"`low` must be < `high` (margins as ratios, e.g. 0.80 and 1.25); got low = "
                             f"{float(np.broadcast_to(lo, bad.shape)[bad][0]):g}, high = "
                             f"{float(np.broadcast_to(hi, bad.shape)[bad][0]):g}.")
    return np.log(g), sigma_from_cv(cv_within), np.log(lo), np.log(hi)


def crossover_tost_power(gmr, n, *, cv_within, low=0.80, high=1.25, alpha=0.05, ratio=1.0):
    """Exact power of average bioequivalence (TOST on the log scale) in an AB/BA crossover.

    Parameters
    ----------
    gmr : float or array_like
        True ratio of geometric means B / A (test over reference).
    n : float or array_like
        Subjects in sequence AB; BA has ``ratio * n``.
    cv_within : float or array_like
        Within-subject CV; ``sd_within = sqrt(log(1 + cv_within**2))`` on the log scale.
    low, high : float or array_like
        The acceptance range as ratios (default 0.80 to 1.25).
    alpha : float or array_like
        Level of each one-sided test (0.05: the 90% CI inside the range).
    ratio : float or array_like

    Returns
    -------
    float or ndarray
        :func:`simpower.analytic.tost_power` with effect ``log gmr``, range ``(log low, log high)``,
        SD ``sd_within / sqrt(2)``, design "two-sample".

    Examples
    --------
    CV 20%, ratio 0.95, 10 subjects per sequence (20 in all):

    >>> from simpower.analytic.crossover import crossover_tost_power
    >>> round(crossover_tost_power(0.95, 10, cv_within=0.20), 4)
    0.8347
    """
    scalar = c.is_scalar(gmr, n, cv_within, low, high, alpha, ratio)
    e, s, lo, hi = _be_args(gmr, cv_within, low, high)
    r = _ratio_sizes(ratio)
    return c.finish(tost_power(e, n, low=lo, high=hi, sd=s * _HALF, alpha=alpha, design="two-sample", ratio=r),
                    scalar)


def crossover_tost_n(gmr, power, *, cv_within, low=0.80, high=1.25, alpha=0.05, ratio=1.0, total=False):
    """Continuous size at which the BE TOST of an AB/BA crossover reaches ``power``.

    The TOST power rises with n for a ``gmr`` inside ``(low, high)``; the root is found by
    Brent's method from n = 2 per sequence. Returns the subjects in sequence AB
    (``total=True``: in both). Round up per sequence (:func:`simpower.analytic.ceil_n`);
    tables of bioequivalence sizes list the total of equal sequences, ``2 ceil(n)``.

    Raises
    ------
    ParameterError
        When ``gmr`` lies outside the range (no size reaches a power above alpha), or 2 per
        sequence already exceed ``power``.

    Examples
    --------
    >>> from simpower.analytic import ceil_n
    >>> from simpower.analytic.crossover import crossover_tost_n
    >>> 2 * ceil_n(crossover_tost_n(0.95, 0.8, cv_within=0.20))
    20
    """
    scalar = c.is_scalar(gmr, power, cv_within, low, high, alpha, ratio)
    e, s, lo, hi = _be_args(gmr, cv_within, low, high)
    a, p = c.alpha_power(alpha, power)
    r = _ratio_sizes(ratio)
    outside = np.broadcast_to((e <= lo) | (e >= hi), np.broadcast(e, lo, hi).shape)
    if np.any(outside):
        raise ParameterError("`gmr` must lie inside the acceptance range (low, high): outside it no size "
                             "gives a power above alpha.")

    def one(e1, s1, lo1, hi1, a1, p1, r1):
        f = lambda m: tost_power(e1, m, low=lo1, high=hi1, sd=s1 * _HALF, alpha=a1,  # noqa: E731
                                 design="two-sample", ratio=r1)
        start = 2.0
        if f(start) >= p1:
            raise ParameterError(f"`power` = {p1:g} is already exceeded with 2 subjects per sequence; "
                                 "ask for more power.")
        return c.root_increasing(f, p1, start, 2.0 * start + 8.0)

    n = c.each(one, e, s, lo, hi, a, p, r)
    return c.finish(_total(n, r, c.flag("total", total)), scalar)
