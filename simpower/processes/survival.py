"""Time to event in two arms: exponential or Weibull proportional hazards, staggered entry, censoring.

Control-arm cumulative hazard ``H0(t) = (lam * t) ** shape`` (``shape = 1``:
exponential with hazard ``lam``); treatment arm ``H1(t) = hazard_ratio * H0(t)``
(proportional hazards). ``lam`` comes from ``hazard0`` or from the control
``median`` survival: ``lam = log(2) ** (1 / shape) / median``.

Participants enter uniformly over ``[0, accrual]``; the study ends
``follow_up`` time units after accrual closes, so a participant entering at
``e`` is administratively censored at ``accrual + follow_up - e`` (follow-up
from ``follow_up`` to ``accrual + follow_up``). Loss to follow-up is an
independent exponential time with rate ``dropout_rate`` (or the rate that
loses ``dropout_fraction`` of participants by ``dropout_time``:
``-log(1 - fraction) / time``).

The long table has columns ``time`` (from entry to event or censoring),
``event`` (1 event, 0 censored), ``arm`` (0 control, 1 treatment, control
rows first) and ``entry`` (calendar time of enrolment, ``accrual`` times the
uniform entry variate; the group-sequential looks at event counts need it).
"""

from __future__ import annotations

import math

from .._validation import Int, Real
from .design import TwoArms, arm_defaults, arm_params
from .factories import TrialFactory
from .survival_rules import SurvivalRules

POSITIVE = Real(0.0, low_open=True)
OPT_POSITIVE = Real(0.0, low_open=True, optional=True)


class SurvivalTwoArm(TwoArms, SurvivalRules, TrialFactory):
    """Two arms with right-censored event times under proportional hazards.

    Parameters
    ----------
    n : int >= 2
        Size of the control arm (arm 0).
    median : float > 0, optional
        Median survival in the control arm. Give this or ``hazard0``.
    hazard0 : float > 0, optional
        Control-arm hazard rate ``lam`` (the constant hazard when
        ``shape = 1``). Give this or ``median``.
    hazard_ratio : float > 0
        Treatment-over-control hazard ratio (1 = no effect). Default 1.
    shape : float > 0
        Weibull shape; 1 (default) is exponential, > 1 rising hazard.
    accrual : float >= 0
        Length of the uniform accrual period (0: everyone enters at time 0).
    follow_up : float > 0, optional
        Follow-up after accrual closes, at which everyone still at risk is
        censored. Omit for no administrative censoring.
    dropout_rate : float >= 0
        Exponential loss-to-follow-up rate per unit time. Default 0.
    dropout_fraction : float in [0, 1), optional
        Alternatively, the fraction lost to follow-up by ``dropout_time``
        (in the absence of events).
    dropout_time : float > 0, optional
        The time at which ``dropout_fraction`` is reached.
    time_resolution : float > 0, optional
        Record times rounded up to multiples of this (e.g. 1 for whole
        days), which creates ties. Omit for exact times.
    ratio : float > 0
        Allocation ratio; the treatment arm has ``round(ratio * n)``
        participants (at least 2).
    n1 : int >= 2, optional
        The treatment arm's size, given directly instead of ``ratio``
        (``sizes = [n0, n1]`` gives both arms at once).

    Notes
    -----
    :meth:`true_effect` is ``log(hazard_ratio)``, the estimand of ``cox``
    and of the log-rank analysis's one-step estimate. Every replicate draws,
    in this order, the standard exponential variates of the event times, the
    uniform entry times and the standard exponential variates of the dropout
    times, whatever the settings, so changing the censoring keeps the event
    times (common random numbers across a sweep).

    Examples
    --------
    An exponential control median of 12 is a hazard of log(2)/12; with 12
    of accrual and 12 of follow-up about 64% of control participants are seen
    to have the event:

    >>> p = SurvivalTwoArm(n=300, median=12, hazard_ratio=0.75, accrual=12, follow_up=12)
    >>> round(p.rate0, 5), round(p.event_probability(0), 3)
    (0.05776, 0.639)
    """

    name = "survival_two_arm"
    params = arm_params({
        "n": Int(low=2),
        "median": OPT_POSITIVE,
        "hazard0": OPT_POSITIVE,
        "hazard_ratio": POSITIVE,
        "shape": POSITIVE,
        "accrual": Real(0.0),
        "follow_up": OPT_POSITIVE,
        "dropout_rate": Real(0.0),
        "dropout_fraction": Real(0.0, 1.0, high_open=True, optional=True),
        "dropout_time": OPT_POSITIVE,
        "time_resolution": OPT_POSITIVE,
        "ratio": POSITIVE,
    })
    defaults = arm_defaults({"median": None, "hazard0": None, "hazard_ratio": 1.0, "shape": 1.0, "accrual": 0.0,
                "follow_up": None, "dropout_rate": 0.0, "dropout_fraction": None, "dropout_time": None,
                "time_resolution": None, "ratio": 1.0})
    effect_param = "hazard_ratio"
    size_param = "n"

    def _check(self):
        self._check_survival()
        self._check_arms()
        TrialFactory._check(self)  # the trial it draws through: arms x the time_to_event layer

    def layers(self):
        """The ``arms`` design times the ``time_to_event`` layer with these fields."""
        from .composed import Arms
        from .event_outcomes import SURVIVAL_FIELDS, TimeToEventOutcome

        return {"design": Arms(n=self.n, ratio=self.ratio, n1=self._p["n1"]),
                "outcome": TimeToEventOutcome(**{k: self._p[k] for k in SURVIVAL_FIELDS})}

    def null_value(self) -> float:
        return 1.0

    estimand_label = "log hazard ratio"

    def true_effect(self) -> float:
        return math.log(self.hazard_ratio)

    def expected_events(self) -> float:
        """Expected number of observed events, both arms together."""
        return self.n * self.event_probability(0) + self.n1 * self.event_probability(1)

    def facts(self):
        """:class:`~simpower.facts.SurvivalFacts`: the hazard ratio at the expected number of events."""
        return self.survival_facts(self.n, self.n1)

    def describe(self):
        dist, tail = self.distribution_text(), "; " + self.censoring_text()
        return (f"{self.arms_text()}, {dist} event times with control "
                f"median {self.median0:.4g}, proportional hazards with hazard ratio {self.hazard_ratio:g}{tail}")
