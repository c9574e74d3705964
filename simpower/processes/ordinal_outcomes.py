"""An ordinal outcome layer for the composed ``trial``: proportional odds with a cluster random intercept.

The layer ``ordinal`` (kind ``glm_outcome``) is the ``outcome`` of a
:class:`~simpower.processes.composed.Trial`, with the vocabulary of
``ordinal_two_arm`` (:mod:`simpower.processes.ordinal`): control-arm category
probabilities ``p0`` (K >= 2, lowest category first) and either a common
``odds_ratio`` (the odds of a higher category, treated over control) or the
treated arm's probabilities ``p1``. Categories are coded 0..K-1 in ``y``.

Each outcome is the category of a latent logistic variable,

    P(Y <= k | arm, u_c) = expit(alpha_{arm,k} - sigma_b * u_c),   k = 0..K-2,

with u_c ~ N(0, 1) per cluster and sigma_b = 0 under the ``arms`` design
(there the layer draws exactly what ``ordinal_two_arm`` draws with the same
fields, replicate for replicate). Under ``clusters`` the design's ``icc`` is
the ICC of the latent variable, icc = sigma_b^2 / (sigma_b^2 + pi^2 / 3)
(Snijders & Bosker 2012, ch. 17, the ordered-logit case of the latent
threshold model; common practice).

``p0`` is **population-averaged**: each control cut alpha_{0,k} is solved so
that E[expit(alpha_{0,k} - sigma_b Z)] equals the cumulative probability of
``p0`` (Gauss-Hermite quadrature, 100 nodes). The effect:

* ``odds_ratio`` with ``effect_scale = "conditional"`` (default): the
  cluster-specific proportional-odds shift, alpha_{1,k} = alpha_{0,k} -
  log(odds_ratio); the population-averaged treated probabilities follow by
  quadrature (they are not an exact proportional-odds shift of ``p0``);
* ``odds_ratio`` with ``effect_scale = "marginal"``: the treated arm's
  population-averaged probabilities are the proportional-odds shift of
  ``p0`` (as ``ordinal_two_arm``), and each alpha_{1,k} is solved for it;
* ``p1``: the treated arm's population-averaged probabilities, given outright.

``true_effect()`` is log(odds_ratio) on its scale (estimand label "log odds
ratio", or "conditional log odds ratio" for a conditional odds ratio when
clusters vary); with ``p1`` there is none. ``true_values()`` also gives the
probability index P(Y1 > Y0) + P(Y1 = Y0) / 2 of the population-averaged
distributions (what ``mann_whitney`` with ``estimand = "probability"`` estimates).
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass

import numpy as np
from scipy.special import expit

from .._validation import Choice, Real
from ..errors import ParameterError
from ..facts import OrdinalFacts
from .glm_outcomes import EFFECT_SCALE, SIGMA_MAX, GLMOutcome, Linear, intercept_for, latent_sigma, marginal_risk
from .outcomes import Described


#: how far the listed probabilities may sum from 1 (typing 0.1 + 0.2 + ... rounds)
SUM_TOL = 1e-6


def _probabilities(field: str, value) -> tuple[float, ...]:
    """A list of K >= 2 category probabilities, each in (0, 1), summing to 1 (one-line error otherwise)."""
    fix = "list K >= 2 category probabilities, lowest category first, each > 0, summing to 1 (e.g. [0.2, 0.5, 0.3])"
    if isinstance(value, (str, bytes)) or not hasattr(value, "__len__"):
        raise ParameterError(f"`{field}` must {fix}; got {value!r}.")
    vals = list(value)
    if len(vals) < 2:
        raise ParameterError(f"`{field}` must {fix}; got {len(vals)} categor{'y' if len(vals) == 1 else 'ies'}.")
    for v in vals:
        if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(v) or not 0 < v < 1:
            raise ParameterError(f"`{field}` must {fix}; got {v!r} among {vals!r}.")
    total = math.fsum(vals)
    if abs(total - 1.0) > SUM_TOL:
        raise ParameterError(f"`{field}` must {fix}; its entries sum to {total:.6g}.")
    return tuple(float(v) for v in vals)


def proportional_odds_shift(p0, odds_ratio: float) -> np.ndarray:
    """Treated-arm category probabilities under proportional odds from control ``p0`` and ``odds_ratio``.

    ``logit P(Y1 <= k) = logit P(Y0 <= k) - log(odds_ratio)`` for k = 0..K-2
    (McCullagh 1980, J R Stat Soc B 42:109-142): the odds of being above any
    cut are multiplied by ``odds_ratio``.
    """
    p0 = np.asarray(p0, float) / math.fsum(p0)
    cum0 = np.cumsum(p0)[:-1]
    odds = cum0 / (1.0 - cum0) / odds_ratio
    cum1 = np.concatenate([[0.0], odds / (1.0 + odds), [1.0]])
    return np.diff(cum1)


def probability_index(p0, p1) -> float:
    """``P(Y1 > Y0) + P(Y1 = Y0) / 2`` for independent categorical Y0 ~ p0, Y1 ~ p1 (1/2: no effect)."""
    p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
    below0 = np.concatenate([[0.0], np.cumsum(p0)[:-1]])   # P(Y0 < k)
    return float(np.sum(p1 * (below0 + 0.5 * p0)))


@dataclass(frozen=True)
class OrdinalLinear(Linear):
    """The solved latent model: cuts per arm (alpha_{0,k}, alpha_{1,k}) and the population-averaged
    category probabilities per arm; ``mean0``, ``mean1`` are the arms' mean categories."""

    cuts0: tuple = ()
    cuts1: tuple = ()
    probs0: tuple = ()
    probs1: tuple = ()


