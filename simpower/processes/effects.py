"""The effect layer of a continuous outcome, and the baseline covariate's Gaussian copula.

Shared by ``trial`` (:mod:`simpower.processes.composed`) and ``multi_arm``
(:mod:`simpower.processes.arms`): how an effect (``effect_type`` "shift",
"d" or "ratio") and an SD factor change the draws of one arm, the checks
between an outcome and the effect type, and the calibration of a baseline
covariate joined to the outcome by a Gaussian copula.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from scipy import optimize

from .._validation import Choice, Real
from ..errors import ParameterError
from .base import check_missing_columns
from .outcomes import Normal

POSITIVE = Real(0.0, low_open=True)
EFFECT_TYPE = Choice(("shift", "ratio", "d"))
CORR = Real(-1.0, 1.0, low_open=True, high_open=True, optional=True)

_NODES, _TERMS = 120, 60


# -- the baseline covariate: a Gaussian copula with a calibrated latent correlation ---------

def copula_series(outcome) -> tuple[np.ndarray, float]:
    """Hermite coefficients of the outcome's normal-scores transform g(z) = F^{-1}(Phi(z)).

    Returns (c, v): with Z1, Z2 standard bivariate normal with correlation r,
    Cov(g(Z1), g(Z2)) = sum_k c[k-1] r^k (Mehler's formula; c_k = E[g(Z) He_k(Z)]^2 / k!)
    and v = Var g(Z). Computed by Gauss-Hermite quadrature on 120 nodes, 60 terms.
    """
    x, w = hermegauss(_NODES)
    w = w / w.sum()
    g = np.asarray(outcome.from_normal(x), dtype=float)
    bad = ~np.isfinite(g)
    if bad.any():  # quantiles that overflow far out in the tails, where the weights are negligible
        if np.any(w[bad] > 1e-30):
            return np.full(_TERMS, np.nan), math.nan
        g, w = np.where(bad, 0.0, g), np.where(bad, 0.0, w)
        w = w / w.sum()
    m = w @ g
    v = float(w @ (g - m) ** 2)
    h_prev, h = np.ones_like(x), x.copy()
    c = np.empty(_TERMS)
    for k in range(1, _TERMS + 1):
        c[k - 1] = (w @ (g * h)) ** 2
        h_prev, h = h, (x * h - math.sqrt(k) * h_prev) / math.sqrt(k + 1)
    return c, v


def copula_correlation(outcome, latent: float) -> float:
    """Pearson correlation of g(Z1) and g(Z2) when Z1, Z2 are normal with correlation ``latent``."""
    c, v = copula_series(outcome)
    k = np.arange(1, c.size + 1)
    return float(np.sum(c * latent**k) / v)


def latent_correlation(outcome, rho: float, field: str = "baseline_corr") -> float:
    """The normal-scores correlation that gives Pearson correlation ``rho`` between baseline and outcome.

    Exact (= ``rho``) for a normal outcome; otherwise the root of the Mehler
    series (:func:`copula_series`) in [-1, 1]. A ``rho`` outside the reachable
    range [corr at -1, corr at +1] is a ParameterError naming ``field``.
    """
    if rho == 0:
        return 0.0
    if isinstance(outcome, Normal):
        return rho
    if not hasattr(outcome, "from_normal"):
        raise ParameterError(f"`{field}` needs an outcome with a quantile function (from_normal); "
                             f"{type(outcome).__name__} has none.")
    try:
        sd = float(outcome.sd)
    except ParameterError as exc:
        raise ParameterError(f"`{field}` needs an outcome with a finite SD: {exc}") from None
    if not math.isfinite(sd):
        raise ParameterError(f"`{field}` needs an outcome with a finite SD.")
    c, v = copula_series(outcome)
    if not (np.all(np.isfinite(c)) and math.isfinite(v) and v > 0):
        raise ParameterError(f"`{field}` cannot be set for this outcome: its quantiles or SD are not finite "
                             "(a baseline correlation needs a finite SD).")
    k = np.arange(1, c.size + 1)

    def pearson(r):
        return float(np.sum(c * r**k) / v)

    low, high = pearson(-1.0), pearson(1.0)
    if not (low < rho < high) and not math.isclose(rho, high, abs_tol=1e-9):
        raise ParameterError(f"`{field}` = {rho:g} cannot be reached with this outcome through a Gaussian copula; "
                             f"the reachable Pearson correlations are ({low:.3f}, {high:.3f}).")
    if rho >= high:
        return 1.0
    return float(optimize.brentq(lambda r: pearson(r) - rho, -1.0, 1.0, xtol=1e-13))


# -- shared pieces --------------------------------------------------------------------------

def _effect_values(x, outcome, effect, effect_type, sd_factor):
    """Apply an effect and an SD factor to draws ``x`` of ``outcome`` (one arm)."""
    centre = outcome.center if hasattr(outcome, "center") else outcome.mean
    if effect_type == "ratio":
        y, m = x * effect, centre * effect
    else:
        shift = effect * outcome.sd if effect_type == "d" else effect
        y, m = x + shift, centre + shift
    if sd_factor != 1:
        y = m + sd_factor * (y - m)
    return y


def _check_outcome_for(outcome, effect_type, needs_centre: bool):
    """Cross-field checks between an outcome and the effect type / SD changes."""
    try:
        _outcome_rules(outcome, effect_type, needs_centre)
    except ParameterError as exc:
        msg = str(exc)
        if msg.startswith("`") and not msg.startswith("`effect"):
            msg = "`outcome." + msg[1:]
        raise ParameterError(msg) from None


def _outcome_rules(outcome, effect_type, needs_centre):
    if effect_type == "ratio":
        low = getattr(outcome, "lower_bound", -math.inf)
        if not low >= 0:
            raise ParameterError(
                f"`effect_type` = 'ratio' needs an outcome that cannot be negative; {outcome.describe()} can "
                f"(lower bound {low:g}): use 'shift' or 'd', or a positive outcome such as lognormal or gamma.")
        if not outcome.mean > 0:
            raise ParameterError(f"`effect_type` = 'ratio' needs an outcome with a positive mean; got {outcome.mean:g}.")
    if effect_type == "d":
        outcome.sd  # noqa: B018 - raises a ParameterError when the SD does not exist
    if needs_centre:
        outcome.center if hasattr(outcome, "center") else outcome.mean  # noqa: B018


def _check_missing(missing, available, owner):
    needs_baseline = "baseline" in getattr(missing, "requires", ()) and "baseline" not in available
    hint = "; set `baseline_corr` to add a baseline column" if needs_baseline else ""
    check_missing_columns(missing, available, owner, hint)


def _describe_effect(effect, effect_type, outcome):
    if effect_type == "shift":
        return f"treatment adds {effect:g} to the outcome"
    if effect_type == "d":
        return f"treatment adds {effect:g} SD ({effect * outcome.sd:.4g}) to the outcome"
    return f"treatment multiplies the outcome by {effect:g}"
