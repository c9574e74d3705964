"""Two-arm repeated measures: correlated normal visits, an effect that builds over time, dropout.

Subject i in arm a has outcomes ``y_ij = a * effect * g_j + sd * z_ij`` at
visits j = 0 .. k-1, with ``z_i`` multivariate normal with an exchangeable
(``corr(z_j, z_l) = rho``) or AR(1) (``rho^|j - l|``) correlation matrix.
``g_j`` is the effect's time profile (see :class:`RepeatedMeasures`).

Dropout is monotone: a subject seen at visit j - 1 drops out before visit j
(j >= 1; visit 0 is always seen) with probability h_j, and is missing from then
on. ``h_j`` is a constant hazard, or, for dropout at random (MAR), a logistic
function of the subject's last observed outcome,
``logit h_j = a0 + dropout_mar_slope * y_{i,j-1} / sd``, with ``a0`` solved so
that the expected share missing at the final visit (both arms pooled) is
``dropout_rate``. That share is an integral over the normal visits, computed
deterministically with unscrambled Sobol points (no random numbers involved).

The process is a name over the composed layers: ``trial`` with the ``visits``
design (:mod:`simpower.processes.visits`), a normal outcome (mean 0, SD
``sd``) and the ``dropout`` mechanism (:mod:`simpower.processes.dropout`,
``dropout_rate`` -> ``rate``, ``dropout_hazard`` -> ``hazard``,
``dropout_mar_slope`` -> ``mar_slope``, ``missing`` -> ``intermittent``). It
keeps its fields, defaults, spec, description and facts, and draws the same
numbers as before the layers existed (:meth:`RepeatedMeasures.composed` gives
the equivalent ``trial``).
"""

from __future__ import annotations

import numpy as np

from .._validation import Bool, Choice, Int, Real
from ..components import Nested
from ..errors import ParameterError
from ..facts import RepeatedFacts
from .base import Process, check_missing_columns
from .composed import Trial
from .design import TwoArms, arm_defaults, arm_params
from .dropout import CALIBRATION_LOG2 as _CALIBRATION_LOG2  # noqa: F401 - kept importable
from .dropout import Dropout
from .outcomes import Normal
from .visits import Visits, correlation_matrix, effect_profile  # noqa: F401 - kept importable from here

POSITIVE = Real(0.0, low_open=True)
RATE = Real(0.0, 1.0, high_open=True, optional=True)


