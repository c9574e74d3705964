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

import math

import numpy as np

from .._validation import Choice, Int, Real
from ..components import Nested
from ..errors import ParameterError
from ..facts import BinaryFacts
from .base import Batch, Process, check_missing_columns
from .design import TwoArms, apply_missing, arm_defaults, arm_params

POSITIVE = Real(0.0, low_open=True)
EFFECTS = ("odds_ratio", "risk_ratio", "risk_difference")
ESTIMANDS = ("risk_difference", "log_odds_ratio", "log_risk_ratio")


def risk_from_effect(p0: float, *, odds_ratio=None, risk_ratio=None, risk_difference=None) -> float:
    """Treatment-arm risk implied by a control risk and one effect measure."""
    if odds_ratio is not None:
        odds = odds_ratio * p0 / (1.0 - p0)
        return odds / (1.0 + odds)
    if risk_ratio is not None:
        return risk_ratio * p0
    return p0 + risk_difference


class OneBinaryEffect:
    """Mixin: a control risk ``p0`` and exactly one effect parameter (:data:`EFFECTS`), checked once.

    Gives the effect parameter that was given (set to its null value by ``null``), its null value and
    the treatment risk ``nominal_p1`` it implies; used by ``binary_two_arm`` and the ``binary`` layer of
    ``trial``.
    """

    def _check_effect(self) -> None:
        given = [k for k in EFFECTS if self._p[k] is not None]
        if len(given) != 1:
            got = "none" if not given else " and ".join(f"`{k}`" for k in given)
            raise ParameterError(f"`odds_ratio`, `risk_ratio`, `risk_difference`: give exactly one effect; got {got}.")
        p1 = self.nominal_p1
        if not 0.0 < p1 < 1.0:
            k = given[0]
            raise ParameterError(f"`{k}` = {self._p[k]:g} with p0 = {self.p0:g} gives a treatment risk of {p1:g}; "
                                 f"it must be in (0, 1).")

    @property
    def effect_param(self) -> str:  # type: ignore[override]
        """The effect parameter that was given (set to its null value by :meth:`null`)."""
        return next(k for k in EFFECTS if self._p[k] is not None)

    def null_value(self) -> float:
        return 0.0 if self.effect_param == "risk_difference" else 1.0

    @property
    def nominal_p1(self) -> float:
        """The treatment risk the effect gives at ``p0`` (with no cluster variation)."""
        return risk_from_effect(self.p0, odds_ratio=self._p["odds_ratio"], risk_ratio=self._p["risk_ratio"],
                                risk_difference=self._p["risk_difference"])


class BinaryTwoArm(OneBinaryEffect, TwoArms, Process):
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

    def _check(self):
        check_missing_columns(self.missing, {"arm"}, self.name)
        self._check_effect()
        self._check_arms()

    # -- derived ---------------------------------------------------------
    @property
    def p1(self) -> float:
        return self.nominal_p1

    @property
    def estimand_label(self) -> str:
        return self.estimand.replace("_", " ")

    def true_effect(self) -> float:
        p0, p1 = self.p0, self.p1
        if self.estimand == "log_odds_ratio":
            return math.log(p1 / (1 - p1)) - math.log(p0 / (1 - p0))
        if self.estimand == "log_risk_ratio":
            return math.log(p1 / p0)
        return p1 - p0

    def facts(self):
        """:class:`~simpower.facts.BinaryFacts` (``ratio`` the realised n1 / n0); none with missing outcomes."""
        if self.missing is not None:
            return ()
        return (BinaryFacts(p0=self.p0, p1=self.p1, n=self.n, ratio=self.n1 / self.n),)

    # -- drawing -----------------------------------------------------------
    def draw_batch(self, rng, size):
        n0, n1 = self.n, self.n1
        u = rng.random((size, n0 + n1))
        y = np.empty_like(u)
        np.less(u[:, :n0], self.p0, out=y[:, :n0])
        np.less(u[:, n0:], self.p1, out=y[:, n0:])
        arm = self.arm_labels()
        per_rep = {"y": y}
        info = self.arm_info()
        apply_missing(self.missing, rng, y, {"arm": arm}, per_rep, info)
        return Batch(size, per_rep, {"arm": arm}, info=info)

    def describe(self):
        given = self.effect_param
        miss = f"; missing outcomes: {self.missing.describe()}" if self.missing is not None else ""
        return (f"{self.arms_text()}, binary outcome with event "
                f"risks {self.p0:g} (control) and {self.p1:.4g} (treatment; {given} = {self._p[given]:g}), "
                f"participants independent{miss}")
