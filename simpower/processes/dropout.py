"""Monotone dropout, a missingness mechanism for designs with visits (``dropout``).

A participant seen at visit j - 1 drops out before visit j (j >= 1; visit 0 is
always seen) with probability h_j, and is missing from then on. ``h_j`` is

* a constant hazard per visit: ``hazard`` directly, or from ``rate``, the
  expected share missing at the final visit: ``h = 1 - (1 - rate)^(1 / (k - 1))``
  over k visits (P(dropped by visit j) = 1 - (1 - h)^j, geometric survival);
* with ``mar_slope`` (dropout at random given the observed data, MAR): a
  logistic function of the participant's last observed outcome,
  ``logit h_j = a0 + mar_slope * (y_{j-1} - mu) / sd``, with mu and sd the
  control-arm outcome's mean and SD. ``hazard`` then is the hazard of a
  participant whose last outcome equals mu (``a0 = logit(hazard)``), or
  ``a0`` is solved so that the expected share missing at the final visit
  (both arms pooled) is ``rate``. That share is an integral over the design's
  visits, computed deterministically with unscrambled Sobol points (2^13 - 1
  of them; no random numbers involved).

These are the rules ``repeated_measures`` has always used for its
``dropout_rate``, ``dropout_hazard`` and ``dropout_mar_slope``; that process
now hands them to this mechanism.

``intermittent`` is a further mechanism (``mcar``, ``mar``, ``mnar``) applied
after the dropout, to the rows a design exposes to missingness (with a
baseline visit, the post-baseline visits), so one ``missing`` field holds
both. The design binds the mechanism to its model (:meth:`Dropout.bind`):
the visits, the correlation of their normal scores and how an outcome is
standardised; ``trial`` does that with its ``visits`` design. Unbound, the
mechanism reads the visits from the ``visit`` covariate and supports a
constant hazard only.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy import optimize, special, stats

from .._validation import Real
from ..components import Nested
from ..errors import ParameterError
from .base import Missingness
from .design import missing_mask

RATE = Real(0.0, 1.0, high_open=True, optional=True)

#: Sobol points (2^13) used to calibrate the MAR dropout intercept
CALIBRATION_LOG2 = 13


@dataclass(frozen=True, eq=False)
class VisitSeries:
    """What a design tells the dropout mechanism about its visits.

    visits
        k, the visits of every participant (rows ordered by participant, then visit 0 .. k-1).
    corr
        The k x k correlation matrix of the visits' normal scores.
    arms
        One (weight, standardise) pair per arm, in arm order: the arm's size, and a function taking
        normal scores (m, k-1) of visits 0 .. k-2 to that arm's standardised outcomes (y - centre) / scale.
    centre, scale
        The outcome's control-arm mean and SD: the MAR hazard reads (y - centre) / scale.
    rows
        The rows (over one replicate's columns) an ``intermittent`` mechanism sees; None: all.
    """

    visits: int
    corr: np.ndarray
    arms: tuple[tuple[int, Callable[[np.ndarray], np.ndarray]], ...]
    centre: float = 0.0
    scale: float = 1.0
    rows: np.ndarray | None = None


class Dropout(Missingness):
    """Monotone dropout over the visits: a constant hazard or dropout at random on the last outcome.

    Parameters
    ----------
    rate : float in [0, 1), optional
        Expected share of participants missing at the final visit.
    hazard : float in [0, 1), optional
        Per-visit dropout probability instead; with ``mar_slope``, the hazard
        of a participant whose last outcome equals the control mean.
    mar_slope : float, default 0
        Log-odds of dropping out per SD of the last observed outcome (MAR);
        0 gives dropout completely at random.
    intermittent : missingness, optional
        A further mechanism applied after the dropout to the rows the design
        exposes (the post-baseline visits when there is a baseline).
    """

    name = "dropout"
    params = {"rate": RATE, "hazard": RATE, "mar_slope": Real(),
              "intermittent": Nested("missingness", optional=True)}
    defaults = {"rate": None, "hazard": None, "mar_slope": 0.0, "intermittent": None}
    #: the mechanism needs a design with visits (``visit`` and ``subject`` columns)
    needs_visits = True
    #: the mechanism sees every visit (its hazard reads the previous one) and never hides visit 0
    whole_series = True

    def _check(self):
        if self.rate is not None and self.hazard is not None:
            raise ParameterError("`hazard` and `rate` both given: give one of them.")
        if self.rate is None and self.hazard is None:
            raise ParameterError("`rate` or `hazard` is required for dropout: give `rate` (share missing at the "
                                 "final visit) or `hazard` (per-visit probability).")
        if isinstance(self.intermittent, Dropout):
            raise ParameterError("`intermittent` must be a mechanism such as mcar, mar or mnar, not a second "
                                 "dropout: give one dropout.")

    @property
    def requires(self) -> tuple[str, ...]:
        """The covariates the ``intermittent`` mechanism reads."""
        return tuple(getattr(self.intermittent, "requires", ()))

    @property
    def mar(self) -> bool:
        return self.mar_slope != 0

    @property
    def active(self) -> bool:
        """Whether any participant can drop out (rate or hazard above 0)."""
        return bool(self.rate) or bool(self.hazard)

    def constant_hazard(self, visits: int) -> float:
        """The per-visit hazard of dropout completely at random over ``visits`` visits."""
        if self.hazard is not None:
            return self.hazard
        return 1.0 - (1.0 - self.rate) ** (1.0 / (visits - 1))

    def bind(self, series: VisitSeries) -> "BoundDropout":
        """The mechanism for one design's visits (calibrates the MAR intercept to ``rate``)."""
        return BoundDropout(self, series)

    def mask(self, rng, y, covariates=None):
        if self.mar:
            raise ParameterError("`mar_slope`: dropout at random needs the design's model of the visits; use "
                                 "the mechanism as `missing` of trial with a `visits` design (or repeated_measures).")
        covariates = covariates or {}
        if "visit" not in covariates:
            raise ParameterError("`missing` = dropout needs a design with visits (a `visit` column); this one has "
                                 f"{', '.join(sorted(covariates)) or 'none'}.")
        visit = _shared(covariates["visit"])
        k = int(visit.max()) + 1
        series = VisitSeries(visits=k, corr=np.eye(k), arms=())
        return BoundDropout(self, series).mask(rng, y, covariates)

    def describe(self):
        if self.hazard is not None:
            amount = f"hazard {self.hazard:g} per visit" + (" at the control mean" if self.mar else "")
        else:
            amount = f"{self.rate:.1%} expected missing at the final visit"
        kind = (f"at random (MAR): log-odds of leaving rise by {self.mar_slope:g} per SD of the last observed "
                "outcome" if self.mar else "completely at random")
        text = f"monotone dropout {kind}, {amount}"
        if self.intermittent is not None:
            text += f"; further missing outcomes: {self.intermittent.describe()}"
        return text


def _shared(values) -> np.ndarray:
    v = np.asarray(values)
    return v[0] if v.ndim == 2 else v


class BoundDropout:
    """A :class:`Dropout` bound to a design's visits: the calibrated hazard, and ``mask`` for ``apply_missing``."""

    whole_series = True

    def __init__(self, mechanism: Dropout, series: VisitSeries):
        self.mechanism = mechanism
        self.series = series
        self.intercept = None
        self._points = None
        if mechanism.mar:
            if mechanism.rate is not None and mechanism.rate > 0:
                self.intercept = self._calibrate(mechanism.rate)
            else:
                self.intercept = float(special.logit(mechanism.hazard or 0.0))

    @property
    def hazard(self) -> float:
        """The constant per-visit hazard (dropout completely at random)."""
        return self.mechanism.constant_hazard(self.series.visits)

    def expected_final_missing(self, intercept: float | None = None) -> float:
        """Expected share of participants (both arms) missing at the final visit through dropout."""
        if not self.mechanism.active:
            return 0.0
        if not self.mechanism.mar:
            return 1.0 - (1.0 - self.hazard) ** (self.series.visits - 1)
        return self._mar_missing(self.intercept if intercept is None else intercept)

    def retention(self) -> np.ndarray:
        """Share still observed at each visit under a constant hazard: (1 - h)^j."""
        return (1.0 - self.hazard) ** np.arange(self.series.visits)

    # -- the MAR calibration -------------------------------------------------------------------
    def _calibration_points(self) -> np.ndarray:
        """Deterministic standard-normal points (visits 0..k-2, correlated) for the dropout integral."""
        if self._points is None:
            k = self.series.visits
            u = stats.qmc.Sobol(k - 1, scramble=False).random_base2(CALIBRATION_LOG2)[1:]  # drop the point 0
            z = stats.norm.ppf(u) @ np.linalg.cholesky(self.series.corr[: k - 1, : k - 1]).T
            self._points = [(weight, standardise(z)) for weight, standardise in self.series.arms]
        return self._points

    def _mar_missing(self, a0: float) -> float:
        slope = self.mechanism.mar_slope
        share, total = 0.0, 0
        for weight, standardised in self._calibration_points():
            stay = special.expit(-(a0 + slope * standardised))  # 1 - h
            share += weight * (1.0 - np.prod(stay, axis=1).mean())
            total += weight
        return share / total

    def _calibrate(self, target: float) -> float:
        f = lambda a0: self._mar_missing(a0) - target  # noqa: E731
        return float(optimize.brentq(f, -40.0, 40.0, xtol=1e-10))

    # -- the draw --------------------------------------------------------------------------------
    def mask(self, rng, y, covariates=None):
        """True where the outcome is missing: dropped out, or hidden by the ``intermittent`` mechanism."""
        covariates = covariates or {}
        y = np.asarray(y, dtype=float)
        flat = y.reshape(1, -1) if y.ndim == 1 else y
        size, width = flat.shape
        k = self.series.visits
        n_sub = width // k
        if "visit" in covariates:
            visit = _shared(covariates["visit"])
            if width % k or not np.array_equal(visit, np.tile(np.arange(k), n_sub)):
                raise ValueError("dropout: rows must be ordered by participant, then visit 0 .. visits-1")
        hidden = np.zeros(flat.shape, bool)
        if self.mechanism.active:
            y3 = flat.reshape(size, n_sub, k)
            u = rng.random((size, n_sub, k - 1))
            if self.mechanism.mar:
                prev = y3[:, :, :-1]
                if self.series.centre != 0:
                    prev = prev - self.series.centre
                hazard = special.expit(self.intercept + self.mechanism.mar_slope * prev / self.series.scale)
            else:
                hazard = self.hazard
            stays = np.cumprod(u >= hazard, axis=2, dtype=np.int8)
            observed = np.concatenate([np.ones((size, n_sub, 1), bool), stays.astype(bool)], axis=2)
            hidden = ~observed.reshape(size, width)
        further = self.mechanism.intermittent
        if further is not None:
            hidden |= missing_mask(further, rng, flat, covariates, rows=self.series.rows)
        return hidden.reshape(y.shape)
