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

import numpy as np
from scipy import integrate

from .._validation import Int, Real
from ..errors import ParameterError
from ..facts import SurvivalFacts
from .base import Batch, Process
from .design import TwoArms, arm_defaults, arm_params

POSITIVE = Real(0.0, low_open=True)
OPT_POSITIVE = Real(0.0, low_open=True, optional=True)


def censor(t, u_entry, e_loss, spec):
    """Event times ``t`` censored at the end of follow-up and by loss to follow-up: ``(time, event, entry)``.

    ``u_entry`` are the uniform entry variates and ``e_loss`` the standard exponential loss variates
    (same shape as ``t``); ``spec`` gives ``accrual``, ``follow_up``, ``loss_rate`` and
    ``time_resolution`` (:class:`SurvivalTwoArm`, or the ``time_to_event`` layer). ``entry`` is the
    calendar time of enrolment (the group-sequential looks at event counts need it).
    """
    cens = np.full(t.shape, math.inf)
    if spec.follow_up is not None:
        cens = spec.accrual + spec.follow_up - spec.accrual * u_entry
    if spec.loss_rate > 0:
        np.minimum(cens, e_loss / spec.loss_rate, out=cens)
    event = (t <= cens).astype(np.int8)
    time = np.minimum(t, cens)
    if spec.time_resolution is not None:
        time = np.ceil(time / spec.time_resolution) * spec.time_resolution
    return time, event, spec.accrual * u_entry


class SurvivalTwoArm(TwoArms, Process):
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
        if (self.median is None) == (self.hazard0 is None):
            raise ParameterError("`median`, `hazard0`: give exactly one (the control-arm median survival or hazard).")
        if self.dropout_fraction is not None:
            if self.dropout_time is None:
                raise ParameterError("`dropout_time` is required with `dropout_fraction`: give the time (> 0) "
                                     "by which that fraction is lost.")
            if self.dropout_rate > 0:
                raise ParameterError("`dropout_rate`, `dropout_fraction`: give one way of stating loss to "
                                     "follow-up, not both.")
        elif self.dropout_time is not None:
            raise ParameterError("`dropout_time` needs `dropout_fraction` (in [0, 1)); or give `dropout_rate`.")
        self._check_arms()

    # -- derived ---------------------------------------------------------
    @property
    def rate0(self) -> float:
        """Control-arm rate ``lam`` of ``H0(t) = (lam t) ** shape``."""
        if self.hazard0 is not None:
            return self.hazard0
        return math.log(2.0) ** (1.0 / self.shape) / self.median

    @property
    def median0(self) -> float:
        """Control-arm median survival time."""
        return math.log(2.0) ** (1.0 / self.shape) / self.rate0

    @property
    def loss_rate(self) -> float:
        """Exponential loss-to-follow-up rate per unit time."""
        if self.dropout_fraction is not None:
            return -math.log1p(-self.dropout_fraction) / self.dropout_time
        return self.dropout_rate

    def null_value(self) -> float:
        return 1.0

    estimand_label = "log hazard ratio"

    def true_effect(self) -> float:
        return math.log(self.hazard_ratio)

    def event_probability(self, arm: int) -> float:
        """Probability that a participant of ``arm`` is seen to have the event.

        ``integral f(t) exp(-eta t) P(C >= t) dt`` with ``f`` the event
        density, ``eta`` the loss rate and ``C`` the administrative
        censoring time (uniform on [follow_up, accrual + follow_up]),
        computed by quadrature.
        """
        hr = self.hazard_ratio if arm == 1 else 1.0
        lam, k, eta = self.rate0, self.shape, self.loss_rate

        def dens(t):
            h = hr * k * lam * (lam * t) ** (k - 1.0) if t > 0 or k >= 1 else 0.0
            return h * math.exp(-hr * (lam * t) ** k - eta * t)

        if self.follow_up is None:
            return integrate.quad(dens, 0.0, math.inf, limit=200)[0]
        f, a = self.follow_up, self.accrual
        p = integrate.quad(dens, 0.0, f, limit=200)[0]
        if a > 0:
            p += integrate.quad(lambda t: dens(t) * (a + f - t) / a, f, a + f, limit=200)[0]
        return p

    def expected_events(self) -> float:
        """Expected number of observed events, both arms together."""
        return self.n * self.event_probability(0) + self.n1 * self.event_probability(1)

    def facts(self):
        """:class:`~simpower.facts.SurvivalFacts`: the hazard ratio at the expected number of events."""
        return (SurvivalFacts(hazard_ratio=self.hazard_ratio, events=self.expected_events(), n=self.n,
                              ratio=self.n1 / self.n),)

    # -- drawing -----------------------------------------------------------
    def draw_batch(self, rng, size):
        n0, n1 = self.n, self.n1
        m = n0 + n1
        arm = self.arm_labels()
        e_event = rng.standard_exponential((size, m))
        u_entry = rng.random((size, m))
        e_loss = rng.standard_exponential((size, m))
        e_event[:, n0:] /= self.hazard_ratio
        t = e_event if self.shape == 1 else e_event ** (1.0 / self.shape)
        t /= self.rate0
        time, event, entry = censor(t, u_entry, e_loss, self)
        return Batch(size, {"time": time, "event": event, "entry": entry}, {"arm": arm}, info=self.arm_info())

    def describe(self):
        dist = "exponential" if self.shape == 1 else f"Weibull (shape {self.shape:g})"
        cens = []
        if self.accrual > 0:
            cens.append(f"uniform accrual over {self.accrual:g}")
        if self.follow_up is not None:
            cens.append(f"administrative censoring {self.follow_up:g} after accrual closes")
        if self.loss_rate > 0:
            cens.append(f"exponential loss to follow-up at rate {self.loss_rate:.4g} per unit time")
        tail = "; " + ", ".join(cens) if cens else "; no censoring"
        return (f"{self.arms_text()}, {dist} event times with control "
                f"median {self.median0:.4g}, proportional hazards with hazard ratio {self.hazard_ratio:g}{tail}")
