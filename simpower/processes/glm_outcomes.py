"""Outcome layers with a linear predictor for the composed ``trial``: ``binary`` (logit) and ``count`` (log).

A layer is the ``outcome`` of a :class:`~simpower.processes.composed.Trial`
(kind ``glm_outcome``). It carries its own effect, and draws each outcome
from a linear predictor

    eta = beta0 + beta1 * arm + sigma_b * u_c,    u_c ~ N(0, 1) per cluster,

with ``sigma_b = 0`` under the ``arms`` design (independent participants).
Under the ``clusters`` design ``sigma_b`` follows from the design's ``icc``
on the scale the layer's ``icc_scale`` names:

* ``binary``, ``icc_scale = "latent"``: icc = sigma_b^2 / (sigma_b^2 + pi^2/3)
  (the ICC of the latent logistic variable; Snijders & Bosker 2012, ch. 17);
* ``binary``, ``icc_scale = "proportion"``: icc = the correlation of two 0/1
  outcomes of the same control-arm cluster, Var(p_c) / (p0 (1 - p0)) with
  p_c = expit(beta0 + sigma_b u_c); sigma_b is solved numerically, the
  moments by Gauss-Hermite quadrature;
* ``count``, ``icc_scale = "count"``: icc = the correlation of two counts of
  the same control-arm cluster with exposure ``exposure``: with mean
  mu = rate0 * exposure, A = exp(sigma_b^2) and k the dispersion (k = inf for
  Poisson), icc = mu (A - 1) / (1 + mu ((1 + 1/k) A - 1)), solved for A in
  closed form.

``p0`` and ``rate0`` are the *marginal* (population-averaged) control-arm
risk and rate: beta0 is set so that E[expit(beta0 + sigma_b u)] = p0, or
E[exp(beta0 + sigma_b u)] = rate0 (beta0 = log(rate0) - sigma_b^2 / 2).

``effect_scale`` says which effect is given. ``"conditional"`` (default):
beta1 is the cluster-specific effect (for ``binary`` the log of
``odds_ratio``; a risk ratio or difference is not constant across clusters
under a logit model, so it needs ``"marginal"`` when sigma_b > 0).
``"marginal"``: the treated arm's population-averaged risk is
``risk_from_effect(p0, ...)`` as in ``binary_two_arm`` and beta1 is solved
so that E[expit(beta0 + beta1 + sigma_b u)] equals it. The layer computes the
true value of the other scale by the same quadrature. For the log link the
two coincide exactly: E[exp(beta0 + beta1 + s u)] / E[exp(beta0 + s u)] = exp(beta1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from scipy import optimize
from scipy.special import expit, logit

from .._validation import Choice, Real
from ..components import Component
from ..errors import ParameterError
from .risks import OneBinaryEffect

POSITIVE = Real(0.0, low_open=True)
PROBABILITY = Real(0.0, 1.0, low_open=True, high_open=True)
EFFECT_SCALE = Choice(("conditional", "marginal"))
#: Zeger, Liang & Albert (1988): the logistic-normal attenuation constant c = 16 sqrt(3) / (15 pi)
ZLA_C = 16.0 * math.sqrt(3.0) / (15.0 * math.pi)
#: the largest cluster SD on the logit scale the quadrature is trusted for
SIGMA_MAX = 8.0

_X, _W = hermegauss(100)
_W = _W / _W.sum()


# -- logistic-normal integrals (Gauss-Hermite, 100 nodes) ---------------------------------------
def marginal_risk(beta: float, sigma: float) -> float:
    """E[expit(beta + sigma Z)], Z standard normal: the population-averaged risk."""
    if sigma == 0:
        return float(expit(beta))
    return float(_W @ expit(beta + sigma * _X))


def risk_moments(beta: float, sigma: float) -> tuple[float, float]:
    """E[p] and E[p^2] of p = expit(beta + sigma Z)."""
    p = expit(beta + sigma * _X)
    return float(_W @ p), float(_W @ (p * p))


def intercept_for(risk: float, sigma: float) -> float:
    """The beta with E[expit(beta + sigma Z)] = ``risk`` (the function increases in beta)."""
    start = float(logit(risk))
    if sigma == 0:
        return start
    width = 2.0 + abs(start) * (1.0 + sigma)
    lo, hi = start - width, start + width
    while marginal_risk(lo, sigma) > risk:
        lo -= width
    while marginal_risk(hi, sigma) < risk:
        hi += width
    return float(optimize.brentq(lambda b: marginal_risk(b, sigma) - risk, lo, hi, xtol=1e-14, rtol=1e-14))


def proportion_icc(sigma: float, p0: float) -> float:
    """ICC of the 0/1 outcomes of one cluster when the marginal risk is ``p0``: Var(p_c) / (p0 (1 - p0))."""
    if sigma == 0:
        return 0.0
    m1, m2 = risk_moments(intercept_for(p0, sigma), sigma)
    return (m2 - m1 * m1) / (m1 * (1.0 - m1))


def sigma_for_proportion_icc(icc: float, p0: float) -> float:
    """The logit-scale cluster SD whose control-arm 0/1 outcomes have ICC ``icc`` (root of :func:`proportion_icc`)."""
    if icc == 0:
        return 0.0
    top = proportion_icc(SIGMA_MAX, p0)
    if icc >= top:
        raise ParameterError(f"`design.icc` = {icc:g} on the proportion scale needs a logit-scale cluster SD above "
                             f"{SIGMA_MAX:g} with p0 = {p0:g} (the largest ICC reachable is {top:.3f}); lower icc.")
    return float(optimize.brentq(lambda s: proportion_icc(s, p0) - icc, 1e-9, SIGMA_MAX, xtol=1e-13, rtol=1e-13))


def latent_sigma(icc: float) -> float:
    """The logit-scale cluster SD with latent ICC sigma^2 / (sigma^2 + pi^2 / 3) equal to ``icc``."""
    return math.sqrt(icc / (1.0 - icc) * math.pi**2 / 3.0)


def zla_marginal(beta_conditional: float, sigma: float) -> float:
    """Zeger, Liang & Albert (1988) approximation: beta_M ~ beta_C / sqrt(1 + c^2 sigma^2)."""
    return beta_conditional / math.sqrt(1.0 + ZLA_C**2 * sigma**2)


@dataclass(frozen=True)
class Linear:
    """The solved linear predictor of a layer: eta = beta0 + beta1 * arm + sigma * u.

    ``mean0`` and ``mean1`` are the marginal (population-averaged) control
    and treatment means (risks or rates per unit exposure).
    """

    beta0: float
    beta1: float
    sigma: float
    mean0: float
    mean1: float


class GLMOutcome(Component):
    """Base class of the outcome layers with a linear predictor (kind ``glm_outcome``)."""

    kind = "glm_outcome"
    #: the layer's columns a MAR mechanism may use (besides the design's)
    columns: frozenset[str] = frozenset()

    @property
    def effect_param(self) -> str:
        raise NotImplementedError

    def null_value(self) -> float:
        return 1.0

    def sigma_for(self, icc: float) -> float:
        """The cluster SD on the linear-predictor scale for the design's ``icc`` (on :attr:`icc_scale`)."""
        raise NotImplementedError

    def solve(self, sigma: float) -> Linear:
        """beta0, beta1 and the marginal means for cluster SD ``sigma``; ParameterError if impossible."""
        raise NotImplementedError

    def draw(self, rng, lin: Linear, arm, u_rows, size: int, width: int):
        """Outcomes (size, width), extra shared / per-replicate columns and covariates for missingness.

        A layer whose outcome columns are not ``y`` (``time_to_event``) returns None for the outcomes."""
        raise NotImplementedError

    #: whether ``trial``'s ``missing`` applies (False for censored outcomes)
    takes_missing: bool = True

    def label_for(self, lin: Linear) -> str | None:
        """The estimand label for this linear predictor (a layer whose label depends on the clustering overrides it)."""
        return self.estimand_label

    def facts_for(self, lin: Linear, design):
        """The layer's facts for ``design`` (a tuple), or None to let ``trial`` state them."""
        return None


