"""Normal outcomes: one sample, paired measurements, two arms.

These are the cases the analytic core covers exactly, so they anchor the
engine's cross-check against closed-form power (when no ``missing``
mechanism hides outcomes: that is applied once after the outcomes, by the
shared step :func:`~simpower.processes.design.apply_missing`).
"""

from __future__ import annotations

import numpy as np

from .._validation import Int, Real
from ..components import Nested
from ..facts import NormalFacts
from .base import Batch, Process, check_missing_columns
from .composed import Arms
from .design import TwoArms, apply_missing, arm_defaults, arm_params
from .factories import TrialFactory
from .gaussian_outcome import GaussianOutcome

POSITIVE = Real(0.0, low_open=True)
MISSING = Nested("missingness", optional=True)


def _missing_text(missing) -> str:
    return f"; missing outcomes: {missing.describe()}" if missing is not None else ""


class NormalOneSample(Process):
    """``n`` draws from N(effect, sd^2); the analyses test a null mean of 0 by default.

    Parameters
    ----------
    n : int >= 2
    effect : float
        True mean minus the null mean (0: give outcomes as differences from
        the null value, or set the analysis's ``null_mean``).
    sd : float > 0
    missing : missingness, optional
        ``mcar`` or ``mnar``, applied after the outcomes (NaN in ``y``, an
        ``observed`` column); then there is no analytic cross-check.
    """

    name = "normal_one_sample"
    params = {"n": Int(low=2), "effect": Real(), "sd": POSITIVE, "missing": MISSING}
    defaults = {"effect": 0.0, "sd": 1.0, "missing": None}

    def _check(self):
        check_missing_columns(self.missing, set(), self.name)

    def draw_batch(self, rng, size):
        y = rng.standard_normal((size, self.n))
        y *= self.sd
        y += self.effect
        per_rep, info = {"y": y}, {}
        apply_missing(self.missing, rng, y, {}, per_rep, info)
        return Batch(size, per_rep, info=info)

    def describe(self):
        return (f"one sample of n = {self.n} from a normal distribution with SD {self.sd:g} "
                f"and mean {self.effect:g} (null mean 0){_missing_text(self.missing)}")

    def facts(self):
        if self.missing is not None:
            return ()
        return (NormalFacts("one-sample", effect=self.effect, n=self.n, sd0=self.sd, sd1=self.sd),)


class NormalPaired(Process):
    """``n`` pairs (condition 0, condition 1), bivariate normal with correlation ``corr``.

    Condition 1 has mean ``effect`` more than condition 0. The SD of the
    within-pair difference is sqrt(sd0^2 + sd1^2 - 2 corr sd0 sd1).

    The long table has columns ``y``, ``arm`` (0/1) and ``pair`` (0..n-1),
    rows ordered by arm, then pair. A ``missing`` mechanism (``mcar``,
    ``mnar``, ``mar`` on ``arm``) hides single measurements; paired analyses
    drop the incomplete pairs.
    """

    name = "normal_paired"
    params = {"n": Int(low=2), "effect": Real(), "sd0": POSITIVE, "sd1": POSITIVE,
              "corr": Real(-1.0, 1.0, low_open=True, high_open=True), "missing": MISSING}
    defaults = {"effect": 0.0, "sd0": 1.0, "sd1": 1.0, "corr": 0.5, "missing": None}

    def _check(self):
        check_missing_columns(self.missing, {"arm", "pair"}, self.name)

    @property
    def sd_difference(self) -> float:
        return float(np.sqrt(self.sd0**2 + self.sd1**2 - 2 * self.corr * self.sd0 * self.sd1))

    def draw_batch(self, rng, size):
        n = self.n
        z = rng.standard_normal((size, 2, n))
        y0 = self.sd0 * z[:, 0]
        y1 = self.effect + self.sd1 * (self.corr * z[:, 0] + np.sqrt(1 - self.corr**2) * z[:, 1])
        y = np.concatenate([y0, y1], axis=1)
        arm = np.repeat(np.array([0, 1]), n)
        pair = np.tile(np.arange(n), 2)
        per_rep, info = {"y": y}, {}
        apply_missing(self.missing, rng, y, {"arm": arm, "pair": pair}, per_rep, info)
        return Batch(size, per_rep, {"arm": arm, "pair": pair}, info)

    def describe(self):
        return (f"{self.n} pairs, normal with SDs {self.sd0:g} and {self.sd1:g} and within-pair "
                f"correlation {self.corr:g}; mean difference {self.effect:g} "
                f"(SD of differences {self.sd_difference:.4g}){_missing_text(self.missing)}")

    def facts(self):
        if self.missing is not None:
            return ()
        sd = self.sd_difference
        return (NormalFacts("paired", effect=self.effect, n=self.n, sd0=sd, sd1=sd),)


class NormalTwoArm(TwoArms, TrialFactory):
    """Two independent arms, normal outcomes, possibly unequal SDs and allocation.

    Parameters
    ----------
    n : int >= 2
        Size of the control arm (arm 0).
    ratio : float > 0
        Allocation ratio n_treatment / n_control; the treatment arm has
        ``round(ratio * n)`` participants (at least 2).
    n1 : int >= 2, optional
        The treatment arm's size, given directly instead of ``ratio``
        (``sizes = [n0, n1]`` gives both arms at once).
    effect : float
        Mean of the treatment arm minus mean of the control arm.
    sd : float > 0
        SD in the control arm.
    sd_ratio : float > 0
        SD of the treatment arm divided by ``sd``.
    mean0 : float
        Control-arm mean.
    missing : missingness, optional
        ``mcar``, ``mnar``, or ``mar`` on ``arm``, applied after the outcomes
        (NaN in ``y``, an ``observed`` column); then there is no analytic
        cross-check.

    The long table has columns ``y`` and ``arm`` (0 = control, 1 = treatment),
    control rows first.

    A factory over ``trial``: ``design = arms(n, ratio, n1)``, ``outcome =
    gaussian(mean0, sd, effect, sd_ratio)``, ``missing`` (see :attr:`trial`).
    """

    name = "normal_two_arm"
    params = arm_params({"n": Int(low=2), "effect": Real(), "sd": POSITIVE, "sd_ratio": POSITIVE,
                         "ratio": POSITIVE, "mean0": Real(), "missing": MISSING})
    defaults = arm_defaults({"effect": 0.0, "sd": 1.0, "sd_ratio": 1.0, "ratio": 1.0, "mean0": 0.0,
                             "missing": None})
    unprefixed = ("design.", "outcome.")

    def layers(self):
        return {"design": Arms(n=self.n, ratio=self.ratio, n1=self._p["n1"]),
                "outcome": GaussianOutcome(mean0=self.mean0, sd=self.sd, effect=self.effect, sd_ratio=self.sd_ratio),
                "missing": self.missing}

    @property
    def sd1(self) -> float:
        return self.sd * self.sd_ratio

    def describe(self):
        sds = f"SD {self.sd:g}" if self.sd_ratio == 1 else f"SDs {self.sd:g} (control) and {self.sd1:g} (treatment)"
        return (f"{self.arms_text()}, normal outcomes with {sds}; "
                f"treatment minus control mean difference {self.effect:g}{_missing_text(self.missing)}")
