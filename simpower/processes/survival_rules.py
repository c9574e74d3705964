"""What ``survival_two_arm`` and the ``time_to_event`` outcome layer of ``trial`` share.

The fields (median or hazard0, shape, hazard_ratio, accrual, follow_up, loss to follow-up,
time_resolution) mean the same in both; :class:`SurvivalRules` holds their checks, the control
rate, the loss rate, the probability of a seen event and the analytic facts, and :func:`censor_drawn`
the censoring step of the draws (administrative censoring at the end of follow-up, loss to
follow-up, rounding of the times), done in place.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate

from ..errors import ParameterError
from ..facts import SurvivalFacts


#: cells (replicates x rows) of one block of the censoring step: its scratch arrays stay in cache
CENSOR_BLOCK_CELLS = 1 << 14


def contiguous(mask: np.ndarray):
    """``mask`` (1-D bool) as a slice when its True entries are one run of columns, else the mask itself.

    Indexing with the slice gives views (in-place arithmetic, no gather and scatter) and the same cells.
    """
    idx = np.flatnonzero(mask)
    if idx.size and idx[-1] - idx[0] + 1 == idx.size:
        return slice(int(idx[0]), int(idx[-1]) + 1)
    return mask


def censor_drawn(t, u_entry, rng, spec, scale=None):
    """Censor event times in place, drawing the loss variates as it goes: ``(time, event, entry)``.

    ``t`` holds the standard exponential event variates and ``u_entry`` the uniform entry variates
    (both (R, N), drawn before; they become ``time`` and ``entry``); ``u_entry`` None (only when
    ``accrual`` is 0) has this draw them in blocks and throw them away, since every entry is then 0.
    Then it draws the (R, N) standard exponential loss variates from ``rng``, always (so the stream
    does not depend on the censoring settings). ``scale(block, rows)`` (optional) turns a block of
    event variates (rows ``rows`` of ``t``) into event times in place. ``spec`` gives ``accrual``,
    ``follow_up``, ``loss_rate`` and ``time_resolution`` (:class:`SurvivalTwoArm`, or the
    ``time_to_event`` layer).

    Element by element this is the arithmetic of the whole-array form (and its numbers, bit for
    bit): ``entry = accrual * u``; ``cens = accrual + follow_up - entry`` (inf without follow-up),
    lowered to ``e_loss / loss_rate`` with loss; ``event = t <= cens`` (int8); ``time = min(t,
    cens)``, rounded up to ``time_resolution``. It runs over blocks of replicates, so that the
    censoring times and loss variates live in small scratch arrays, never in (R, N) ones: the
    loss variates are drawn block by block in the order of the whole-array draw (the generator's
    stream is the same in pieces). ``entry`` is the calendar time of enrolment (the
    group-sequential looks at event counts need it).
    """
    size, width = t.shape
    accrual, follow_up, rate, res = spec.accrual, spec.follow_up, spec.loss_rate, spec.time_resolution
    rows = max(1, CENSOR_BLOCK_CELLS // max(width, 1))
    loss = np.empty((min(rows, size), width))
    if u_entry is None:  # no accrual: the entry variates are drawn (the stream) but every entry is 0 * u = 0
        for r0 in range(0, size, rows):
            rng.random(out=loss[: min(size, r0 + rows) - r0])
        entry = np.zeros((size, width)) if math.copysign(1.0, accrual) > 0 else np.full((size, width), -0.0)
    else:
        entry = np.multiply(u_entry, accrual, out=u_entry)
    end = None if follow_up is None else accrual + follow_up  # the study's end: cens = end - entry
    event = np.empty((size, width), bool)
    cens = np.empty_like(loss) if end is not None and rate > 0 and accrual > 0 else None
    for r0 in range(0, size, rows):
        r1 = min(size, r0 + rows)
        tb, lb = t[r0:r1], loss[: r1 - r0]
        rng.standard_exponential(out=lb)  # loss variates of these replicates (drawn whatever the settings)
        if scale is not None:
            scale(tb, slice(r0, r1))
        if rate > 0:
            lb /= rate
            if end is None:
                cb = lb
            elif accrual > 0:
                cb = np.subtract(end, entry[r0:r1], out=cens[: r1 - r0])
                np.minimum(cb, lb, out=cb)
            else:  # no accrual: every entry is 0 and the end of follow-up is one number
                cb = np.minimum(lb, end, out=lb)
        elif end is None:
            cb = math.inf  # no censoring
        elif accrual > 0:
            cb = np.subtract(end, entry[r0:r1], out=lb)
        else:
            cb = end
        np.less_equal(tb, cb, out=event[r0:r1])
        np.minimum(tb, cb, out=tb)
        if res is not None:
            tb /= res
            np.ceil(tb, out=tb)
            tb *= res
    return t, event.view(np.int8), entry


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
