"""The two-period, two-sequence (AB/BA) crossover trial.

Every subject receives both treatments, one per period: sequence AB gets A (the
reference, ``treat`` 0) in period 1 and B (the test treatment, ``treat`` 1) in
period 2, sequence BA the other way round. On the analysis scale (the outcome for
``scale = "additive"``, its logarithm for ``"log"``) subject i in period k has

    x_ik = s_i + pi [k = 2] + tau [treatment B] + lambda [k = 2, sequence BA] + e_ik,

with the pair (x_i1, x_i2) bivariate normal: SD ``sd`` in each period and
correlation ``corr`` (so the within-subject SD is ``sd sqrt(1 - corr)`` and a
period difference has variance ``2 sd^2 (1 - corr)``). ``tau`` is the treatment
effect (B minus A), ``pi`` the period effect and ``lambda`` a first-order carryover
of B (given in period 1) into period 2; the carryover of A is taken as 0, so
``lambda`` is the differential carryover, the only part that matters to the
analyses (Jones & Kenward 2003, ch. 2). On the log scale the outcome is
``y = exp(x)``: lognormal, with ``effect``, ``period_effect`` and ``carryover``
given as ratios (their logarithms enter the model) and the spread as a CV.

Dropout after period 1: each subject misses period 2 with probability
``dropout_rate`` (completely at random), through the shared missingness step
(:func:`~simpower.processes.design.apply_missing`).
"""

from __future__ import annotations

import math

import numpy as np

from .._validation import Choice, Int, Real
from ..components import Nested
from ..errors import ParameterError
from ..facts import CrossoverFacts
from .base import Batch, Process, check_missing_columns
from .design import TwoArms, apply_missing, arm_defaults, arm_params

POSITIVE = Real(0.0, low_open=True, optional=True)
OPTIONAL = Real(optional=True)
SCALES = ("additive", "log")


