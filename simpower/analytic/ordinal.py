"""Ordered categorical outcomes: Whitehead's (1993) sample size for the proportional-odds model.

Whitehead (1993, Statistics in Medicine 12:2257-2271, eq. 12 in our reading;
from memory) gives the total size of a two-arm trial comparing an ordinal
outcome of K categories by the proportional-odds model (McCullagh 1980) as

    N = 3 (A + 1)^2 (z* + z_power)^2 / (A (log OR)^2 (1 - sum_k pbar_k^3)),

with A the allocation ratio (treatment : control), OR the common odds ratio of
a higher category (treated over control) and ``pbar_k`` the anticipated
proportion in category k averaged over both arms (here weighted by the arm
sizes: ``(p0_k + A p1_k) / (1 + A)``). It comes from the efficient score for
log OR at OR = 1, whose variance is ``N A / (A + 1)^2 (1 - sum pbar^3) / 3``
(the tie-corrected variance of the Mann-Whitney statistic, in the limit): a
large-sample approximation, good for log OR of moderate size.

As everywhere in :mod:`simpower.analytic`, ``n`` is the control arm (so
``N = n (1 + ratio)``), ``ratio`` = n1 / n0, two-sided power counts both
tails, and :func:`whitehead_n` inverts :func:`whitehead_power` exactly.

Two categories: ``1 - p^3 - q^3 = 3 p q`` when ``p + q = 1``, so the formula
is then exactly ``N = (A + 1)^2 (z* + z_power)^2 / (A (log OR)^2 pbar qbar)``,
the sample size of the test of a log odds ratio with its variance at the
pooled risk (tested).
"""

from __future__ import annotations

import numpy as np

from ..errors import ParameterError
from . import _common as c
from .normal import required_delta, standardized_power


def _categories(name: str, value) -> np.ndarray:
    arr = c.real(name, value, 0.0, 1.0)
    if arr.ndim != 1 or arr.size < 2:
        raise ParameterError(f"`{name}` must list K >= 2 category probabilities (lowest first); got {value!r}.")
    total = float(arr.sum())
    if abs(total - 1.0) > 1e-6:
        raise ParameterError(f"`{name}` must sum to 1; its entries sum to {total:.6g}.")
    return arr / total


def po_shift(p0, odds_ratio) -> np.ndarray:
    """Treated-arm probabilities under proportional odds: ``logit P(Y1 <= k) = logit P(Y0 <= k) - log OR``.

    Parameters
    ----------
    p0 : list of K floats
        Control-arm category probabilities, lowest category first (sum 1).
    odds_ratio : float > 0
        Odds of a higher category, treated over control (> 1: treated higher).

    Examples
    --------
    >>> from simpower.analytic import po_shift
    >>> [round(float(v), 4) for v in po_shift([0.5, 0.5], 3.0)]
    [0.25, 0.75]
    """
    p = _categories("p0", p0)
    orr = float(c.real("odds_ratio", odds_ratio, 0.0, low_open=True))
    cum = np.cumsum(p)[:-1]
    odds = cum / (1.0 - cum) / orr
    return np.diff(np.concatenate([[0.0], odds / (1.0 + odds), [1.0]]))


def whitehead_factor(p0, odds_ratio, *, p1=None, ratio=1.0) -> float:
    """``1 - sum_k pbar_k^3``, with ``pbar = (p0 + ratio p1) / (1 + ratio)``, ``p1`` from :func:`po_shift` if not given."""
    p = _categories("p0", p0)
    q = po_shift(p, odds_ratio) if p1 is None else _categories("p1", p1)
    if q.size != p.size:
        raise ParameterError(f"`p1` must have one probability per category of `p0` ({p.size}); got {q.size}.")
    r = float(c.real("ratio", ratio, 0.0, low_open=True))
    pbar = (p + r * q) / (1.0 + r)
    return float(1.0 - np.sum(pbar**3))


def _check(odds_ratio, alpha, alternative, ratio, power=None):
    c.choice("alternative", alternative, c.ALTERNATIVES)
    orr = c.real("odds_ratio", odds_ratio, 0.0, low_open=True)
    r = c.real("ratio", ratio, 0.0, low_open=True)
    return orr, r, c.alpha_power(alpha, power)


def whitehead_power(p0, odds_ratio, n, *, p1=None, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Power of the proportional-odds comparison of two arms by Whitehead's (1993) formula.

    Parameters
    ----------
    p0 : list of K floats
        Control-arm category probabilities (lowest first, sum 1).
    odds_ratio : float > 0, or array_like
        Common odds ratio of a higher category, treated over control.
        "greater" tests OR > 1 (treated higher).
    n : float or array_like
        Control-arm size; the treatment arm has ``ratio * n``.
    p1 : list of K floats, optional
        Treated-arm probabilities for ``pbar``; default: the proportional-odds
        shift of ``p0`` by ``odds_ratio`` (:func:`po_shift`).
    ratio, alpha, alternative
        As elsewhere in :mod:`simpower.analytic`.

    Returns
    -------
    float or ndarray
        ``Phi(delta - z*) [+ Phi(-delta - z*)]`` with
        ``delta = log(OR) sqrt(n ratio (1 - sum pbar^3) / (3 (1 + ratio)))``.

    Examples
    --------
    Four equally likely categories, OR = 2, 1:1, two-sided 0.05:

    >>> from simpower.analytic import whitehead_n, whitehead_power
    >>> n = whitehead_n([0.25] * 4, 2.0, 0.8)
    >>> round(n, 1), round(whitehead_power([0.25] * 4, 2.0, n), 3)
    (105.4, 0.8)
    """
    scalar = c.is_scalar(odds_ratio, n, alpha, ratio)
    orr, r, a = _check(odds_ratio, alpha, alternative, ratio)
    nn = c.real("n", n, 0.0, low_open=True)
    s = c.each(lambda o, rr: whitehead_factor(p0, o, p1=p1, ratio=rr), orr, r)
    delta = np.log(orr) * np.sqrt(nn * r * s / (3.0 * (1.0 + r)))
    return c.finish(standardized_power(delta, a, alternative), scalar)


def whitehead_n(p0, odds_ratio, power, *, p1=None, ratio=1.0, alpha=0.05, alternative="two-sided"):
    """Control-arm size for the proportional-odds comparison by Whitehead's (1993) formula.

    One-sided: ``n = 3 (1 + ratio) (z_{1-alpha} + z_power)^2 / (ratio (log OR)^2 (1 - sum pbar^3))``
    (Whitehead's total N divided by ``1 + ratio``); two-sided: the exact inverse of
    :func:`whitehead_power` (both tails). Continuous; round up with :func:`ceil_n`.
    """
    scalar = c.is_scalar(odds_ratio, power, alpha, ratio)
    orr, r, (a, p) = _check(odds_ratio, alpha, alternative, ratio, power)
    log_or = np.log(orr)
    c.directed("log(odds_ratio)", log_or, alternative)
    s = c.each(lambda o, rr: whitehead_factor(p0, o, p1=p1, ratio=rr), orr, r)
    delta = required_delta(p, a, alternative)
    return c.finish(3.0 * (1.0 + r) * delta**2 / (r * log_or**2 * s), scalar)


__all__ = ["po_shift", "whitehead_factor", "whitehead_power", "whitehead_n"]
