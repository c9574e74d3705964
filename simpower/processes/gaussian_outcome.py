"""The ``gaussian`` outcome layer of ``trial``: a normal outcome with an identity link.

Like ``binary`` (logit) and ``count`` (log) in
:mod:`simpower.processes.glm_outcomes`, the layer carries its own effect and
takes the ``clusters`` design's random intercept on its link scale, which for
the identity link is the outcome scale::

    y = mean0 + arm * (effect + b_c) + u_c + e,
    u_c ~ N(0, icc * sd^2),  e ~ N(0, (1 - icc) * sd^2),  b_c ~ N(0, slope_sd^2),

so ``sd`` is the total SD of a control outcome and ``icc`` the correlation of
two outcomes of one cluster (Donner & Klar 2000, ch. 2). Under the ``arms``
design (icc = 0, independent participants) the treatment arm's SD is
``sd * sd_ratio``.

The layer draws in the order and with the arithmetic of the older process
names it stands for, so ``trial`` with this layer gives their numbers exactly:
under ``arms`` those of ``normal_two_arm`` (standard normal scores, scaled by
each arm's SD, then each arm's mean added); under ``clusters`` those of
``cluster_trial`` (cluster sizes and effects from the design, then the
within-cluster scores, then, with individuals randomised within clusters, one
cluster slope per cluster, drawn also when ``slope_sd`` is 0, then the arms).

A ``normal`` outcome *distribution* (``outcome = {type = "normal"}`` with the
trial's ``effect`` and ``sd_ratio``) describes the same model; it draws as
``two_arm`` does (the effect applied to the control-arm draws) and, under
``clusters``, through normal scores, so its numbers differ in the last bits
(arms) or altogether (clusters, where it draws the scores in another order).
"""

from __future__ import annotations

import math

import numpy as np

from .._validation import Real
from ..errors import ParameterError
from ..facts import ClusterFacts, NormalFacts
from .glm_outcomes import GLMOutcome, Linear

POSITIVE = Real(0.0, low_open=True)