class RepeatedMeasures(TwoArms, Process):
    """Two arms, each subject measured at ``visits`` visits, with optional monotone dropout.

    Parameters
    ----------
    n : int >= 2
        Subjects in the control arm (the required-n search varies it).
    ratio : float > 0
        Treatment over control subjects; the treatment arm has ``round(ratio * n)``.
    n1 : int >= 2, optional
        Subjects in the treatment arm, given directly instead of ``ratio``
        (``sizes = [n0, n1]`` gives both arms at once).
    visits : int >= 2
        Visits 0 .. visits-1.
    correlation : {"exchangeable", "ar1"}
        Within-subject correlation between visits.
    rho : float
        Correlation parameter: exchangeable needs ``rho > -1/(visits - 1)``,
        AR(1) ``|rho| < 1`` (otherwise the matrix is not positive definite).
        Also accepted as ``corr`` (the name other processes use for a
        correlation between two measurements of one participant).
    sd : float > 0
        SD of an outcome at every visit.
    effect : float
        Treatment minus control mean difference at the final visit, except for
        ``effect_shape = "slope"`` where it is the difference gained per visit.
    effect_shape : {"final", "constant", "slope"}
        With t_j the time since randomisation (t_j = j with a baseline visit,
        j + 1 without): "final" ramps linearly, difference ``effect * t_j / t_final``;
        "constant" is ``effect`` at every post-baseline visit; "slope" is
        ``effect * t_j``.
    baseline : bool
        Visit 0 is a pre-randomisation baseline (no effect). Its value is
        repeated on every row of the subject in the ``baseline`` column.
    dropout_rate : float in [0, 1), optional
        Expected share of subjects missing at the final visit. With a
        constant hazard, ``h = 1 - (1 - dropout_rate)^(1 / (visits - 1))``;
        with ``dropout_mar_slope`` the intercept is calibrated to it.
    dropout_hazard : float in [0, 1), optional
        Per-visit dropout probability instead (P(dropped by visit j) =
        1 - (1 - h)^j); with ``dropout_mar_slope``, the hazard of a subject whose
        last outcome equals the control mean (0).
    dropout_mar_slope : float
        Log-odds of dropping out per SD of the last observed outcome (MAR
        dropout); 0 gives dropout completely at random.
    missing : missingness, optional
        A further (e.g. intermittent) missingness mechanism applied after
        dropout to the post-baseline visits (all visits without a baseline);
        its ``mask`` gets covariates ``arm``, ``visit``, ``subject`` and
        ``baseline`` (when present) of those rows.

    Notes
    -----
    Long table (rows by arm, subject, visit): ``y`` (NaN when missing),
    ``arm``, ``subject`` (unique across arms), ``visit``, ``baseline`` (when
    ``baseline`` is true) and ``observed`` (when there is dropout or missingness).
    :meth:`true_effect` is the treatment minus control difference at the final visit.
    """

    name = "repeated_measures"
    aliases = {"corr": "rho"}
    params = arm_params({
        "n": Int(low=2),
        "ratio": POSITIVE,
        "visits": Int(low=2),
        "correlation": Choice(("exchangeable", "ar1")),
        "rho": Real(-1.0, 1.0, low_open=True, high_open=True),
        "sd": POSITIVE,
        "effect": Real(),
        "effect_shape": Choice(("final", "constant", "slope")),
        "baseline": Bool(),
        "dropout_rate": RATE,
        "dropout_hazard": RATE,
        "dropout_mar_slope": Real(),
        "missing": Nested("missingness", optional=True),
    })
    defaults = arm_defaults({"ratio": 1.0, "correlation": "exchangeable", "sd": 1.0, "effect": 0.0,
                             "effect_shape": "final", "baseline": True, "dropout_rate": None,
                             "dropout_hazard": None, "dropout_mar_slope": 0.0, "missing": None})

    def _check(self):
        cols = {"arm", "subject", "visit"} | ({"baseline"} if self.baseline else set())
        check_missing_columns(self.missing, cols, self.name)
        design = Visits(n=self.n, ratio=self.ratio, n1=self._p["n1"], visits=self.visits, correlation=self.correlation,
                        rho=self.rho, baseline=self.baseline, effect_shape=self.effect_shape)
        if self.dropout_rate is not None and self.dropout_hazard is not None:
            raise ParameterError("`dropout_hazard` and `dropout_rate` both given: give one of them.")
        if self.dropout_mar_slope != 0 and self.dropout_rate is None and self.dropout_hazard is None:
            raise ParameterError(
                "`dropout_mar_slope` needs `dropout_rate` (share missing at the final visit) or "
                "`dropout_hazard` (hazard at the control mean) to fix the amount of dropout."
            )
        missing = self.missing
        if self.has_dropout:
            missing = Dropout(rate=self.dropout_rate, hazard=self.dropout_hazard, mar_slope=self.dropout_mar_slope,
                              intermittent=self.missing)
        trial = Trial(design=design, outcome=Normal(mean=0.0, sd=self.sd), effect=self.effect, missing=missing)
        object.__setattr__(self, "_trial", trial)

    def __setstate__(self, state):
        super().__setstate__(state)
        self._check()

    def composed(self) -> Trial:
        """The equivalent ``trial``: the ``visits`` design, a normal outcome, the ``dropout`` mechanism."""
        return self._trial

    # -- facts -------------------------------------------------------------
    @property
    def corr_matrix(self) -> np.ndarray:
        return self._trial.design.corr_matrix

    @property
    def profile(self) -> np.ndarray:
        return self._trial.design.profile

    @property
    def mar(self) -> bool:
        return self.dropout_mar_slope != 0

    @property
    def has_dropout(self) -> bool:
        return bool(self.dropout_rate) or bool(self.dropout_hazard)

    @property
    def _dropout(self):
        """The bound dropout step of the composed trial (None without dropout)."""
        return self._trial._missing_step if self.has_dropout else None

    @property
    def hazard(self) -> float:
        """The constant per-visit dropout hazard (dropout completely at random)."""
        if self.dropout_hazard is not None:
            return self.dropout_hazard
        if self.dropout_rate is None:
            return 0.0
        return 1.0 - (1.0 - self.dropout_rate) ** (1.0 / (self.visits - 1))

    @property
    def mar_intercept(self) -> float:
        """``a0`` of the MAR dropout hazard logit h_j = a0 + slope * y_{j-1} / sd."""
        step = self._dropout
        if step is not None and step.intercept is not None:
            return step.intercept
        if step is not None and self.dropout_rate:  # dropout completely at random: the same calibration, slope 0
            return step._calibrate(self.dropout_rate)
        from scipy import special

        return float(special.logit(self.dropout_hazard or 0.0))

    def expected_final_missing(self, intercept: float | None = None) -> float:
        """Expected share of subjects (both arms) missing at the final visit through dropout."""
        if not self.has_dropout:
            return 0.0
        return self._dropout.expected_final_missing(intercept)

    def facts(self):
        """:class:`~simpower.facts.RepeatedFacts` with dropout completely at random (or none); else none."""
        if self.mar or self.missing is not None:
            return ()
        k = self.visits
        cov = self.sd**2 * self.corr_matrix
        retention = (1.0 - self.hazard) ** np.arange(k)
        return (RepeatedFacts(effect=self.true_effect(), n=self.n, cov=tuple(map(tuple, cov.tolist())),
                              retention=tuple(retention.tolist()), structure=self.correlation,
                              ratio=self.n1 / self.n),)

    # -- draws ---------------------------------------------------------------
    def draw_batch(self, rng, size):
        return self._trial.draw_batch(rng, size)

    # -- words -----------------------------------------------------------
    def true_effect(self):
        return float(self.effect * self.profile[-1])

    def describe(self):
        corr = (f"exchangeable correlation {self.rho:g}" if self.correlation == "exchangeable"
                else f"AR(1) correlation {self.rho:g} between adjacent visits")
        shape = {"final": f"rising linearly to {self.effect:g} at the final visit",
                 "constant": f"{self.effect:g} at every visit after randomisation",
                 "slope": f"{self.effect:g} per visit ({self.true_effect():g} at the final visit)"}[self.effect_shape]
        text = (f"{self.arms_text('subjects')}, {self.visits} visits"
                f"{' (visit 0 a baseline before randomisation)' if self.baseline else ''}, normal outcomes with "
                f"SD {self.sd:g} and {corr}; treatment minus control difference {shape}")
        if self.has_dropout:
            final = self.expected_final_missing()
            if self.mar:
                text += (f"; dropout at random (MAR): log-odds of leaving rise by {self.dropout_mar_slope:g} per SD "
                         f"of the last observed outcome, {final:.1%} expected missing at the final visit")
            else:
                text += (f"; dropout completely at random with hazard {self.hazard:.4g} per visit "
                         f"({final:.1%} missing at the final visit)")
        if self.missing is not None:
            text += f"; further missing outcomes: {self.missing.describe()}"
        return text
