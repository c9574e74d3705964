"""The ``visits`` design of ``trial``: two arms, every participant measured at the same visits.

Participant i (arm a) is measured at visits j = 0 .. k-1. The design draws
standard normal scores ``z_i`` with an exchangeable (``corr(z_j, z_l) = rho``)
or AR(1) (``rho^|j - l|``) correlation matrix; ``trial`` turns them into
outcomes through the outcome's quantile function, ``y = F^{-1}(Phi(z))`` (a
Gaussian copula, as the ``clusters`` design does), so every visit has the
distribution ``outcome`` says and ``rho`` is the correlation of the normal
scores (for a normal outcome, of the outcomes themselves).

The treatment effect builds over the visits: at visit j the treated rows get
``effect`` (in the units ``effect_type`` says) times a weight ``g_j``, the
design's effect profile (:func:`effect_profile`). With t_j the time since
randomisation (t_j = j with a baseline visit, j + 1 without):

* ``effect_shape = "final"``: g_j = t_j / t_final, so ``effect`` is the
  difference at the final visit, reached linearly;
* ``"constant"``: g_j = 1 at every visit after randomisation (0 at baseline);
* ``"slope"``: g_j = t_j, so ``effect`` is gained per visit.

``effect_type = "shift"`` adds ``effect * g_j``, ``"d"`` adds
``effect * sd * g_j``, ``"ratio"`` multiplies by ``effect ** g_j`` (the log
ratio grows as the profile). With a baseline (visit 0 before randomisation)
g_0 = 0, the baseline outcome is repeated on every row of the participant in
the ``baseline`` column, and visit 0 is never missing: a missingness
mechanism sees the post-baseline rows only, except ``dropout``
(:mod:`simpower.processes.dropout`), which sees every visit (it needs the
previous one) and never hides visit 0.

Rows are ordered by arm (control first), participant, visit; columns ``arm``,
``subject`` (unique across arms), ``visit`` shared by the replicates: the
``longitudinal`` layout the repeated-measures analyses read.
"""

from __future__ import annotations

import numpy as np

from .._validation import Bool, Choice, Int, Real
from ..errors import ParameterError
from ..facts import RepeatedFacts
from .composed import Design
from .design import ARM_DEFAULTS, ARM_PARAMS, TwoArms
from .dropout import Dropout, VisitSeries
from .outcomes import Normal

CORRELATION = Choice(("exchangeable", "ar1"))
RHO = Real(-1.0, 1.0, low_open=True, high_open=True)
EFFECT_SHAPE = Choice(("final", "constant", "slope"))


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


def check_correlation(kind: str, rho: float, k: int) -> np.ndarray:
    """The Cholesky factor of the correlation matrix; a one-line ParameterError naming ``rho`` when it has none."""
    if kind == "exchangeable" and rho <= -1.0 / (k - 1):
        raise ParameterError(
            f"`rho` must be > -1/(visits - 1) = {-1.0 / (k - 1):.4g} for an exchangeable correlation over "
            f"{k} visits (else the correlation matrix is not positive definite); got {rho:g}."
        )
    try:
        return np.linalg.cholesky(correlation_matrix(kind, rho, k))
    except np.linalg.LinAlgError:
        raise ParameterError(
            f"`rho` = {rho:g} gives a correlation matrix that is not numerically positive definite; "
            "move it away from the boundary."
        ) from None


def describe_correlation(kind: str, rho: float) -> str:
    return (f"exchangeable correlation {rho:g}" if kind == "exchangeable"
            else f"AR(1) correlation {rho:g} between adjacent visits")


