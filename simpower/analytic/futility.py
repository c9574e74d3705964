"""Interim futility by predictive probability or conditional power, from a look's z and information fraction.

Notation of :mod:`.groupseq`: at information fraction ``t`` the z statistic is
``z``, the score ``B = z sqrt(t)`` is a Brownian motion with drift ``theta``
(``B(t) ~ N(theta t, t)``, ``Z_final = B(1)``), and the final analysis succeeds
when ``Z_final >= c`` (``c``: the final efficacy boundary). Success is judged at
the final analysis only (the usual definition; later interim chances are left
out, so the rule errs on the side of continuing less often than a full
calculation would).

* Conditional power (Lan, Simon & Halperin 1982, Commun Stat C 1:207-219; Lan &
  Wittes 1988, Biometrics 44:579-585): ``P(Z_final >= c | B(t), theta)``
  ``= Phi((z sqrt(t) + theta (1 - t) - c) / sqrt(1 - t))``; under the current
  trend ``theta = z / sqrt(t)`` it is ``Phi((z / sqrt(t) - c) / sqrt(1 - t))``.
* Predictive probability (Spiegelhalter, Freedman & Blackburn 1986, Control Clin
  Trials 7:8-17; Dmitrienko & Wang 2006, Stat Med 25:2178-2195): conditional
  power averaged over the posterior of ``theta``. With a normal prior
  ``theta ~ N(m, 1 / t0)`` (``t0``: the prior's worth as a fraction of the
  final information) the posterior is ``N((t0 m + B) / (t0 + t), 1 / (t0 + t))``
  and ``Z_final`` given the data is normal with mean
  ``B + (1 - t) (t0 m + B) / (t0 + t)`` and variance
  ``(1 - t) + (1 - t)^2 / (t0 + t)``. A flat prior (``t0 = 0``) gives
  ``Phi((z - c sqrt(t)) / sqrt(1 - t))``.

Both are increasing in ``z``, so "stop when the probability is at or below a
threshold" is "stop when ``z`` is at or below a z boundary" (:func:`futility_z`),
the form the group-sequential machinery uses.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from ..errors import ParameterError

RULES = ("predictive", "conditional")


def _fraction(t) -> np.ndarray:
    t = np.asarray(t, float)
    if np.any(~(t > 0.0)) or np.any(t >= 1.0):
        raise ParameterError("`fraction` must be in (0, 1) (an interim look); got "
                             f"{float(t.flat[np.argmax(~((t > 0) & (t < 1)))]):g}.")
    return t


def _prior(prior_mean, prior_information):
    if (prior_mean is None) != (prior_information is None):
        raise ParameterError("`prior_mean`, `prior_information`: give both (a normal prior on the drift) or "
                             "neither (a flat prior).")
    if prior_information is None:
        return 0.0, 0.0
    t0 = float(prior_information)
    if not (t0 > 0.0 and math.isfinite(t0)):
        raise ParameterError(f"`prior_information` must be > 0 (the prior's worth as a fraction of the final "
                             f"information); got {prior_information!r}.")
    m = float(prior_mean)
    if not math.isfinite(m):
        raise ParameterError(f"`prior_mean` must be a finite number (the prior mean of the drift); got {prior_mean!r}.")
    return m, t0


def _out(x):
    return float(x) if np.ndim(x) == 0 else x


def conditional_power(z, fraction, critical, drift=None):
    """``P(Z_final >= critical | z at fraction)`` under ``drift`` (None: the current trend ``z / sqrt(t)``).

    Examples
    --------
    Halfway, at z = 1, with final boundary 1.96: under the current trend the final z is expected at
    ``1 / sqrt(0.5) = 1.41``, so the chance of reaching 1.96 is ``Phi((1.414 - 1.96) / sqrt(0.5))``:

    >>> round(conditional_power(1.0, 0.5, 1.96), 4)
    0.2201
    """
    t = _fraction(fraction)
    z = np.asarray(z, float)
    theta = z / np.sqrt(t) if drift is None else float(drift)
    return _out(special.ndtr((z * np.sqrt(t) + theta * (1.0 - t) - critical) / np.sqrt(1.0 - t)))


def _predictive_parts(fraction, prior_mean, prior_information):
    """``Z_final | data ~ N(a z + b, s^2)``: the slope ``a``, intercept ``b`` and SD ``s`` (arrays of t)."""
    t = _fraction(fraction)
    m, t0 = _prior(prior_mean, prior_information)
    rt = np.sqrt(t)
    a = rt * (1.0 + t0) / (t0 + t)
    b = (1.0 - t) * t0 * m / (t0 + t)
    s = np.sqrt((1.0 - t) + (1.0 - t) ** 2 / (t0 + t))
    return a, b, s


def predictive_probability(z, fraction, critical, prior_mean=None, prior_information=None):
    """Bayesian predictive probability that the final analysis succeeds (``Z_final >= critical``).

    A flat prior on the drift by default; ``prior_mean`` and ``prior_information`` give a normal
    prior ``N(prior_mean, 1 / prior_information)`` on the drift (the expected final z).

    Examples
    --------
    Flat prior, halfway, z = 1, final boundary 1.96: ``Phi((1 - 1.96 sqrt(0.5)) / sqrt(0.5))``
    (Dmitrienko & Wang 2006); nearer 1/2 than the conditional power under the current trend (0.2201),
    as the drift's uncertainty is averaged over:

    >>> round(predictive_probability(1.0, 0.5, 1.96), 4)
    0.2926
    """
    a, b, s = _predictive_parts(fraction, prior_mean, prior_information)
    return _out(special.ndtr((a * np.asarray(z, float) + b - critical) / s))


def futility_z(rule, threshold, fraction, critical, prior_mean=None, prior_information=None, drift=None):
    """The z boundary of a futility rule: the probability is at or below ``threshold`` exactly when z is at or below it.

    ``rule`` is "predictive" (:func:`predictive_probability`) or "conditional"
    (:func:`conditional_power`; ``drift`` None: the current trend).
    """
    if rule not in RULES:
        raise ParameterError(f"`rule` must be one of {', '.join(repr(r) for r in RULES)}; got {rule!r}.")
    g = float(threshold)
    if not 0.0 < g < 1.0:
        raise ParameterError(f"`threshold` must be in (0, 1); got {threshold!r}.")
    q = special.ndtri(g)
    if rule == "predictive":
        a, b, s = _predictive_parts(fraction, prior_mean, prior_information)
        return _out((critical + q * s - b) / a)
    t = _fraction(fraction)
    rt, r1 = np.sqrt(t), np.sqrt(1.0 - t)
    if drift is None:  # z / sqrt(t) = c + q sqrt(1 - t)
        return _out(rt * (critical + q * r1))
    return _out((critical + q * r1 - float(drift) * (1.0 - t)) / rt)
