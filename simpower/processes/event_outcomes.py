"""A time-to-event outcome layer for the composed ``trial``: Weibull proportional hazards with a log-normal frailty.

The layer ``time_to_event`` (kind ``glm_outcome``) is the ``outcome`` of a
:class:`~simpower.processes.composed.Trial`. It takes the vocabulary of
``survival_two_arm`` (:mod:`simpower.processes.survival`): control ``median``
or ``hazard0``, Weibull ``shape``, ``hazard_ratio`` (the effect), uniform
``accrual``, ``follow_up`` after accrual closes, loss to follow-up
(``dropout_rate``, or ``dropout_fraction`` by ``dropout_time``) and
``time_resolution``. Participant i of cluster c has the cumulative hazard

    H_i(t) = exp(eta_i) (lam t) ** shape,   eta_i = beta0 + beta1 * arm_i + sigma_b * u_c,

with u_c ~ N(0, 1) per cluster (a shared log-normal frailty on the log
hazard; McGilchrist & Aisbett 1991) and beta1 = log(hazard_ratio). Under the
``arms`` design sigma_b = 0 and beta0 = 0: the layer then draws exactly what
``survival_two_arm`` draws with the same fields, replicate for replicate.

The ICC (``icc_scale = "latent"``). Since H_i(T_i) is standard exponential,
``shape * log(lam T_i) = log E_i - eta_i`` with log E_i a (minimum) extreme
value variate of variance pi^2 / 6: a linear model for the latent log time
(the Weibull accelerated-failure-time form, Kalbfleisch & Prentice 2002,
section 2.3). The design's ``icc`` is the intracluster correlation of that
latent variable,

    icc = sigma_b^2 / (sigma_b^2 + pi^2 / 6),

the convention for the complementary log-log link, whose latent residual is
the same extreme-value variate (Nakagawa, Johnson & Schielzeth 2017, J R Soc
Interface 14:20170213, table 1; as binary outcomes use pi^2 / 3 for the logit
link, Snijders & Bosker 2012, ch. 17). Without censoring it is the
correlation of ``log T`` of two members of one cluster of one arm.

The baseline under clusters: ``median`` is the **population-averaged**
control median (beta0 is solved so that E[S_c(median)] = 1/2 over the
clusters, by Gauss-Hermite quadrature); ``hazard0`` makes the population
mean of the cluster-specific cumulative hazards (hazard0 t) ** shape
(beta0 = -sigma_b^2 / 2, as the ``count`` layer's rate; for shape 1 the mean
hazard rate across clusters is hazard0). The hazard ratio is **conditional**
(cluster-specific): the ratio of the hazards of two participants of the
same cluster. The population-averaged hazards are not proportional under a
frailty (their ratio drifts towards 1 over time), so an analysis that
ignores the clustering (``logrank``, ``cox``) estimates a smaller effect;
the process's estimand label is then "conditional log hazard ratio".

Columns: ``time`` (from entry to event or censoring), ``event`` (1 event,
0 censored), ``entry`` (calendar time of enrolment, accrual times the
uniform entry variate), ``arm``; with clusters also ``cluster`` and
``subject``. Outcomes are censored rather than missing, so ``trial``'s
``missing`` does not apply.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from scipy import optimize

from .._validation import Choice, Real
from ..errors import ParameterError
from .glm_outcomes import SIGMA_MAX, GLMOutcome, Linear
from .survival_rules import SurvivalRules, censor_drawn, contiguous

POSITIVE = Real(0.0, low_open=True)
OPT_POSITIVE = Real(0.0, low_open=True, optional=True)
#: variance of log E, E standard exponential (the minimum extreme-value distribution): pi^2 / 6
EXTREME_VALUE_VARIANCE = math.pi**2 / 6.0

_X, _W = hermegauss(100)
_W = _W / _W.sum()

#: the fields the layer shares with survival_two_arm (same names, meanings, defaults)
SURVIVAL_FIELDS = ("median", "hazard0", "hazard_ratio", "shape", "accrual", "follow_up", "dropout_rate",
                   "dropout_fraction", "dropout_time", "time_resolution")


def frailty_sigma(icc: float) -> float:
    """The log-hazard frailty SD with latent ICC sigma^2 / (sigma^2 + pi^2 / 6) equal to ``icc``."""
    return math.sqrt(icc / (1.0 - icc) * EXTREME_VALUE_VARIANCE)


def marginal_survival(cumhaz, eta: float, sigma: float):
    """E[exp(-exp(eta + sigma Z) H)] over Z ~ N(0, 1) for cumulative hazard(s) ``cumhaz`` (Gauss-Hermite, 100 nodes)."""
    h = np.asarray(cumhaz, float)
    if sigma == 0:
        return np.exp(-math.exp(eta) * h)
    scale = np.exp(eta + sigma * _X)
    return np.exp(-np.multiply.outer(h, scale)) @ _W


def _median_eta(sigma: float) -> float:
    """The beta0 with E[exp(-exp(beta0 + sigma Z) log 2)] = 1/2 (the left side decreases in beta0)."""
    target = math.log(2.0)

    def f(b):
        return float(marginal_survival(target, b, sigma)) - 0.5

    lo, hi = -1.0 - 2.0 * sigma, 1.0 + 2.0 * sigma
    while f(lo) < 0:
        lo -= 2.0 * (1.0 + sigma)
    while f(hi) > 0:
        hi += 2.0 * (1.0 + sigma)
    return float(optimize.brentq(f, lo, hi, xtol=1e-14, rtol=1e-14))


class TimeToEventOutcome(SurvivalRules, GLMOutcome):
    """Time to event under Weibull proportional hazards, censored by accrual, follow-up and loss.

    Parameters
    ----------
    median, hazard0 : float > 0
        The control arm's median survival or hazard rate; give exactly one
        (population-averaged under clusters: see the module).
    hazard_ratio : float > 0
        Treatment over control hazard ratio (conditional on the cluster). Default 1.
    shape : float > 0
        Weibull shape (1: exponential).
    accrual, follow_up, dropout_rate, dropout_fraction, dropout_time, time_resolution
        As for ``survival_two_arm``.
    icc_scale : {"latent"}
        The design's ``icc`` is sigma_b^2 / (sigma_b^2 + pi^2 / 6) (see the module).

    Examples
    --------
    A latent ICC of 0.05 is a frailty SD of 0.294 on the log-hazard scale:

    >>> round(frailty_sigma(0.05), 3)
    0.294
    """

    name = "time_to_event"
    params = {"median": OPT_POSITIVE, "hazard0": OPT_POSITIVE, "hazard_ratio": POSITIVE, "shape": POSITIVE,
              "accrual": Real(0.0), "follow_up": OPT_POSITIVE, "dropout_rate": Real(0.0),
              "dropout_fraction": Real(0.0, 1.0, high_open=True, optional=True), "dropout_time": OPT_POSITIVE,
              "time_resolution": OPT_POSITIVE, "icc_scale": Choice(("latent",))}
    defaults = {"median": None, "hazard0": None, "hazard_ratio": 1.0, "shape": 1.0, "accrual": 0.0,
                "follow_up": None, "dropout_rate": 0.0, "dropout_fraction": None, "dropout_time": None,
                "time_resolution": None, "icc_scale": "latent"}
    estimand_label = "log hazard ratio"
    #: time-to-event outcomes are censored, never missing: ``trial``'s ``missing`` does not apply
    takes_missing = False
    outcome_columns = ("time", "event", "entry")

    def _check(self):
        self._check_survival()  # the same rules and messages as survival_two_arm

    @property
    def effect_param(self) -> str:  # type: ignore[override]
        return "hazard_ratio"

    def sigma_for(self, icc: float) -> float:
        return frailty_sigma(icc)

    def solve(self, sigma: float) -> Linear:
        b1 = math.log(self.hazard_ratio)
        if sigma == 0:
            b0 = 0.0
        elif sigma > SIGMA_MAX:
            raise ParameterError(f"`design.icc` gives a log-hazard frailty SD of {sigma:.3g} (> {SIGMA_MAX:g}); "
                                 "lower icc.")
        elif self.median is not None:
            b0 = _median_eta(sigma)
        else:
            b0 = -sigma**2 / 2.0
        lin = Linear(b0, b1, sigma, math.nan, math.nan)
        return Linear(b0, b1, sigma, self.marginal_median(lin, 0), self.marginal_median(lin, 1))

    # -- population-averaged quantities ---------------------------------------------------
    def marginal_survival(self, t, lin: Linear, arm: int):
        """Population-averaged survival of ``arm`` at times ``t``: E[exp(-exp(eta + sigma Z) (lam t) ** shape)]."""
        h = (self.rate0 * np.asarray(t, float)) ** self.shape
        return marginal_survival(h, lin.beta0 + lin.beta1 * arm, lin.sigma)

    def marginal_median(self, lin: Linear, arm: int) -> float:
        """Population-averaged median survival of ``arm``: (log 2 exp(b* - eta)) ** (1 / shape) / lam, with b* the
        linear predictor whose population-averaged survival at cumulative hazard log 2 is 1/2 (0 without frailty)."""
        b_star = 0.0 if lin.sigma == 0 else _median_eta(lin.sigma)
        eta = lin.beta0 + lin.beta1 * arm
        return (math.log(2.0) * math.exp(b_star - eta)) ** (1.0 / self.shape) / self.rate0

    # -- estimands ---------------------------------------------------------------------
    def true_values(self, lin: Linear) -> dict[str, float]:
        """The log hazard ratio beta1 (conditional on the cluster under clusters)."""
        return {"log_hazard_ratio": lin.beta1}

    def true_effect(self, lin: Linear) -> float:
        return lin.beta1

    def label_for(self, lin: Linear) -> str:
        return "log hazard ratio" if lin.sigma == 0 else "conditional log hazard ratio"

    def estimand_aliases(self, lin: Linear) -> set[str]:
        return set()

    def facts_for(self, lin: Linear, design):
        """Under ``arms``: the facts of the equivalent ``survival_two_arm`` (Schoenfeld's events); none under clusters."""
        if lin.sigma == 0 and design.name == "arms":
            return self.survival_facts(design.n0, design.n1)
        return ()

    # -- drawing ------------------------------------------------------------------------
    def draw(self, rng, lin, arm, u_rows, size, width):
        # the order of survival_two_arm: event variates, entry variates, loss variates (censor_drawn draws those)
        t = rng.standard_exponential((size, width))
        u_entry = rng.random((size, width)) if self.accrual > 0 else None  # else censor_drawn draws them
        lam, power = self.rate0, (None if self.shape == 1 else 1.0 / self.shape)
        if u_rows is None and arm.ndim == 1:  # independent participants: survival_two_arm's arithmetic
            treated, hr = contiguous(arm == 1), self.hazard_ratio

            def scale(tb, rows):
                tb[:, treated] /= hr
                if power is not None:
                    tb **= power
                tb /= lam
        else:
            def scale(tb, rows):
                a = arm if arm.ndim == 1 else arm[rows]
                tb /= np.exp(lin.beta0 + lin.beta1 * a + (0.0 if u_rows is None else lin.sigma * u_rows[rows]))
                if power is not None:
                    tb **= power
                tb /= lam
        time, event, entry = censor_drawn(t, u_entry, rng, self, scale)
        return None, {}, {"time": time, "event": event, "entry": entry}, {}

    def describe(self, lin: Linear | None = None) -> str:
        dist, tail = self.distribution_text(), self.censoring_text()
        if lin is None or lin.sigma == 0:
            return (f"{dist} event times with control median {self.median0:.4g}, proportional hazards with hazard "
                    f"ratio {self.hazard_ratio:g}; {tail}")
        base = (f"control median {lin.mean0:.4g} (population-averaged)" if self.median is not None else
                f"mean cluster cumulative hazard ({self.rate0:.4g} t)^{self.shape:g} in the control arm")
        return (f"{dist} event times with a shared log-normal frailty (SD {lin.sigma:.4g} on the log-hazard "
                f"scale); {base}; conditional (cluster-specific) hazard ratio {self.hazard_ratio:g}; "
                f"population-averaged medians {lin.mean0:.4g} (control), {lin.mean1:.4g} (treatment); {tail}")