class Visits(TwoArms, Design):
    """Two arms of participants, each measured at ``visits`` visits with correlated normal scores.

    Parameters
    ----------
    n : int >= 2
        Participants in the control arm (the required-n search varies it).
    ratio : float > 0, default 1
        Treatment over control participants; ``n1`` gives the treatment arm
        directly, ``sizes = [n0, n1]`` both (the two-arm vocabulary).
    visits : int >= 2
        Visits 0 .. visits-1.
    correlation : {"exchangeable", "ar1"}, default "exchangeable"
    rho : float in (-1, 1)
        Correlation of the normal scores: exchangeable needs
        ``rho > -1/(visits - 1)``. Also accepted as ``corr``.
    baseline : bool, default true
        Visit 0 is a baseline before randomisation (no effect, never missing,
        repeated in the ``baseline`` column).
    effect_shape : {"final", "constant", "slope"}, default "final"
        How ``trial``'s ``effect`` builds over the visits (see the module).
    """

    name = "visits"
    aliases = {"corr": "rho"}
    params = {**ARM_PARAMS, "visits": Int(low=2), "correlation": CORRELATION, "rho": RHO, "baseline": Bool(),
              "effect_shape": EFFECT_SHAPE}
    defaults = {**ARM_DEFAULTS, "correlation": "exchangeable", "baseline": True, "effect_shape": "final"}

    def _check(self):
        object.__setattr__(self, "_chol", check_correlation(self.correlation, self.rho, self.visits))
        self._check_arms()

    def __setstate__(self, state):
        super().__setstate__(state)
        self._check()

    @property
    def columns(self) -> frozenset[str]:  # type: ignore[override]
        """The columns a missingness mechanism may use: ``arm``, ``subject``, ``visit`` (and ``baseline``)."""
        return frozenset({"arm", "subject", "visit"} | ({"baseline"} if self.baseline else set()))

    @property
    def corr_matrix(self) -> np.ndarray:
        """The visits x visits correlation matrix of the normal scores."""
        return correlation_matrix(self.correlation, self.rho, self.visits)

    @property
    def profile(self) -> np.ndarray:
        """The effect's weights g_j at visits 0 .. visits-1."""
        return effect_profile(self.effect_shape, self.visits, self.baseline)

    @property
    def final_weight(self) -> float:
        """g at the final visit: the estimand is the effect there."""
        return float(self.profile[-1])

    def draw(self, rng, size, latent=True):
        n_sub, k = self.total, self.visits
        z = rng.standard_normal((size, n_sub, k)) @ self._chol.T
        arm_sub = self.arm_labels()
        shared = {"arm": np.repeat(arm_sub, k), "subject": np.repeat(np.arange(n_sub), k),
                  "visit": np.tile(np.arange(k), n_sub)}
        return {"z": z.reshape(size, n_sub * k), "width": n_sub * k, "arm": shared["arm"], "shared": shared,
                "per_rep": {}, "present": None, "info": {**self.arm_info(), "visits": k},
                "covariates": dict(shared), "effect_weight": np.tile(self.profile, n_sub),
                "missing_rows": shared["visit"] > 0 if self.baseline else None}

    def outcome_columns(self, y: np.ndarray) -> dict[str, np.ndarray]:
        """Columns computed from the complete outcomes: ``baseline`` (visit 0 on every row of the participant)."""
        if not self.baseline:
            return {}
        k = self.visits
        return {"baseline": np.repeat(y[:, ::k], k, axis=1)}

    # -- hooks of trial ----------------------------------------------------------------------------
    has_visits = True

    @staticmethod
    def effect_rows(x, weight, outcome, effect, effect_type):
        """The treated rows with the effect at each row's visit weight (:func:`effect_by_visit`)."""
        return effect_by_visit(x, outcome, effect, effect_type, weight)

    @staticmethod
    def true_effect_at(weight, outcome, effect, effect_type):
        return true_effect_at(weight, outcome, effect, effect_type)

    def series(self, trial) -> VisitSeries:
        """The model of the visits a dropout mechanism reads: correlation, arms, how outcomes are standardised."""
        k, outcome, g = self.visits, trial.outcome, self.profile[: self.visits - 1]
        effect, effect_type = trial.effect, trial.effect_type
        if isinstance(outcome, Normal) and effect_type in ("shift", "d"):
            sd = outcome.sd
            per_sd = effect if effect_type == "shift" else effect * sd

            def arm_scores(a):  # the normal scores plus the arm's mean difference in SD units
                return lambda z: z + a * per_sd * g / sd
        else:
            centre, scale = outcome.mean, outcome.sd

            def arm_scores(a):
                def standardise(z):
                    y = np.asarray(outcome.from_normal(z), dtype=float)
                    if a:
                        y = effect_by_visit(y, outcome, effect, effect_type, g)
                    return (y - centre) / scale
                return standardise
        return VisitSeries(visits=k, corr=self.corr_matrix, arms=((self.n0, arm_scores(0)), (self.n1, arm_scores(1))),
                           centre=float(outcome.mean), scale=float(outcome.sd),
                           rows=np.tile(np.arange(k), self.total) > 0 if self.baseline else None)

    def bind_missing(self, missing, trial):
        return missing.bind(self.series(trial)) if isinstance(missing, Dropout) else missing

    def trial_facts(self, trial):
        """:class:`~simpower.facts.RepeatedFacts` for a normal outcome (shift or d) with no missing outcomes or
        dropout completely at random; else none."""
        missing = trial.missing
        if not isinstance(trial.outcome, Normal) or trial.effect_type == "ratio":
            return ()
        if missing is None:
            retention = np.ones(self.visits)
        elif isinstance(missing, Dropout) and not missing.mar and missing.intermittent is None:
            retention = trial._missing_step.retention()
        else:
            return ()
        cov = trial.outcome.sd**2 * self.corr_matrix
        return (RepeatedFacts(effect=trial.true_effect(), n=self.n0, cov=tuple(map(tuple, cov.tolist())),
                              retention=tuple(retention.tolist()), structure=self.correlation,
                              ratio=self.n1 / self.n0),)

    def describe_profile(self) -> str:
        return {"final": "reached linearly by the final visit",
                "constant": "at every visit after randomisation",
                "slope": "gained per visit"}[self.effect_shape]

    def describe(self):
        base = " (visit 0 a baseline before randomisation)" if self.baseline else ""
        return (f"{self.arms_text('participants')}, {self.visits} visits{base}, "
                f"{describe_correlation(self.correlation, self.rho)} of the normal scores; the effect is "
                f"{self.describe_profile()}")


def effect_by_visit(x: np.ndarray, outcome, effect: float, effect_type: str, weight: np.ndarray) -> np.ndarray:
    """The treated rows ``x`` (replicates, rows) with the effect at each row's visit weight ``weight`` (rows,)."""
    if effect_type == "ratio":
        return x * effect**weight
    if effect_type == "d":
        return x + effect * outcome.sd * weight
    return x + effect * weight


def true_effect_at(weight: float, outcome, effect: float, effect_type: str) -> float:
    """Treatment minus control difference in mean outcome where the effect's weight is ``weight``."""
    if effect_type == "shift":
        return float(effect * weight)
    if effect_type == "d":
        return float(effect * outcome.sd * weight)
    return float(outcome.mean * (effect**weight - 1.0))
