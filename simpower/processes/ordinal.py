"""Ordered categorical outcomes in two independent arms (proportional odds, or any two distributions).

The outcome has K >= 2 ordered categories coded ``0, 1, ..., K-1`` (0 the
lowest) and stored as floats in ``y``; the control arm's category
probabilities are ``p0``. The treatment arm's follow from exactly one of:

* ``odds_ratio`` (proportional odds): for every cut k = 0..K-2,
  ``logit P(Y1 <= k) = logit P(Y0 <= k) - log(odds_ratio)``. So
  ``odds_ratio > 1`` moves the treated arm to *higher* categories: it is the
  odds of being above any cut, treated over control. This is the sign of the
  slope of statsmodels' ``OrderedModel`` (``P(Y <= k | x) = F(cut_k - x b)``)
  and of the ``proportional_odds`` analysis, whose estimate is
  ``log(odds_ratio)``;
* ``p1``: the treated arm's probabilities given outright (any distribution,
  so proportional odds may fail on purpose; then no single odds ratio exists).

The long table has columns ``y`` (category 0..K-1 as a float; NaN where a
``missing`` mechanism hid it), ``arm`` (0 control, 1 treatment, control rows
first) and, with missingness, ``observed``. The process is a thin factory over
the composed ``trial``: it draws what ``trial`` with the ``arms`` design, the
``ordinal`` layer (:mod:`simpower.processes.ordinal_outcomes`) and the same
``missing`` draws (:meth:`OrdinalTwoArm.as_trial`), and keeps its own name,
fields, spec, description and facts.
"""

from __future__ import annotations

import math

from .._validation import Int, Real
from ..components import Nested
from ..facts import OrdinalFacts
from .base import check_missing_columns
from .composed import Arms, Trial
from .design import TwoArms, arm_defaults, arm_params
from .factories import TrialFactory
from .ordinal_outcomes import (SUM_TOL, OrdinalEffect, OrdinalOutcome, _probabilities,  # noqa: F401 (re-exported:
                               check_ordinal_effect, probability_index, proportional_odds_shift)  # SUM_TOL, ...)
from .outcomes import Described


class OrdinalTwoArm(TwoArms, OrdinalEffect, TrialFactory):
    """Two independent arms with an ordered categorical outcome (categories 0..K-1).

    Parameters
    ----------
    n : int >= 2
        Size of the control arm (arm 0).
    p0 : list of K >= 2 floats in (0, 1), summing to 1
        Control-arm category probabilities, lowest category first.
    odds_ratio : float > 0
        Proportional-odds effect: the odds of a higher category (above any
        cut), treated over control; > 1 moves the treated arm up. Give this
        or ``p1``. Default 1 (no effect) when ``p1`` is not given.
    p1 : list of K floats, optional
        The treated arm's category probabilities, given outright (may break
        proportional odds).
    ratio, n1, sizes, allocation
        Arm sizes, as for every two-arm process (DEVELOPERS.md, "Design vocabulary").
    missing : missingness, optional
        Missing-outcome mechanism (``mcar``, ``mar``, ``mnar``), applied once
        after the outcomes are drawn; hidden outcomes are NaN.

    Notes
    -----
    The estimand (:meth:`true_effect`) is ``log(odds_ratio)`` (the
    ``proportional_odds`` analysis estimates it). With ``p1`` there is no
    single odds ratio: :meth:`true_effect` is None, and the probability index
    ``P(Y1 > Y0) + P(Y1 = Y0)/2`` that ``mann_whitney`` with
    ``estimand = "probability"`` estimates is :attr:`probability_index` (give it
    through the scenario's ``true_effects``). :meth:`facts` states
    :class:`~simpower.facts.OrdinalFacts` under proportional odds without
    missing outcomes (Whitehead's 1993 closed form then applies).

    Examples
    --------
    An odds ratio of 2 on four equally likely categories:

    >>> p = OrdinalTwoArm(n=50, p0=[0.25, 0.25, 0.25, 0.25], odds_ratio=2.0)
    >>> [round(float(v), 4) for v in p.p1_probs]
    [0.1429, 0.1905, 0.2667, 0.4]
    >>> round(p.true_effect(), 4), p.null().odds_ratio
    (0.6931, 1.0)
    """

    name = "ordinal_two_arm"
    params = arm_params({
        "n": Int(low=2),
        "p0": Described(text="a list of category probabilities summing to 1 (e.g. [0.2, 0.5, 0.3])"),
        "odds_ratio": Real(0.0, low_open=True, optional=True),
        "p1": Described(text="a list of treated-arm category probabilities summing to 1", optional=True),
        "missing": Nested("missingness", optional=True),
    })
    defaults = arm_defaults({"odds_ratio": None, "p1": None, "missing": None})
    size_param = "n"

    def _check(self):
        p = dict(self._p)
        check_ordinal_effect(p)
        check_missing_columns(p["missing"], {"arm"}, self.name)
        self._set_params(p)
        self._check_arms()
        super()._check()  # TrialFactory: the trial it draws through

    # -- derived (the effect's fields: OrdinalEffect) -------------------
    @property
    def k(self) -> int:
        """Number of categories."""
        return len(self.p0)

    @property
    def probability_index(self) -> float:
        """``P(Y1 > Y0) + P(Y1 = Y0) / 2`` (1/2 under no effect), what ``mann_whitney`` estimates."""
        return probability_index(self.p0_probs, self.p1_probs)

    @property
    def estimand_label(self) -> str | None:  # type: ignore[override]
        return "log odds ratio" if self.proportional_odds else None

    def true_effect(self) -> float | None:
        """``log(odds_ratio)``; None with ``p1`` (no single odds ratio: see :attr:`probability_index`)."""
        return math.log(self.odds_ratio) if self.proportional_odds else None

    def facts(self):
        """:class:`~simpower.facts.OrdinalFacts` under proportional odds without missing outcomes, else none."""
        if self.missing is not None or not self.proportional_odds:
            return ()
        return (OrdinalFacts(p0=tuple(self.p0_probs), p1=tuple(self.p1_probs), odds_ratio=float(self.odds_ratio),
                             n=self.n, ratio=self.n1 / self.n),)

    # -- drawing: through the trial (TrialFactory) ----------------------------
    def layers(self):
        """The ``arms`` design times the ``ordinal`` layer times ``missing``."""
        effect = {"odds_ratio": self.odds_ratio} if self.proportional_odds else {"p1": self._p["p1"]}
        return {"design": Arms(n=self.n, ratio=self.ratio, n1=self._p["n1"]),
                "outcome": OrdinalOutcome(p0=self.p0, **effect), "missing": self.missing}

    def as_trial(self) -> Trial:
        """The composed ``trial`` this process draws through (:attr:`trial`)."""
        return self.trial

    def describe(self):
        p0 = ", ".join(f"{v:g}" for v in self.p0)
        p1 = ", ".join(f"{v:.3g}" for v in self.p1_probs)
        effect = (f"proportional odds, odds ratio {self.odds_ratio:g} (treated shifted "
                  f"{'up' if self.odds_ratio > 1 else 'down' if self.odds_ratio < 1 else 'nowhere'})"
                  if self.proportional_odds else "treated probabilities given (proportional odds not assumed)")
        miss = f"; missing outcomes: {self.missing.describe()}" if self.missing is not None else ""
        return (f"{self.arms_text()}, ordinal outcome with {self.k} categories 0..{self.k - 1}: probabilities "
                f"[{p0}] (control) and [{p1}] (treatment); {effect}{miss}")
