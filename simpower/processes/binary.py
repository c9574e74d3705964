"""Binary outcomes in two independent arms (risks, odds ratios, risk ratios, risk differences).

The control arm has event risk ``p0``; the treatment arm's risk ``p1`` follows
from exactly one effect parameter:

* ``odds_ratio``: ``p1 / (1 - p1) = odds_ratio * p0 / (1 - p0)``;
* ``risk_ratio``: ``p1 = risk_ratio * p0`` (must stay below 1);
* ``risk_difference``: ``p1 = p0 + risk_difference`` (must stay in (0, 1)).

The long table has columns ``y`` (0.0 / 1.0; NaN where a ``missing``
mechanism hid the outcome), ``arm`` (0 control, 1 treatment, control rows
first) and, with missingness, ``observed``.
"""

from __future__ import annotations

from .._validation import Choice, Int, Real
from ..components import Nested
from .composed import Arms
from .design import TwoArms, arm_defaults, arm_params
from .factories import TrialFactory
from .glm_outcomes import BinaryOutcome
from .risks import EFFECTS, OneBinaryEffect, risk_from_effect  # noqa: F401 - importable from here as before

POSITIVE = Real(0.0, low_open=True)
ESTIMANDS = ("risk_difference", "log_odds_ratio", "log_risk_ratio")


class BinaryTwoArm(TwoArms, TrialFactory):
    """Two independent arms with a binary outcome (1 = event).

    Parameters
    ----------
    n : int >= 2
        Size of the control arm (arm 0).
    p0 : float in (0, 1)
        Event risk in the control arm.
    odds_ratio, risk_ratio, risk_difference : float
        The treatment effect: give exactly one. ``odds_ratio`` and
        ``risk_ratio`` must be > 0, and the implied treatment risk must lie in
        (0, 1).
    ratio : float > 0
        Allocation ratio; the treatment arm has ``round(ratio * n)``
        participants (at least 2).
    n1 : int >= 2, optional
        The treatment arm's size, given directly instead of ``ratio``
        (``sizes = [n0, n1]`` gives both arms at once).
    estimand : {'risk_difference', 'log_odds_ratio', 'log_risk_ratio'}
        What :meth:`true_effect` returns, for bias and coverage: match it to
        the analysis's estimate (``two_proportions`` and ``chi_square``
        estimate the risk difference, ``logistic`` and ``fisher_exact`` the
        log odds ratio). Default 'risk_difference'.
    missing : Missingness, optional
        Missing-outcome mechanism; masked outcomes are NaN in ``y``.

    Notes
    -----
    The null scenario (:meth:`null`) sets the given effect to its null value:
    1 for an odds or risk ratio, 0 for a risk difference. :meth:`facts` gives
    the risks and arm sizes (:class:`~simpower.facts.BinaryFacts`) the
    two-proportion normal approximation needs.

    A factory over ``trial``: ``design = arms(n, ratio, n1)``, ``outcome =
    binary(p0, odds_ratio | risk_ratio | risk_difference, estimand)``,
    ``missing`` (see :attr:`trial`).

    Examples
    --------
    An odds ratio of 3 on a control risk of 0.2 is a treatment risk of 3/7:

    >>> p = BinaryTwoArm(n=100, p0=0.2, odds_ratio=3.0)
    >>> round(p.p1, 4), round(p.true_effect(), 4)
    (0.4286, 0.2286)
    >>> p.null().odds_ratio
    1.0
    """

    name = "binary_two_arm"
    params = arm_params({
        "n": Int(low=2),
        "p0": Real(0.0, 1.0, low_open=True, high_open=True),
        "odds_ratio": Real(0.0, low_open=True, optional=True),
        "risk_ratio": Real(0.0, low_open=True, optional=True),
        "risk_difference": Real(-1.0, 1.0, low_open=True, high_open=True, optional=True),
        "ratio": POSITIVE,
        "estimand": Choice(ESTIMANDS),
        "missing": Nested("missingness", optional=True),
    })
    defaults = arm_defaults({"odds_ratio": None, "risk_ratio": None, "risk_difference": None, "ratio": 1.0,
                             "estimand": "risk_difference", "missing": None})
    size_param = "n"
    unprefixed = ("design.", "outcome.")

    def layers(self):
        effect = {k: self._p[k] for k in EFFECTS if self._p[k] is not None}
        return {"design": Arms(n=self.n, ratio=self.ratio, n1=self._p["n1"]),
                "outcome": BinaryOutcome(p0=self.p0, estimand=self.estimand, **effect), "missing": self.missing}

    @property
    def effect_param(self) -> str:  # type: ignore[override]
        """The effect parameter that was given (set to its null value by :meth:`null`)."""
        return self._trial.outcome.effect_param

    @property
    def p1(self) -> float:
        """The treatment arm's risk."""
        return self._trial.linear.mean1

    def describe(self):
        given = self.effect_param
        miss = f"; missing outcomes: {self.missing.describe()}" if self.missing is not None else ""
        return (f"{self.arms_text()}, binary outcome with event "
                f"risks {self.p0:g} (control) and {self.p1:.4g} (treatment; {given} = {self._p[given]:g}), "
                f"participants independent{miss}")
