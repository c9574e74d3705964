"""What ``survival_two_arm`` and the ``time_to_event`` outcome layer of ``trial`` share.

The fields (median or hazard0, shape, hazard_ratio, accrual, follow_up, loss to follow-up,
time_resolution) mean the same in both; :class:`SurvivalRules` holds their checks, the control
rate, the loss rate, the probability of a seen event and the analytic facts, and :func:`censor`
the censoring step of the draws (administrative censoring at the end of follow-up, loss to
follow-up, rounding of the times).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate

from ..errors import ParameterError
from ..facts import SurvivalFacts


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


class SurvivalRules:
    """What ``survival_two_arm`` and the ``time_to_event`` outcome layer share (same fields, same meaning):
    the fields' checks, the control rate, the loss rate, the probability of a seen event and the facts."""

    def _check_survival(self):
        """The rules of the fields: one of median / hazard0, one way of stating loss to follow-up."""
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

    def distribution_text(self) -> str:
        """The event-time distribution in words."""
        return "exponential" if self.shape == 1 else f"Weibull (shape {self.shape:g})"

    def censoring_text(self) -> str:
        """Accrual and censoring in words ("no censoring" when there is none)."""
        cens = []
        if self.accrual > 0:
            cens.append(f"uniform accrual over {self.accrual:g}")
        if self.follow_up is not None:
            cens.append(f"administrative censoring {self.follow_up:g} after accrual closes")
        if self.loss_rate > 0:
            cens.append(f"exponential loss to follow-up at rate {self.loss_rate:.4g} per unit time")
        return ", ".join(cens) if cens else "no censoring"

    def survival_facts(self, n0: int, n1: int) -> tuple:
        """:class:`~simpower.facts.SurvivalFacts` for arms of ``n0`` and ``n1``: the hazard ratio at the expected
        number of events."""
        events = n0 * self.event_probability(0) + n1 * self.event_probability(1)
        return (SurvivalFacts(hazard_ratio=self.hazard_ratio, events=events, n=n0, ratio=n1 / n0),)
