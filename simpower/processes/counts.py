"""Event counts in two independent arms: Poisson or negative binomial, with exposure time.

Participant i in arm a has exposure ``t_i`` and mean count
``mu_i = rate0 * rate_ratio**a * t_i``. Counts are Poisson(mu_i), or, with a
``dispersion`` k, negative binomial with variance ``mu_i + mu_i**2 / k``
(the "NB2" form), drawn as a gamma-Poisson mixture: a participant's own rate
multiplier ``g_i ~ Gamma(shape=k, scale=1/k)`` (mean 1, variance 1/k), then
``y_i ~ Poisson(g_i * mu_i)``. Smaller k means more overdispersion; k -> inf
is Poisson. (statsmodels calls 1/k the NB2 ``alpha``.)

Exposure is ``exposure`` for everyone, or, with ``exposure_cv > 0``, drawn per
participant from a gamma distribution with mean ``exposure`` and coefficient of
variation ``exposure_cv`` (e.g. varying follow-up).

The long table has columns ``y`` (counts, float), ``arm`` (0 control, 1
treatment, control rows first) and ``exposure``; with a ``missing``
mechanism, hidden counts are NaN and an ``observed`` column (1/0) is added.
"""

from __future__ import annotations

import numpy as np

from .._validation import Int, Real
from ..components import Nested
from .composed import Arms
from .design import TwoArms, arm_defaults, arm_params
from .factories import TrialFactory
from .glm_outcomes import CountOutcome

POSITIVE = Real(0.0, low_open=True)


class CountTwoArm(TwoArms, TrialFactory):
    """Two independent arms with count outcomes over an exposure time.

    Parameters
    ----------
    n : int >= 2
        Size of the control arm (arm 0).
    rate0 : float > 0
        Event rate per unit exposure in the control arm.
    rate_ratio : float > 0
        Treatment-over-control rate ratio (1 = no effect). Default 1.
    dispersion : float > 0, optional
        Negative binomial shape k: Var(y | exposure) = mu + mu^2 / k. Omit
        (default) for Poisson counts.
    exposure : float > 0
        Exposure time per participant (its mean when ``exposure_cv > 0``).
        Default 1.
    exposure_cv : float >= 0
        Coefficient of variation of per-participant exposure (gamma
        distributed); 0 (default) gives everyone the same exposure.
    ratio : float > 0
        Allocation ratio; the treatment arm has ``round(ratio * n)``
        participants (at least 2).
    n1 : int >= 2, optional
        The treatment arm's size, given directly instead of ``ratio``
        (``sizes = [n0, n1]`` gives both arms at once).
    missing : missingness, optional
        Applied once after the counts are drawn (``mcar``, ``mnar``, or
        ``mar`` with ``on = "arm"`` or ``"exposure"``); hidden counts are NaN.

    Notes
    -----
    :meth:`true_effect` is the log rate ratio, the estimand of
    ``poisson_glm`` and ``negbin_glm``. Draws come in a fixed order
    (exposures, then gamma multipliers, then Poisson counts, then the
    missingness mask); with ``exposure_cv = 0`` no exposure is drawn, without
    ``dispersion`` no multiplier and without ``missing`` no mask.

    A factory over ``trial``: ``design = arms(n, ratio, n1)``, ``outcome =
    count(rate0, rate_ratio, dispersion, exposure, exposure_cv)``, ``missing``
    (see :attr:`trial`).

    Examples
    --------
    With k = 2 a mean count of 4 has variance 4 + 16/2 = 12:

    >>> p = CountTwoArm(n=50, rate0=2.0, exposure=2.0, dispersion=2.0, rate_ratio=0.5)
    >>> float(p.variance(4.0)), round(p.true_effect(), 4)
    (12.0, -0.6931)
    """

    name = "count_two_arm"
    params = arm_params({
        "n": Int(low=2),
        "rate0": POSITIVE,
        "rate_ratio": POSITIVE,
        "dispersion": Real(0.0, low_open=True, optional=True),
        "exposure": POSITIVE,
        "exposure_cv": Real(0.0),
        "ratio": POSITIVE,
        "missing": Nested("missingness", optional=True),
    })
    defaults = arm_defaults({"rate_ratio": 1.0, "dispersion": None, "exposure": 1.0, "exposure_cv": 0.0,
                             "ratio": 1.0, "missing": None})
    effect_param = "rate_ratio"
    size_param = "n"
    unprefixed = ("design.", "outcome.")

    def layers(self):
        return {"design": Arms(n=self.n, ratio=self.ratio, n1=self._p["n1"]),
                "outcome": CountOutcome(rate0=self.rate0, rate_ratio=self.rate_ratio, dispersion=self.dispersion,
                                        exposure=self.exposure, exposure_cv=self.exposure_cv),
                "missing": self.missing}

    def variance(self, mu):
        """Variance of a count with mean ``mu`` given exposure: mu (+ mu^2 / k)."""
        mu = np.asarray(mu, float)
        return mu if self.dispersion is None else mu + mu * mu / self.dispersion

    def describe(self):
        dist = ("Poisson counts" if self.dispersion is None else
                f"negative binomial counts (variance mu + mu^2/{self.dispersion:g})")
        expo = (f"exposure {self.exposure:g}" if self.exposure_cv == 0 else
                f"gamma-distributed exposure with mean {self.exposure:g} and CV {self.exposure_cv:g}")
        miss = f"; missing outcomes: {self.missing.describe()}" if self.missing is not None else ""
        return (f"{self.arms_text()}, {dist}, {expo}; control rate "
                f"{self.rate0:g} per unit exposure, treatment / control rate ratio {self.rate_ratio:g}{miss}")