def _marginal_probs(cuts, sigma: float) -> np.ndarray:
    """Population-averaged category probabilities from the cuts: differences of E[expit(alpha_k - sigma Z)]."""
    cum = [marginal_risk(c, sigma) for c in cuts]   # Z symmetric: E[expit(a - sZ)] = E[expit(a + sZ)]
    return np.diff(np.concatenate([[0.0], cum, [1.0]]))


def _cuts_for(probs, sigma: float) -> tuple[float, ...]:
    """The cuts whose population-averaged cumulative probabilities are those of ``probs``."""
    cum = np.cumsum(probs)[:-1]
    return tuple(intercept_for(float(c), sigma) for c in cum)


def check_ordinal_effect(p: dict) -> None:
    """``p0`` and the effect (``odds_ratio`` or ``p1``) of an ordinal outcome, checked and cleaned in place:
    probabilities normalised, one category count, odds ratio 1 when neither is given."""
    p["p0"] = _probabilities("p0", p["p0"])
    if p["p1"] is not None:
        if p["odds_ratio"] is not None:
            raise ParameterError("`odds_ratio`, `p1`: give the proportional-odds effect or the treated arm's "
                                 "probabilities, not both.")
        p["p1"] = _probabilities("p1", p["p1"])
        if len(p["p1"]) != len(p["p0"]):
            raise ParameterError(f"`p1` must have one probability per category of `p0` ({len(p['p0'])}); "
                                 f"got {len(p['p1'])}.")
    elif p["odds_ratio"] is None:
        p["odds_ratio"] = 1.0


class OrdinalEffect:
    """What ``ordinal_two_arm`` and the ``ordinal`` layer share: the effect given as ``odds_ratio`` (proportional
    odds, null 1) or as the treated arm's probabilities ``p1`` (null: ``p0``), and the arms' probabilities."""

    @property
    def effect_param(self) -> str:  # type: ignore[override]
        """``odds_ratio`` (null 1), or ``p1`` (null: ``p0``) when the treated arm was given outright."""
        return "p1" if self._p["p1"] is not None else "odds_ratio"

    def null_value(self):
        return list(self.p0) if self.effect_param == "p1" else 1.0

    @property
    def proportional_odds(self) -> bool:
        """Whether the arms differ by a proportional-odds shift (``odds_ratio`` given)."""
        return self._p["p1"] is None

    @property
    def p0_probs(self) -> np.ndarray:
        """Control-arm probabilities (normalised to sum to 1 exactly)."""
        return np.asarray(self.p0, float) / math.fsum(self.p0)

    @property
    def p1_probs(self) -> np.ndarray:
        """Treated-arm probabilities: ``p1`` normalised, or the proportional-odds shift of ``p0``."""
        if self._p["p1"] is not None:
            return np.asarray(self._p["p1"], float) / math.fsum(self._p["p1"])
        return proportional_odds_shift(self.p0, self.odds_ratio)


