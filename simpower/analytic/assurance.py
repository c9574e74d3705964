"""Assurance (the probability of success over a prior on the effect): the closed form for a normal prior and a z-test.

With an estimate ``theta_hat ~ N(theta, se^2)`` given the true effect
``theta``, and a normal prior ``theta ~ N(m, v)``, the estimate's predictive
distribution is ``N(m, se^2 + v)``, so the probability that the z-test rejects
in the favourable direction is

    P(theta_hat / se > z_{1-alpha}) = Phi((m - z_{1-alpha} se) / sqrt(se^2 + v))

(O'Hagan, Stevens & Campbell 2005, Pharm Stat 4:187-201, section 3;
Spiegelhalter, Freedman & Blackburn 1986, Control Clin Trials 7:8-17, who call
it the predictive power). The two-sided test adds the other tail at
``z_{1-alpha/2}``. The probability that the effect itself is favourable,
``Phi(m / sqrt(v))``, bounds the assurance from above as the sample grows: the
*ceiling*.
"""

from __future__ import annotations

import math

from scipy import stats

from ._common import alpha_power, choice, real

ALTERNATIVES = ("two-sided", "greater", "less")

__all__ = ["normal_prior_assurance", "assurance_ceiling", "two_sample_z_se"]


def two_sample_z_se(n0: float, n1: float | None = None, sd: float = 1.0, sd1: float | None = None) -> float:
    """Standard error of a difference in means with known SDs: sqrt(sd^2/n0 + sd1^2/n1) (common practice)."""
    n1 = n0 if n1 is None else n1
    sd1 = sd if sd1 is None else sd1
    for name, v in (("n0", n0), ("n1", n1), ("sd", sd), ("sd1", sd1)):
        real(name, v, 0.0, low_open=True)
    return math.sqrt(sd * sd / n0 + sd1 * sd1 / n1)


def normal_prior_assurance(prior_mean: float, prior_sd: float, se: float, alpha: float = 0.05,
                           alternative: str = "two-sided", favourable: str | None = None) -> float:
    """Assurance of a z-test with standard error ``se`` when the effect has the prior N(prior_mean, prior_sd^2).

    ``alternative`` 'greater' counts rejections with a positive estimate,
    'less' with a negative one, 'two-sided' both (at alpha / 2 each), or with
    ``favourable`` ('greater' or 'less') only the rejections on that side (a
    two-sided test's finding of harm is no success). A prior SD of 0 gives the
    ordinary power at ``prior_mean``.

    Examples
    --------
    With a point prior the assurance is the power: d = 0.5, 64 per arm, two-sided 0.05 (Cohen 1988,
    Table 2.4.1: 0.80 for the t-test; the z-test's is 0.807).

    >>> round(normal_prior_assurance(0.5, 0.0, two_sample_z_se(64)), 3)
    0.807
    """
    se = float(real("se", se, 0.0, low_open=True))
    prior_mean = float(real("prior_mean", prior_mean))
    prior_sd = float(real("prior_sd", prior_sd, 0.0))
    alpha = float(alpha_power(alpha))
    alternative = choice("alternative", alternative, ALTERNATIVES)
    scale = math.sqrt(se * se + prior_sd * prior_sd)
    if alternative == "two-sided":
        z = stats.norm.ppf(1 - alpha / 2)
        up = float(stats.norm.cdf((prior_mean - z * se) / scale))
        down = float(stats.norm.cdf((-prior_mean - z * se) / scale))
        if favourable is None:
            return up + down
        return up if choice("favourable", favourable, ("greater", "less")) == "greater" else down
    z = stats.norm.ppf(1 - alpha)
    sign = 1.0 if alternative == "greater" else -1.0
    return float(stats.norm.cdf((sign * prior_mean - z * se) / scale))


def assurance_ceiling(prior_mean: float, prior_sd: float, favourable: str = "greater") -> float:
    """P(the effect is favourable) under N(prior_mean, prior_sd^2): the limit of the assurance as n grows."""
    prior_mean = float(real("prior_mean", prior_mean))
    prior_sd = float(real("prior_sd", prior_sd, 0.0))
    sign = 1.0 if choice("favourable", favourable, ("greater", "less")) == "greater" else -1.0
    if prior_sd == 0:
        return float(sign * prior_mean > 0)
    return float(stats.norm.cdf(sign * prior_mean / prior_sd))