class BinaryOutcome(OneBinaryEffect, GLMOutcome):
    """A binary outcome (1 = event) with a logit link.

    Parameters
    ----------
    p0 : float in (0, 1)
        Marginal (population-averaged) event risk in the control arm.
    odds_ratio, risk_ratio, risk_difference : float
        The treatment effect; give exactly one (as ``binary_two_arm``).
    effect_scale : {"conditional", "marginal"}
        Whether the effect is cluster-specific (default; then an odds ratio
        when clusters vary) or population-averaged.
    icc_scale : {"latent", "proportion"}
        The scale of the design's ``icc`` (see the module).
    estimand : {"risk_difference", "log_risk_ratio", "log_odds_ratio", "conditional_log_odds_ratio"}
        What ``true_effect()`` returns: the first three are marginal
        (population-averaged), as ``two_proportions``, ``cluster_means_t``,
        ``gee`` and ``logistic`` estimate them; the last is beta1.
    """

    name = "binary"
    params = {"p0": PROBABILITY, "odds_ratio": Real(0.0, low_open=True, optional=True),
              "risk_ratio": Real(0.0, low_open=True, optional=True),
              "risk_difference": Real(-1.0, 1.0, low_open=True, high_open=True, optional=True),
              "effect_scale": EFFECT_SCALE, "icc_scale": Choice(("latent", "proportion")),
              "estimand": Choice(("risk_difference", "log_risk_ratio", "log_odds_ratio",
                                  "conditional_log_odds_ratio"))}
    defaults = {"odds_ratio": None, "risk_ratio": None, "risk_difference": None, "effect_scale": "conditional",
                "icc_scale": "latent", "estimand": "risk_difference"}

    def _check(self):
        self._check_effect()

    def sigma_for(self, icc: float) -> float:
        return latent_sigma(icc) if self.icc_scale == "latent" else sigma_for_proportion_icc(icc, self.p0)

    def solve(self, sigma: float) -> Linear:
        p0 = self.p0
        if sigma == 0:
            p1 = self.nominal_p1
            return Linear(float(logit(p0)), float(logit(p1) - logit(p0)), 0.0, p0, p1)
        if sigma > SIGMA_MAX:
            raise ParameterError(f"`design.icc` gives a logit-scale cluster SD of {sigma:.3g} (> {SIGMA_MAX:g}); "
                                 "lower icc.")
        b0 = intercept_for(p0, sigma)
        if self.effect_scale == "marginal":
            p1 = self.nominal_p1
            return Linear(b0, intercept_for(p1, sigma) - b0, sigma, p0, p1)
        if self._p["odds_ratio"] is None:
            raise ParameterError(f"`outcome.effect_scale` = 'conditional' needs `outcome.odds_ratio` when clusters "
                                 f"vary (a cluster-specific {self.effect_param.replace('_', ' ')} is not constant "
                                 "under a logit model); give an odds ratio, or effect_scale = 'marginal'.")
        b1 = math.log(self.odds_ratio)
        return Linear(b0, b1, sigma, p0, marginal_risk(b0 + b1, sigma))

    # -- estimands ----------------------------------------------------------------------
    def true_values(self, lin: Linear) -> dict[str, float]:
        """Every estimand's true value: marginal risk difference, log risk ratio, log odds ratio; conditional log OR."""
        p0, p1 = lin.mean0, lin.mean1
        # log odds as log(p / (1 - p)), the arithmetic of binary_two_arm (scipy's logit differs in the last bit)
        return {"risk_difference": p1 - p0, "log_risk_ratio": math.log(p1 / p0),
                "log_odds_ratio": math.log(p1 / (1 - p1)) - math.log(p0 / (1 - p0)),
                "conditional_log_odds_ratio": lin.beta1}

    def true_effect(self, lin: Linear) -> float:
        return self.true_values(lin)[self.estimand]

    @property
    def estimand_label(self) -> str:
        return self.estimand.replace("_", " ")

    def estimand_aliases(self, lin: Linear) -> set[str]:
        # no cluster variation: conditional and marginal odds ratios are one number
        return {"log odds ratio"} if lin.sigma == 0 and self.estimand == "conditional_log_odds_ratio" else set()

    # -- drawing ------------------------------------------------------------------------
    def draw(self, rng, lin, arm, u_rows, size, width):
        if u_rows is None:  # independent participants: the risks themselves, as binary_two_arm compares them
            p = np.where(arm == 1, lin.mean1, lin.mean0)
        else:
            p = expit(lin.beta0 + lin.beta1 * arm + lin.sigma * u_rows)
        y = np.less(rng.random((size, width)), p).astype(float)
        return y, {}, {}, {}

    def describe(self, lin: Linear | None = None) -> str:
        given = self.effect_param
        text = (f"binary outcome, control risk {self.p0:g} (population-averaged), {given.replace('_', ' ')} "
                f"{self._p[given]:g}")
        if lin is None or lin.sigma == 0:
            return text + f" (treatment risk {self.nominal_p1:.4g})"
        v = self.true_values(lin)
        return (text + f" ({self.effect_scale}); logit link with a cluster SD of {lin.sigma:.4g} on the logit "
                f"scale; treatment risk {lin.mean1:.4g} (population-averaged); conditional odds ratio "
                f"{math.exp(lin.beta1):.4g}, marginal odds ratio {math.exp(v['log_odds_ratio']):.4g}")