class OrdinalOutcome(OrdinalEffect, GLMOutcome):
    """An ordered categorical outcome (categories 0..K-1) from a latent logistic variable.

    Parameters
    ----------
    p0 : list of K >= 2 floats in (0, 1), summing to 1
        Control-arm category probabilities (population-averaged), lowest first.
    odds_ratio : float > 0
        Proportional-odds effect: odds of a higher category, treated over
        control (> 1 moves the treated arm up). Give this or ``p1``; default 1.
    p1 : list of K floats, optional
        The treated arm's population-averaged category probabilities.
    effect_scale : {"conditional", "marginal"}
        Whether ``odds_ratio`` is cluster-specific (default) or population-averaged.
    icc_scale : {"latent"}
        The design's ``icc`` is sigma_b^2 / (sigma_b^2 + pi^2 / 3).
    """

    name = "ordinal"
    params = {"p0": Described(text="a list of category probabilities summing to 1 (e.g. [0.2, 0.5, 0.3])"),
              "odds_ratio": Real(0.0, low_open=True, optional=True),
              "p1": Described(text="a list of treated-arm category probabilities summing to 1", optional=True),
              "effect_scale": EFFECT_SCALE, "icc_scale": Choice(("latent",))}
    defaults = {"odds_ratio": None, "p1": None, "effect_scale": "conditional", "icc_scale": "latent"}

    def _check(self):
        p = dict(self._p)
        check_ordinal_effect(p)
        self._set_params(p)

    # -- the parts ------------------------------------------------------------------------
    @property
    def nominal_p1(self) -> np.ndarray:
        """The treated probabilities without clustering: ``p1`` normalised, or the proportional-odds shift of ``p0``."""
        return self.p1_probs

    def sigma_for(self, icc: float) -> float:
        return latent_sigma(icc)

    def solve(self, sigma: float) -> OrdinalLinear:
        p0 = self.p0_probs
        b1 = math.log(self.odds_ratio) if self.proportional_odds else math.nan
        if sigma == 0:
            p1 = self.nominal_p1
            cuts0 = tuple(float(c) for c in np.log(np.cumsum(p0)[:-1] / (1 - np.cumsum(p0)[:-1])))
            cuts1 = tuple(float(c) for c in np.log(np.cumsum(p1)[:-1] / (1 - np.cumsum(p1)[:-1])))
        else:
            if sigma > SIGMA_MAX:
                raise ParameterError(f"`design.icc` gives a latent-scale cluster SD of {sigma:.3g} "
                                     f"(> {SIGMA_MAX:g}); lower icc.")
            cuts0 = _cuts_for(p0, sigma)
            if self.proportional_odds and self.effect_scale == "conditional":
                cuts1 = tuple(c - b1 for c in cuts0)
                p1 = _marginal_probs(cuts1, sigma)
            else:
                p1 = self.nominal_p1
                cuts1 = _cuts_for(p1, sigma)
        k = np.arange(p0.size)
        return OrdinalLinear(0.0, b1, sigma, float(k @ p0), float(k @ p1), cuts0, cuts1,
                             tuple(float(v) for v in p0), tuple(float(v) for v in p1))

    # -- estimands ---------------------------------------------------------------------
    def true_values(self, lin: OrdinalLinear) -> dict[str, float]:
        """The log odds ratio on its scale (``conditional_log_odds_ratio`` for a conditional one when clusters
        vary, else ``log_odds_ratio``; none with ``p1``) and the probability index of the marginal distributions."""
        out = {"probability_index": probability_index(lin.probs0, lin.probs1)}
        if self.proportional_odds:
            conditional = lin.sigma > 0 and self.effect_scale == "conditional"
            out["conditional_log_odds_ratio" if conditional else "log_odds_ratio"] = lin.beta1
        return out

    def true_effect(self, lin: OrdinalLinear) -> float | None:
        return lin.beta1 if self.proportional_odds else None

    def label_for(self, lin: OrdinalLinear) -> str | None:
        if not self.proportional_odds:
            return None
        conditional = lin.sigma > 0 and self.effect_scale == "conditional"
        return "conditional log odds ratio" if conditional else "log odds ratio"

    @property
    def estimand_label(self) -> str | None:  # type: ignore[override]
        return "log odds ratio" if self.proportional_odds else None

    def estimand_aliases(self, lin: OrdinalLinear) -> set[str]:
        return set()

    def facts_for(self, lin: OrdinalLinear, design):
        """Under ``arms``, proportional odds: the :class:`OrdinalFacts` ``ordinal_two_arm`` states; else none."""
        if lin.sigma == 0 and design.name == "arms" and self.proportional_odds:
            return (OrdinalFacts(p0=tuple(self.p0_probs), p1=tuple(self.nominal_p1),
                                 odds_ratio=float(self.odds_ratio), n=design.n0, ratio=design.n1 / design.n0),)
        return ()

    # -- drawing ------------------------------------------------------------------------
    def draw(self, rng, lin, arm, u_rows, size, width):
        u = rng.random((size, width))
        if u_rows is None and arm.ndim == 1:  # independent participants: ordinal_two_arm's arithmetic
            y = np.empty(u.shape)
            for label, probs in ((0, self.p0_probs), (1, self.nominal_p1)):
                rows = arm == label
                y[:, rows] = np.searchsorted(np.cumsum(probs)[:-1], u[:, rows], side="right")
            return y, {}, {}, {}
        y = np.zeros(u.shape)
        treated = np.broadcast_to(arm == 1, u.shape)
        shift = 0.0 if u_rows is None else lin.sigma * u_rows
        for c0, c1 in zip(lin.cuts0, lin.cuts1):
            y += u >= expit(np.where(treated, c1, c0) - shift)
        return y, {}, {}, {}

    def describe(self, lin: OrdinalLinear | None = None) -> str:
        k = len(self.p0)
        p0 = ", ".join(f"{v:g}" for v in self.p0)
        p1 = ", ".join(f"{v:.3g}" for v in (self.nominal_p1 if lin is None else lin.probs1))
        if self.proportional_odds:
            effect = f"proportional odds, odds ratio {self.odds_ratio:g}"
        else:
            effect = "treated probabilities given (proportional odds not assumed)"
        text = (f"ordinal outcome with {k} categories 0..{k - 1}: probabilities [{p0}] (control) and [{p1}] "
                f"(treatment); {effect}")
        if lin is not None and lin.sigma > 0:
            scale = self.effect_scale if self.proportional_odds else "marginal"
            text += (f" ({scale}); latent logistic variable with a cluster SD of {lin.sigma:.4g}, probabilities "
                     "population-averaged")
        return text
