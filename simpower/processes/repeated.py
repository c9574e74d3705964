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
"""

from __future__ import annotations


import numpy as np
from scipy import optimize, special, stats

from .._validation import Bool, Choice, Int, Real
from ..components import Nested
from ..errors import ParameterError
from ..facts import RepeatedFacts
from .base import Batch, Process, check_missing_columns
from .design import TwoArms, apply_missing, arm_defaults, arm_params

POSITIVE = Real(0.0, low_open=True)
RATE = Real(0.0, 1.0, high_open=True, optional=True)

#: Sobol points (2^13) used to calibrate the MAR dropout intercept
_CALIBRATION_LOG2 = 13


def correlation_matrix(kind: str, rho: float, k: int) -> np.ndarray:
    """The k x k exchangeable or AR(1) correlation matrix."""
    if kind == "exchangeable":
        r = np.full((k, k), rho)
        np.fill_diagonal(r, 1.0)
        return r
    lag = np.abs(np.subtract.outer(np.arange(k), np.arange(k)))
    return rho**lag


def effect_profile(shape: str, k: int, baseline: bool) -> np.ndarray:
    """Multipliers g_j of ``effect`` at visits 0..k-1 (time since randomisation t_j = j, or j + 1 without baseline)."""
    t = np.arange(k, dtype=float) + (0.0 if baseline else 1.0)
    if shape == "final":
        return t / t[-1]
    if shape == "constant":
        return (t > 0).astype(float)
    return t


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
        k = self.visits
        if self.correlation == "exchangeable" and self.rho <= -1.0 / (k - 1):
            raise ParameterError(
                f"`rho` must be > -1/(visits - 1) = {-1.0 / (k - 1):.4g} for an exchangeable correlation over "
                f"{k} visits (else the correlation matrix is not positive definite); got {self.rho:g}."
            )
        try:
            np.linalg.cholesky(self.corr_matrix)
        except np.linalg.LinAlgError:
            raise ParameterError(
                f"`rho` = {self.rho:g} gives a correlation matrix that is not numerically positive definite; "
                "move it away from the boundary."
            ) from None
        self._check_arms()
        if self.dropout_rate is not None and self.dropout_hazard is not None:
            raise ParameterError("`dropout_hazard` and `dropout_rate` both given: give one of them.")
        if self.dropout_mar_slope != 0 and self.dropout_rate is None and self.dropout_hazard is None:
            raise ParameterError(
                "`dropout_mar_slope` needs `dropout_rate` (share missing at the final visit) or "
                "`dropout_hazard` (hazard at the control mean) to fix the amount of dropout."
            )
        if self.mar and self.dropout_rate is not None and self.dropout_rate > 0:
            object.__setattr__(self, "_intercept", self._calibrate())

    # -- facts -------------------------------------------------------------
    @property
    def corr_matrix(self) -> np.ndarray:
        return correlation_matrix(self.correlation, self.rho, self.visits)

    @property
    def profile(self) -> np.ndarray:
        return effect_profile(self.effect_shape, self.visits, self.baseline)

    @property
    def mar(self) -> bool:
        return self.dropout_mar_slope != 0

    @property
    def has_dropout(self) -> bool:
        return bool(self.dropout_rate) or bool(self.dropout_hazard)

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
        if self.__dict__.get("_intercept") is None and self.dropout_rate is not None and self.dropout_rate > 0:
            object.__setattr__(self, "_intercept", self._calibrate())
        if self.__dict__.get("_intercept") is not None:
            return self.__dict__["_intercept"]
        return float(special.logit(self.dropout_hazard or 0.0))

    def expected_final_missing(self, intercept: float | None = None) -> float:
        """Expected share of subjects (both arms) missing at the final visit through dropout."""
        if not self.has_dropout:
            return 0.0
        if not self.mar:
            return 1.0 - (1.0 - self.hazard) ** (self.visits - 1)
        a0 = self.mar_intercept if intercept is None else intercept
        return self._mar_missing(a0)

    def _calibration_points(self) -> np.ndarray:
        """Deterministic standard-normal points (visits 0..k-2, correlated) for the dropout integral."""
        z = self.__dict__.get("_points")
        if z is None:
            k = self.visits
            u = stats.qmc.Sobol(k - 1, scramble=False).random_base2(_CALIBRATION_LOG2)[1:]  # drop the point 0
            z = stats.norm.ppf(u) @ np.linalg.cholesky(self.corr_matrix[: k - 1, : k - 1]).T
            object.__setattr__(self, "_points", z)
        return z

    def _mar_missing(self, a0: float) -> float:
        k = self.visits
        z = self._calibration_points()
        share = 0.0
        for weight, arm in ((self.n, 0), (self.n1, 1)):
            standardised = z + arm * self.effect * self.profile[: k - 1] / self.sd
            stay = special.expit(-(a0 + self.dropout_mar_slope * standardised))  # 1 - h
            share += weight * (1.0 - np.prod(stay, axis=1).mean())
        return share / (self.n + self.n1)

    def _calibrate(self) -> float:
        target = self.dropout_rate
        f = lambda a0: self._mar_missing(a0) - target  # noqa: E731
        lo, hi = -40.0, 40.0
        return float(optimize.brentq(f, lo, hi, xtol=1e-10))

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
        n0, n1, k = self.n, self.n1, self.visits
        n_sub = n0 + n1
        z = rng.standard_normal((size, n_sub, k)) @ np.linalg.cholesky(self.corr_matrix).T
        arm_sub = self.arm_labels()
        y = self.sd * z
        y[:, n0:, :] += self.effect * self.profile
        observed = None
        if self.has_dropout:
            u = rng.random((size, n_sub, k - 1))
            if self.mar:
                hazard = special.expit(self.mar_intercept + self.dropout_mar_slope * y[:, :, :-1] / self.sd)
            else:
                hazard = self.hazard
            stays = np.cumprod(u >= hazard, axis=2, dtype=np.int8)
            observed = np.concatenate([np.ones((size, n_sub, 1), bool), stays.astype(bool)], axis=2)
        shared = {"arm": np.repeat(arm_sub, k), "subject": np.repeat(np.arange(n_sub), k),
                  "visit": np.tile(np.arange(k), n_sub)}
        y = y.reshape(size, n_sub * k)
        per_rep = {}
        if observed is not None:
            observed = observed.reshape(size, n_sub * k)
        if self.baseline:
            per_rep["baseline"] = np.repeat(y[:, ::k], k, axis=1)
        info = {**self.arm_info(), "visits": k}
        # the ``missing`` component sees the post-baseline rows (all rows without a baseline visit);
        # visit 0 is always observed, so is the baseline column
        rows = shared["visit"] > 0 if self.baseline else np.ones(y.shape[1], bool)
        covariates = {**shared, **({"baseline": per_rep["baseline"]} if self.baseline else {})}
        apply_missing(self.missing, rng, y, covariates, per_rep, info, rows=rows, observed=observed)
        per_rep["y"] = y
        return Batch(size, per_rep, shared, info)

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