class GaussianOutcome(GLMOutcome):
    """A normal outcome with an identity link, carrying its effect (the layer of ``normal_two_arm`` and
    ``cluster_trial``).

    Parameters
    ----------
    mean0 : float, default 0
        Control-arm mean.
    sd : float > 0, default 1
        Total SD of a control outcome (between + within clusters).
    effect : float, default 0
        Treatment minus control mean difference (the estimand).
    sd_ratio : float > 0, default 1
        Treatment-arm SD / control-arm SD; ``arms`` design only.
    slope_sd : float >= 0, default 0
        SD of a cluster-specific deviation of the effect; ``clusters`` design with
        ``randomise = "individual"`` only (under cluster randomisation it cannot be
        told apart from extra between-cluster variance of the treatment arm).
    """

    name = "gaussian"
    params = {"mean0": Real(), "sd": POSITIVE, "effect": Real(), "sd_ratio": POSITIVE, "slope_sd": Real(0.0)}
    defaults = {"mean0": 0.0, "sd": 1.0, "effect": 0.0, "sd_ratio": 1.0, "slope_sd": 0.0}
    #: the scale of the design's ``icc``: the outcome's own (identity link)
    icc_scale = "outcome"
    estimand_label = "mean difference"

    @property
    def effect_param(self) -> str:  # type: ignore[override]
        return "effect"

    def null_value(self) -> float:
        return 0.0

    @property
    def shifts_only(self) -> bool:
        """The arms differ by a shift of the mean alone (equal SDs): the mean difference is a location shift."""
        return self.sd_ratio == 1 and self.slope_sd == 0

    def check_design(self, design) -> None:
        """Refuse a design this layer does not draw for (called by ``trial`` at construction)."""
        if design.name not in ("arms", "clusters"):
            raise ParameterError(f"`outcome` gaussian needs the arms or clusters design; got {design.name!r}.")
        clustered = design.name == "clusters"
        if clustered and self.sd_ratio != 1:
            raise ParameterError(f"`outcome.sd_ratio` must be 1 with the clusters design; got {self.sd_ratio:g} "
                                 "(for unequal arm SDs in clusters use outcome = {type = \"normal\"} with the "
                                 "trial's `sd_ratio`).")
        if self.slope_sd > 0 and not (clustered and design.randomise == "individual"):
            raise ParameterError(
                "`outcome.slope_sd` must be 0 with randomise = 'cluster' (a random treatment effect needs both "
                f"arms in a cluster; use randomise = 'individual'); got {self.slope_sd:g}." if clustered else
                f"`outcome.slope_sd` needs the clusters design with randomise = 'individual'; got {self.slope_sd:g} "
                "with independent arms.")

    def sigma_for(self, icc: float) -> float:
        """The between-cluster SD on the outcome scale: ``sd * sqrt(icc)``."""
        return self.sd * math.sqrt(icc)

    def solve(self, sigma: float) -> Linear:
        return Linear(self.mean0, self.effect, sigma, self.mean0, self.mean0 + self.effect)

    def true_values(self, lin: Linear) -> dict[str, float]:
        return {"mean_difference": float(self.effect)}

    def true_effect(self, lin: Linear) -> float:
        return float(self.effect)

    def estimand_aliases(self, lin: Linear) -> set[str]:
        return set()

    def facts_for(self, lin: Linear, design) -> tuple:
        """:class:`NormalFacts` (arms) or :class:`ClusterFacts` (clusters); ``trial`` gives none with missingness."""
        if design.name == "arms":
            return (NormalFacts("two-sample", effect=self.effect, n=design.n0, sd0=self.sd,
                                sd1=self.sd * self.sd_ratio, ratio=design.n1 / design.n0),)
        return (ClusterFacts(clusters=design.clusters, cluster_size=design.cluster_size,
                             cluster_size_cv=design.cluster_size_cv, icc=design.icc, effect=self.effect, sd=self.sd,
                             sd1=self.sd, randomise=design.randomise, slope_sd=self.slope_sd),)

    # -- drawing ------------------------------------------------------------------------
    def early(self, rng, size: int, width: int, design, cluster) -> dict:
        """The draws made before the design assigns the arms: the scores, and the cluster slopes."""
        e = rng.standard_normal((size, width))
        if design.name == "arms":
            return {"y": e, "clustered": False, "n0": design.n0}
        y = (self.sd * math.sqrt(1.0 - design.icc)) * e  # the within-cluster SD times the scores
        b_rows = None
        if design.randomise == "individual":
            b = rng.standard_normal((size, 2 * design.clusters)) * self.slope_sd + self.effect
            b_rows = np.take_along_axis(b, np.broadcast_to(cluster, (size, width)), axis=1)
        return {"y": y, "b_rows": b_rows, "clustered": True}

    def draw(self, rng, lin, arm, u_rows, size, width, early=None):
        y = early["y"]
        if not early["clustered"]:
            return self._two_arms(y, early["n0"]), {}, {}, {}
        if u_rows is not None:
            y += lin.sigma * u_rows
        if self.mean0:
            y += self.mean0
        if early["b_rows"] is None:
            y += self.effect * arm
        else:
            y += arm * early["b_rows"]
        return y, {}, {}, {}

    def _two_arms(self, y, n0):
        """Independent arms, control rows ``[0, n0)`` first (the arms design's layout): each arm's SD, then its mean."""
        sd1 = self.sd * self.sd_ratio
        if self.sd != 1:
            y[:, :n0] *= self.sd
        if sd1 != 1:
            y[:, n0:] *= sd1
        if self.mean0:
            y[:, :n0] += self.mean0
        y[:, n0:] += self.mean0 + self.effect
        return y

    def describe(self, lin: Linear | None = None) -> str:
        sds = (f"SD {self.sd:g}" if self.sd_ratio == 1 else
               f"SDs {self.sd:g} (control) and {self.sd * self.sd_ratio:g} (treatment)")
        text = f"normal outcome (identity link), control mean {self.mean0:g}, {sds}; mean difference {self.effect:g}"
        if self.slope_sd > 0:
            text += f", varying between clusters with SD {self.slope_sd:g}"
        if lin is not None and lin.sigma > 0:
            text += f"; between-cluster SD {lin.sigma:.4g}"
        return text

