"""Bayesian posterior-probability decision rules: posterior probabilities, exact operating characteristics, calibration.

A rule declares success when ``P(theta > threshold | data) > eta`` (or ``<``
for ``direction = "less"``), ``theta`` the treatment-minus-control difference.

* **Normal model** (two arms, known SD): the difference in means is
  ``d ~ N(theta, se^2)``, ``se = sd sqrt(1/n0 + 1/n1)``; with the prior
  ``theta ~ N(m, s^2)`` the posterior is normal with precision
  ``1/s^2 + 1/se^2`` (the conjugate update; Spiegelhalter, Abrams & Myles 2004,
  ch. 3). The rule is then ``d > c`` for a critical value ``c``, so its power at
  ``theta`` is exactly ``1 - Phi((c - theta) / se)`` (:func:`normal_rule_power`).
  ``prior_sd = inf`` is the flat prior: the rule with ``eta = 1 - alpha`` and
  threshold 0 is then the one-sided z-test at level alpha (a known identity).
* **Beta-binomial model** (two arms, 0/1 outcomes): independent
  ``Beta(a, b)`` priors on each arm's probability; the posterior probability
  ``P(p1 - p0 > threshold | x0, x1)`` is computed by Gauss-Legendre quadrature
  over the quantiles of ``p0``'s posterior; the rule's exact probability of
  success sums the binomial probabilities of every outcome table where it
  succeeds (:func:`beta_binomial_rule_power`).

:func:`calibrate_eta` finds the ``eta`` whose type I error (at the null
boundary ``theta = threshold``) is at most a target: in closed form for the
normal model, by bisection over the exact step function for the
beta-binomial one.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special, stats

from ._common import choice, real

DIRECTIONS = ("greater", "less")
#: Gauss-Legendre nodes for the beta-binomial posterior probability
NODES = 96
#: posterior mass of p0 left out on each side of the integration window
TAIL = 1e-13


def normal_posterior(d, se, prior_mean: float = 0.0, prior_sd: float = math.inf):
    """(posterior mean, posterior SD) of theta given the difference ``d`` with standard error ``se``."""
    d = np.asarray(d, float)
    se = np.asarray(se, float)
    if math.isinf(prior_sd):
        return d, se
    prec = 1.0 / prior_sd**2 + 1.0 / se**2
    return (prior_mean / prior_sd**2 + d / se**2) / prec, np.sqrt(1.0 / prec)


def normal_critical(se: float, threshold: float = 0.0, eta: float = 0.975, prior_mean: float = 0.0,
                    prior_sd: float = math.inf, direction: str = "greater") -> float:
    """The difference ``c`` beyond which the normal rule declares success (d > c for 'greater', d < c for 'less')."""
    se = float(real("se", se, 0.0, low_open=True))
    eta = float(real("eta", eta, 0.0, 1.0, low_open=True, high_open=True))
    direction = choice("direction", direction, DIRECTIONS)
    z = stats.norm.ppf(eta)
    if math.isinf(prior_sd):
        return threshold + z * se if direction == "greater" else threshold - z * se
    prec = 1.0 / prior_sd**2 + 1.0 / se**2
    v = 1.0 / prec
    # posterior mean = v (m / s^2 + d / se^2); success when (mean - threshold) / sqrt(v) > z (greater)
    sign = 1.0 if direction == "greater" else -1.0
    return se * se * ((threshold + sign * z * math.sqrt(v)) / v - prior_mean / prior_sd**2)


def normal_rule_power(theta, n0: float, n1: float | None = None, *, sd: float = 1.0, threshold: float = 0.0,
                      eta: float = 0.975, prior_mean: float = 0.0, prior_sd: float = math.inf,
                      direction: str = "greater"):
    """Exact probability that the normal rule declares success when the true difference is ``theta`` (known SD).

    Examples
    --------
    A flat prior, threshold 0 and eta = 0.975 is the one-sided z-test at 0.025 (common practice):

    >>> from simpower.analytic import z_power
    >>> round(normal_rule_power(0.5, 64, sd=1.0, eta=0.975), 6) == round(
    ...     z_power(0.5, 64, alpha=0.025, alternative="greater", design="two-sample"), 6)
    True
    """
    n1 = n0 if n1 is None else n1
    se = float(sd) * math.sqrt(1.0 / n0 + 1.0 / n1)
    c = normal_critical(se, threshold, eta, prior_mean, prior_sd, direction)
    theta = np.asarray(theta, float)
    out = stats.norm.sf((c - theta) / se) if direction == "greater" else stats.norm.cdf((c - theta) / se)
    return float(out) if out.ndim == 0 else out


def beta_difference_probability(a0, b0, a1, b1, threshold: float = 0.0, direction: str = "greater") -> np.ndarray:
    """P(p1 - p0 > threshold) (or < for 'less') for independent p0 ~ Beta(a0, b0), p1 ~ Beta(a1, b1), elementwise.

    Gauss-Legendre quadrature (:data:`NODES` nodes) of ``f0(p) (1 - F1(p + threshold))`` over the p
    where ``p + threshold`` lies in (0, 1), cut to p0's posterior window (all but :data:`TAIL` of its
    mass on each side), plus ``F0(-threshold)`` for a negative threshold (there the difference exceeds
    it surely). Posterior shapes below 1 (a Jeffreys prior and no events) make f0 unbounded at 0 or 1
    and the quadrature less accurate there.
    """
    a0, b0, a1, b1 = (np.asarray(v, float) for v in (a0, b0, a1, b1))
    shape = np.broadcast(a0, b0, a1, b1).shape
    a0, b0, a1, b1 = (np.broadcast_to(v, shape)[..., None] for v in (a0, b0, a1, b1))
    # p1 - p0 > t needs p0 + t < 1; for p0 < -t (t < 0) it holds surely. Integrate f0(p) (1 - F1(p + t)) over
    # the part in between, cut to where p0's posterior has all but 1e-13 of its mass on each side: a smooth
    # integrand on a window a few posterior SDs wide
    lo, hi = max(0.0, -threshold), min(1.0, 1.0 - threshold)
    p_lo = np.maximum(lo, special.betaincinv(a0, b0, TAIL))
    p_hi = np.minimum(hi, special.betaincinv(a0, b0, 1.0 - TAIL))
    x, w = np.polynomial.legendre.leggauss(NODES)
    width = np.maximum(p_hi - p_lo, 0.0)
    p = p_lo + width * 0.5 * (x + 1.0)
    with np.errstate(all="ignore"):
        log_f0 = (a0 - 1) * np.log(p) + (b0 - 1) * np.log1p(-p) - special.betaln(a0, b0)
        f0 = np.where((p > 0) & (p < 1), np.exp(log_f0), 0.0)
    above = 1.0 - special.betainc(a1, b1, np.clip(p + threshold, 0.0, 1.0))
    prob = special.betainc(a0, b0, lo)[..., 0] + 0.5 * width[..., 0] * np.sum(w * f0 * above, axis=-1)
    prob = np.clip(prob, 0.0, 1.0)
    return prob if direction == "greater" else 1.0 - prob


def beta_binomial_rule_power(p0: float, p1: float, n0: int, n1: int | None = None, *, threshold: float = 0.0,
                             eta: float = 0.975, prior0=(1.0, 1.0), prior1=(1.0, 1.0),
                             direction: str = "greater") -> float:
    """Exact probability that the beta-binomial rule declares success, summing over all outcome tables."""
    n1 = n0 if n1 is None else n1
    ok = _success_table(int(n0), int(n1), threshold, eta, prior0, prior1, direction)
    f0 = stats.binom.pmf(np.arange(n0 + 1), n0, p0)
    f1 = stats.binom.pmf(np.arange(n1 + 1), n1, p1)
    return float(f0 @ ok.astype(float) @ f1)


def _posterior_table(n0, n1, threshold, prior0, prior1, direction):
    x0 = np.arange(n0 + 1)[:, None]
    x1 = np.arange(n1 + 1)[None, :]
    return beta_difference_probability(prior0[0] + x0, prior0[1] + n0 - x0, prior1[0] + x1, prior1[1] + n1 - x1,
                                       threshold, direction)


def _success_table(n0, n1, threshold, eta, prior0, prior1, direction):
    return _posterior_table(n0, n1, threshold, prior0, prior1, direction) > eta


def calibrate_eta(alpha: float, *, model: str = "normal", n0: int, n1: int | None = None, sd: float = 1.0,
                  threshold: float = 0.0, prior_mean: float = 0.0, prior_sd: float = math.inf,
                  prior0=(1.0, 1.0), prior1=(1.0, 1.0), null_p: float | None = None,
                  direction: str = "greater") -> float:
    """The ``eta`` whose type I error at the null boundary (theta = threshold) is at most ``alpha``.

    Normal model: exact (the critical value that gives alpha, turned back into
    eta). Beta-binomial model: the smallest eta on the exact step function of
    the type I error, at the common probability ``null_p`` of both arms (with
    threshold 0; required), found by bisection on the posterior probabilities
    of the outcome tables.
    """
    alpha = float(real("alpha", alpha, 0.0, 0.5, low_open=True, high_open=True))
    n1 = n0 if n1 is None else n1
    direction = choice("direction", direction, DIRECTIONS)
    if model == "normal":
        se = float(sd) * math.sqrt(1.0 / n0 + 1.0 / n1)
        sign = 1.0 if direction == "greater" else -1.0
        c = threshold + sign * stats.norm.ppf(1 - alpha) * se
        mean, psd = normal_posterior(c, se, prior_mean, prior_sd)
        return float(stats.norm.cdf(sign * (float(mean) - threshold) / float(psd)))
    if model != "beta_binomial":
        raise ValueError(f"`model` must be 'normal' or 'beta_binomial'; got {model!r}")
    if null_p is None:
        raise ValueError("`null_p` (the common event probability under H0) is required for the beta-binomial model")
    post = _posterior_table(int(n0), int(n1), threshold, prior0, prior1, direction)
    f = np.outer(stats.binom.pmf(np.arange(n0 + 1), n0, null_p), stats.binom.pmf(np.arange(n1 + 1), n1, null_p))
    # the type I error at eta is the mass of tables with posterior > eta: choose eta at a table's posterior value
    order = np.argsort(-post, axis=None)
    cum = np.cumsum(f.ravel()[order])
    k = int(np.searchsorted(cum, alpha, side="right"))  # the first k tables (largest posteriors) fit under alpha
    flat = post.ravel()[order]
    if k == 0:
        return float(flat[0])  # success needs a posterior above the largest one: no table succeeds
    if k >= flat.size:
        return 0.0
    return float(flat[k])  # tables with a posterior above the (k+1)-th largest: the first k (fewer with ties)