class Crossover(TwoArms, Process):
    """AB/BA crossover: two sequences, two periods, each subject its own control.

    Parameters
    ----------
    n : int >= 2
        Subjects in sequence AB (A first). The required-n search varies it.
    ratio : float > 0, default 1
        Subjects in BA over subjects in AB; BA has ``round(ratio * n)``.
    n1 : int >= 2, optional
        Subjects in sequence BA, given directly (``sizes = [n_AB, n_BA]`` gives both).
    scale : {"additive", "log"}, default "additive"
        "additive": normal outcomes, effects as differences. "log": lognormal
        outcomes, effects as ratios, spread as a CV.
    effect : float, optional
        Treatment B minus A ("additive"; default 0), or the ratio of geometric
        means B / A ("log", > 0; default 1).
    sd : float > 0, optional
        "additive" only: SD of an outcome in each period (default 1).
    cv : float > 0, optional
        "log" only: CV of an outcome (as the ``lognormal`` outcome's ``cv``:
        ``sqrt(exp(sigma^2) - 1)``, sigma the SD of log y).
    cv_within : float > 0, optional
        "log" only, instead of ``cv``: the within-subject CV,
        ``sqrt(exp(sigma_w^2) - 1)`` with ``sigma_w = sigma sqrt(1 - corr)``.
    corr : float in (-1, 1), default 0.5
        Correlation between a subject's two periods (of log y on the log scale).
    period_effect : float, optional
        Period 2 minus period 1 (a ratio on the log scale); default none.
    carryover : float, optional
        First-order carryover of B, given in period 1, into the period-2 outcome
        (sequence BA): added ("additive") or a factor ("log"); default none.
    dropout_rate : float in [0, 1), default 0
        Probability that a subject misses period 2 (MCAR). Also accepted as ``dropout``.
    missing : missingness, optional
        A further mechanism (``mcar``, ``mar``, ``mnar``) applied after dropout to every
        outcome; its ``mask`` gets ``subject``, ``sequence``, ``period`` and ``treat``.

    Notes
    -----
    Long table (rows: period 1 of every subject, AB subjects first, then period 2
    in the same order): ``y``, ``subject``, ``sequence`` (0 = AB, 1 = BA),
    ``period`` (1, 2), ``treat`` (0 = A, 1 = B), and ``observed`` with dropout.
    :meth:`true_effect` is ``effect``: B minus A, or the ratio of geometric means.
    """

    name = "crossover"
    #: what the two "arms" of the sizes are, for the answer block
    arm_names = ("sequence AB", "sequence BA")
    aliases = {"dropout": "dropout_rate"}
    params = arm_params({
        "n": Int(low=2),
        "scale": Choice(SCALES),
        "effect": OPTIONAL,
        "sd": POSITIVE,
        "cv": POSITIVE,
        "cv_within": POSITIVE,
        "corr": Real(-1.0, 1.0, low_open=True, high_open=True),
        "period_effect": OPTIONAL,
        "carryover": OPTIONAL,
        "dropout_rate": Real(0.0, 1.0, high_open=True),
        "missing": Nested("missingness", optional=True),
    })
    defaults = arm_defaults({"scale": "additive", "effect": None, "sd": None, "cv": None, "cv_within": None,
                             "corr": 0.5, "period_effect": None, "carryover": None, "dropout_rate": 0.0,
                             "missing": None})

    def _check(self):
        self._check_arms()
        check_missing_columns(self.missing, {"subject", "sequence", "period", "treat"}, self.name)
        log = self.scale == "log"
        if log:
            if self.sd is not None:
                raise ParameterError("`sd` is for scale = 'additive'; on the log scale give `cv` or `cv_within`.")
            if (self.cv is None) == (self.cv_within is None):
                raise ParameterError("`cv` or `cv_within` is required for scale = 'log': give exactly one of them.")
            for field in ("effect", "period_effect", "carryover"):
                value = self._p[field]
                if value is not None and not value > 0:
                    raise ParameterError(f"`{field}` must be a ratio > 0 on the log scale (1 = none); got {value:g}.")
        else:
            for field in ("cv", "cv_within"):
                if self._p[field] is not None:
                    raise ParameterError(f"`{field}` is for scale = 'log'; on the additive scale give `sd`.")

    # -- the model on the analysis scale ------------------------------------------------------
    def null_value(self):
        return 1.0 if self.scale == "log" else 0.0

    def _on_scale(self, field: str) -> float:
        """A parameter on the analysis scale (its log for "log"); 0 when not given."""
        value = self._p[field]
        if value is None:
            return 0.0
        return math.log(value) if self.scale == "log" else float(value)

    @property
    def sigma(self) -> float:
        """SD of an outcome in one period on the analysis scale (of log y for "log")."""
        if self.scale == "additive":
            return 1.0 if self.sd is None else float(self.sd)
        if self.cv is not None:
            return math.sqrt(math.log1p(self.cv**2))
        return math.sqrt(math.log1p(self.cv_within**2) / (1.0 - self.corr))

    @property
    def sd_within(self) -> float:
        """SD of the within-subject error on the analysis scale: ``sigma sqrt(1 - corr)``."""
        return self.sigma * math.sqrt(1.0 - self.corr)

    @property
    def estimand_label(self) -> str:
        return "ratio of geometric means" if self.scale == "log" else "mean difference"

    def true_effect(self):
        return float(self.null_value() if self.effect is None else self.effect)

    def design_columns(self) -> dict[str, np.ndarray]:
        """The shared columns: ``subject``, ``sequence``, ``period``, ``treat`` (period 1 rows first)."""
        total = self.n0 + self.n1
        sequence = np.repeat(np.array([0, 1], dtype=np.int8), [self.n0, self.n1])
        period = np.repeat(np.array([1, 2], dtype=np.int8), total)
        seq = np.tile(sequence, 2)
        treat = np.where(period == 1, seq, 1 - seq).astype(np.int8)
        return {"subject": np.tile(np.arange(total), 2), "sequence": seq, "period": period, "treat": treat}

    def draw_batch(self, rng, size):
        total = self.n0 + self.n1
        z = rng.standard_normal((size, 2, total))
        r = self.corr
        x = np.empty((size, 2 * total))
        x[:, :total] = z[:, 0]
        x[:, total:] = r * z[:, 0] + math.sqrt(1.0 - r * r) * z[:, 1]
        x *= self.sigma
        shared = self.design_columns()
        tau, pi, lam = self._on_scale("effect"), self._on_scale("period_effect"), self._on_scale("carryover")
        x += tau * shared["treat"] + pi * (shared["period"] == 2)
        if lam:
            x[:, total + self.n0:] += lam           # period 2 of sequence BA
        y = np.exp(x) if self.scale == "log" else x
        per_rep, info = {"y": y}, {**self.arm_info(), "periods": 2}
        observed = None
        if self.dropout_rate > 0:
            stays = rng.random((size, total)) >= self.dropout_rate
            observed = np.concatenate([np.ones((size, total), bool), stays], axis=1)
        apply_missing(self.missing, rng, y, shared, per_rep, info, observed=observed)
        return Batch(size, per_rep, shared, info)

    # -- words and facts ---------------------------------------------------------------------
    def describe(self):
        log = self.scale == "log"
        unit = "ratio" if log else "difference"
        parts = [f"AB/BA crossover with {self.n0} subjects in sequence AB and {self.n1} in BA, two periods"]
        if log:
            cvw = math.sqrt(math.expm1(self.sd_within**2))
            parts.append(f"lognormal outcomes, SD of log y {self.sigma:.4g} per period, correlation {self.corr:g} "
                         f"between periods (within-subject CV {cvw:.1%})")
        else:
            parts.append(f"normal outcomes with SD {self.sigma:g} per period and correlation {self.corr:g} between "
                         f"periods (within-subject SD {self.sd_within:.4g})")
        parts.append(f"treatment B vs A {unit} {self.true_effect():g}")
        if self.period_effect is not None:
            parts.append(f"period 2 vs 1 {unit} {self.period_effect:g}")
        if self.carryover is not None:
            parts.append(f"carryover of B into period 2 ({unit}) {self.carryover:g}")
        if self.dropout_rate > 0:
            parts.append(f"{self.dropout_rate:.1%} of subjects drop out after period 1 (completely at random)")
        if self.missing is not None:
            parts.append(f"further missing outcomes: {self.missing.describe()}")
        return "; ".join(parts)

    def facts(self):
        if self.dropout_rate > 0 or self.missing is not None:
            return ()
        return (CrossoverFacts(effect=self._on_scale("effect"), n_ab=self.n0, n_ba=self.n1,
                               sd_within=self.sd_within, carryover=self._on_scale("carryover"), scale=self.scale),)