class CountOutcome(GLMOutcome):
    """Event counts over an exposure time with a log link: Poisson, or negative binomial with ``dispersion``.

    Parameters
    ----------
    rate0 : float > 0
        Marginal (population-averaged) event rate per unit exposure in the control arm.
    rate_ratio : float > 0
        Treatment over control rate ratio (conditional = marginal under the log link).
    dispersion : float > 0, optional
        Negative binomial shape k of a participant's own rate multiplier (variance mu + mu^2 / k
        given the cluster); omit for Poisson.
    exposure, exposure_cv
        Exposure per participant (its mean) and its coefficient of variation (gamma), as ``count_two_arm``.
    effect_scale : {"conditional", "marginal"}
        Accepted for symmetry with ``binary``: the two rate ratios are equal.
    icc_scale : {"count"}
        The design's ``icc`` is the correlation of two control-arm counts of one cluster (see the module).
    """

    name = "count"
    columns = frozenset({"exposure"})
    params = {"rate0": POSITIVE, "rate_ratio": POSITIVE, "dispersion": Real(0.0, low_open=True, optional=True),
              "exposure": POSITIVE, "exposure_cv": Real(0.0), "effect_scale": EFFECT_SCALE,
              "icc_scale": Choice(("count",))}
    defaults = {"rate_ratio": 1.0, "dispersion": None, "exposure": 1.0, "exposure_cv": 0.0,
                "effect_scale": "conditional", "icc_scale": "count"}
    estimand_label = "log rate ratio"

    @property
    def effect_param(self) -> str:  # type: ignore[override]
        return "rate_ratio"

    def sigma_for(self, icc: float) -> float:
        if icc == 0:
            return 0.0
        mu = self.rate0 * self.exposure
        extra = 1.0 if self.dispersion is None else 1.0 + 1.0 / self.dispersion
        if icc * extra >= 1.0:
            raise ParameterError(f"`design.icc` = {icc:g} cannot be reached by counts with dispersion "
                                 f"{self.dispersion:g} (the count ICC stays below k / (k + 1) = {1 / extra:.3g}).")
        a = (mu * (1.0 - icc) + icc) / (mu * (1.0 - icc * extra))
        return math.sqrt(math.log(a))

    def count_icc(self, sigma: float) -> float:
        """The control-arm count ICC for cluster SD ``sigma`` on the log scale (the inverse of :meth:`sigma_for`)."""
        mu, a = self.rate0 * self.exposure, math.exp(sigma**2)
        extra = 1.0 if self.dispersion is None else 1.0 + 1.0 / self.dispersion
        return mu * (a - 1.0) / (1.0 + mu * (extra * a - 1.0))

    def solve(self, sigma: float) -> Linear:
        b1 = math.log(self.rate_ratio)
        return Linear(math.log(self.rate0) - sigma**2 / 2.0, b1, sigma, self.rate0, self.rate0 * self.rate_ratio)

    def true_values(self, lin: Linear) -> dict[str, float]:
        return {"log_rate_ratio": lin.beta1}

    def true_effect(self, lin: Linear) -> float:
        return lin.beta1

    def estimand_aliases(self, lin: Linear) -> set[str]:
        return set()

    def draw(self, rng, lin, arm, u_rows, size, width):
        # the order of count_two_arm: exposures, then gamma multipliers, then the Poisson counts
        shared, per_rep = {}, {}
        if u_rows is None:
            rate = np.where(arm == 1, self.rate0 * self.rate_ratio, self.rate0)
        else:
            rate = np.exp(lin.beta0 + lin.beta1 * arm + lin.sigma * u_rows)
        if self.exposure_cv > 0:
            shape = 1.0 / self.exposure_cv**2
            expo = rng.gamma(shape, self.exposure / shape, (size, width))
            per_rep["exposure"] = expo
        else:
            expo = np.full(width, self.exposure)
            shared["exposure"] = expo
        mu = rate * expo
        if self.dispersion is not None:
            k = self.dispersion
            mu = mu * rng.gamma(k, 1.0 / k, (size, width))
        y = rng.poisson(np.broadcast_to(mu, (size, width))).astype(float)
        return y, shared, per_rep, {"exposure": expo}

    def describe(self, lin: Linear | None = None) -> str:
        dist = ("Poisson counts" if self.dispersion is None else
                f"negative binomial counts (variance mu + mu^2/{self.dispersion:g} within a cluster)")
        expo = (f"exposure {self.exposure:g}" if self.exposure_cv == 0 else
                f"gamma-distributed exposure with mean {self.exposure:g} and CV {self.exposure_cv:g}")
        text = (f"{dist}, {expo}; control rate {self.rate0:g} per unit exposure (population-averaged), rate ratio "
                f"{self.rate_ratio:g}")
        if lin is not None and lin.sigma > 0:
            text += f"; log link with a cluster SD of {lin.sigma:.4g} on the log scale (conditional = marginal ratio)"
        return text
