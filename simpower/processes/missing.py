"""Missing-outcome mechanisms: MCAR, MAR and MNAR (Rubin 1976), as nested ``missing`` components.

A mechanism's :meth:`mask` takes the complete outcomes ``y`` (shape
``(replicates, rows)`` or ``(rows,)``) and the observed covariates of the same
shape, and returns a boolean array, True where the outcome goes missing.

``rate`` is the proportion missing. For MCAR each outcome is missing with
probability ``rate``. For MAR and MNAR the log-odds of being missing are
``a + s * strength * z``, where ``z`` is the driver (a covariate, or the outcome
itself) standardised within the replicate, ``s`` is +1 (``direction =
"higher"``: high values go missing more often) or -1, and the intercept ``a``
is calibrated per replicate so that the mean missingness probability over the
replicate's rows equals ``rate`` exactly. The calibration is deterministic
(Newton steps kept inside a bisection bracket); only the final Bernoulli draws
use the random numbers, so the realised proportion varies around ``rate`` by
binomial error alone.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from .._validation import Anything, Choice, Real
from ..errors import ParameterError
from .base import Missingness

RATE = Real(0.0, 1.0, high_open=True)
STRENGTH = Real(0.0)
DIRECTION = Choice(("higher", "lower"))


def _as_2d(a) -> np.ndarray:
    a = np.asarray(a, dtype=float)
    return a.reshape(1, -1) if a.ndim == 1 else a.reshape(a.shape[0], -1)


def standardise_rows(x: np.ndarray) -> np.ndarray:
    """(x - row mean) / row SD over the finite entries of each row; 0 where the SD is 0 or x is missing."""
    x = _as_2d(x)
    ok = np.isfinite(x)
    cnt = np.maximum(ok.sum(axis=1, keepdims=True), 1)
    xf = np.where(ok, x, 0.0)
    m = xf.sum(axis=1, keepdims=True) / cnt
    d = np.where(ok, x - m, 0.0)
    sd = np.sqrt((d * d).sum(axis=1, keepdims=True) / cnt)
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.where(sd > 0, d / sd, 0.0)
    return z


def calibrate_intercept(slope_z: np.ndarray, rate: float, tol: float = 1e-12, max_iter: int = 100) -> np.ndarray:
    """Per-row intercepts ``a`` with mean(expit(a + slope_z), axis=1) = ``rate``.

    ``slope_z`` has shape (rows, columns). The mean probability increases in
    ``a``, and the root lies within logit(rate) +- max|slope_z| of each row, so
    Newton steps that leave the current bracket are replaced by bisection.
    Deterministic; vectorised over rows.
    """
    if not 0 < rate < 1:
        raise ParameterError(f"`rate` must be in (0, 1) to calibrate; got {rate}.")
    sz = _as_2d(slope_z)
    width = np.abs(sz).max(axis=1) + 1e-9
    centre = special.logit(rate)
    lo, hi = centre - width, centre + width
    a = np.full(sz.shape[0], centre)
    for _ in range(max_iter):
        p = special.expit(a[:, None] + sz)
        f = p.mean(axis=1) - rate
        if np.all(np.abs(f) < tol):
            break
        fp = (p * (1 - p)).mean(axis=1)
        lo = np.where(f < 0, a, lo)
        hi = np.where(f > 0, a, hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = a - f / fp
        inside = np.isfinite(step) & (step > lo) & (step < hi)
        a = np.where(np.abs(f) < tol, a, np.where(inside, step, 0.5 * (lo + hi)))
    return a


class MCAR(Missingness):
    """Missing completely at random: each outcome is missing with probability ``rate``.

    Parameters
    ----------
    rate : float in [0, 1)
        Probability that an outcome is missing (the expected proportion missing).
    """

    name = "mcar"
    params = {"rate": RATE}
    requires: tuple[str, ...] = ()

    def mask(self, rng, y, covariates=None):
        return rng.random(np.shape(y)) < self.rate

    def describe(self):
        return f"outcomes missing completely at random with probability {self.rate:g}"


class _Logistic(Missingness):
    """Logistic missingness on a standardised driver with a calibrated intercept."""

    requires: tuple[str, ...] = ()

    def probabilities(self, driver) -> np.ndarray:
        """Missingness probabilities, shape (replicates, rows); their row means equal ``rate``."""
        driver = _as_2d(driver)
        if self.rate == 0:
            return np.zeros_like(driver)
        sign = 1.0 if self.direction == "higher" else -1.0
        sz = sign * self.strength * standardise_rows(driver)
        a = calibrate_intercept(sz, self.rate)
        return special.expit(a[:, None] + sz)

    def _draw(self, rng, driver, shape):
        p = self.probabilities(driver)
        return (rng.random(p.shape) < p).reshape(shape)


class MAR(_Logistic):
    """Missing at random: the chance of a missing outcome depends on an observed covariate.

    logit P(missing) = a + s * strength * z, with z the covariate ``on``
    standardised within the replicate, s = +1 for ``direction = "higher"``
    (participants with higher values drop out more often) or -1, and ``a``
    calibrated so that the expected proportion missing in each replicate is
    ``rate``.

    Parameters
    ----------
    rate : float in [0, 1)
    on : str, default "baseline"
        The observed column the missingness depends on (``baseline``, or ``arm``
        for dropout that differs by arm).
    strength : float >= 0, default 1
        Log-odds ratio of missingness per SD of the covariate.
    direction : {"higher", "lower"}, default "higher"
    """

    name = "mar"
    params = {"rate": RATE, "on": Anything(), "strength": STRENGTH, "direction": DIRECTION}
    defaults = {"on": "baseline", "strength": 1.0, "direction": "higher"}

    def _check(self):
        if not isinstance(self.on, str) or not self.on:
            raise ParameterError(f"`on` must name an observed column (e.g. 'baseline'); got {self.on!r}.")

    @property
    def requires(self) -> tuple[str, ...]:
        return (self.on,)

    def mask(self, rng, y, covariates=None):
        covariates = covariates or {}
        if self.on not in covariates:
            raise ParameterError(f"`on` = {self.on!r} is not a column of this process; it offers "
                                 f"{sorted(covariates) or 'none'}.")
        x = np.broadcast_to(np.asarray(covariates[self.on], dtype=float), np.shape(y))
        return self._draw(rng, x, np.shape(y))

    def describe(self):
        return (f"outcomes missing at random depending on `{self.on}` (log-odds ratio {self.strength:g} per SD, "
                f"{self.direction} values missing more often), {self.rate:g} missing on average")


class MNAR(_Logistic):
    """Missing not at random: the chance of a missing outcome depends on the outcome itself.

    logit P(missing) = a + s * strength * z, with z the complete outcome
    standardised within the replicate (both arms pooled), s = +1 for
    ``direction = "higher"`` or -1, and ``a`` calibrated so that the expected
    proportion missing in each replicate is ``rate``. With ``"higher"`` the
    observed outcomes are biased downwards.

    Parameters
    ----------
    rate : float in [0, 1)
    strength : float >= 0, default 1
        Log-odds ratio of missingness per SD of the outcome.
    direction : {"higher", "lower"}, default "higher"
    """

    name = "mnar"
    params = {"rate": RATE, "strength": STRENGTH, "direction": DIRECTION}
    defaults = {"strength": 1.0, "direction": "higher"}

    def mask(self, rng, y, covariates=None):
        return self._draw(rng, y, np.shape(y))

    def describe(self):
        return (f"outcomes missing not at random: depending on the unobserved outcome itself (log-odds ratio "
                f"{self.strength:g} per SD, {self.direction} values missing more often), "
                f"{self.rate:g} missing on average")
