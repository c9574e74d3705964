"""A Bayesian decision rule as the planned analysis: ``posterior_probability``.

The rule declares success when the posterior probability that the
treatment-minus-control difference exceeds ``threshold`` is above ``eta``
(``direction = "less"``: below it). Its frequentist operating characteristics
-- the probability of declaring success when there is no effect (type I error)
and when there is one (power) -- are what a simulation gives and what
regulators ask for (FDA 2010, guidance on Bayesian statistics in medical device
trials; cited from memory).

The analysis returns its decision as ``pvalue``: 0 when the rule declares
success and 1 when it does not, so a replicate "rejects" at any alpha exactly
when the rule succeeds; the posterior probability itself is in ``statistic``,
the posterior mean and SD in ``estimate`` and ``se``, and a central credible
interval in ``ci_low``/``ci_high``. The scenario's alpha therefore plays no
part: ``eta`` decides (calibrate it with
:func:`simpower.analytic.bayes.calibrate_eta`).

Models (see :mod:`simpower.analytic.bayes`): ``normal`` (difference in means,
normal prior; a known ``sd``, or the pooled SD plugged in when ``sd`` is not
given, which is then an approximation) and ``beta_binomial`` (0/1 outcomes,
Beta priors per arm). Missing outcomes are left out (complete cases).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special, stats

from .._validation import Choice, Real
from ..errors import ParameterError
from ..analytic.bayes import beta_difference_probability, normal_posterior
from .base import CI_LEVEL, Analysis, BatchResult, NullBoundary, TestResult, result_from_fields
from .binary import batch_two_by_two
from .numeric import masked_arms

POSITIVE = Real(0.0, low_open=True)


class PosteriorProbability(Analysis):
    """Declare success when P(difference > threshold | data) > eta; the decision is the p-value (0 or 1).

    Parameters
    ----------
    model : {"normal", "beta_binomial"}
    threshold : float
        The difference the posterior must exceed (0: any benefit).
    eta : float in (0, 1)
        The posterior probability required.
    direction : {"greater", "less"}
        Whether a larger ("greater") or a smaller ("less") difference is a benefit.
    prior_mean, prior_sd : float
        Normal prior on the difference (``prior_sd`` absent: flat).
    sd : float > 0, optional
        Known outcome SD (both arms) for the normal model; absent: the pooled
        sample SD is plugged in.
    prior_a0, prior_b0, prior_a1, prior_b1 : float > 0
        Beta priors of the control and treatment probabilities (default 1: uniform).
    ci_level : float
        Level of the central credible interval.
    """

    name = "posterior_probability"
    null_hypothesis = "the difference is at most `threshold` (at least, for direction 'less')"
    params = {"model": Choice(("normal", "beta_binomial")), "threshold": Real(),
              "eta": Real(0.0, 1.0, low_open=True, high_open=True), "direction": Choice(("greater", "less")),
              "prior_mean": Real(), "prior_sd": Real(0.0, low_open=True, optional=True),
              "sd": Real(0.0, low_open=True, optional=True), "prior_a0": POSITIVE, "prior_b0": POSITIVE,
              "prior_a1": POSITIVE, "prior_b1": POSITIVE, "ci_level": CI_LEVEL}
    defaults = {"model": "normal", "threshold": 0.0, "eta": 0.975, "direction": "greater", "prior_mean": 0.0,
                "prior_sd": None, "sd": None, "prior_a0": 1.0, "prior_b0": 1.0, "prior_a1": 1.0, "prior_b1": 1.0,
                "ci_level": 0.95}

    @property
    def estimand_label(self):  # type: ignore[override]
        return "risk difference" if self.model == "beta_binomial" else "mean difference"

    def null_boundary(self) -> NullBoundary:
        return NullBoundary(float(self.threshold), "`threshold`")

    def decision_rule(self) -> str:
        side = ">" if self.direction == "greater" else "<"
        return f"success when P(difference {side} {self.threshold:g} | data) > eta = {self.eta:g}"

    # -- the computation, for arrays of replicates ---------------------------------------------
    def _normal(self, n0, n1, m0, m1, ss):
        d = m1 - m0
        with np.errstate(all="ignore"):
            if self.sd is not None:
                se = self.sd * np.sqrt(1.0 / n0 + 1.0 / n1)
            else:
                se = np.sqrt(ss / (n0 + n1 - 2) * (1.0 / n0 + 1.0 / n1))
            prior_sd = math.inf if self.prior_sd is None else self.prior_sd
            mean, psd = normal_posterior(d, se, self.prior_mean, prior_sd)
            z = (mean - self.threshold) / psd
            prob = special.ndtr(z) if self.direction == "greater" else special.ndtr(-z)
            half = stats.norm.ppf(0.5 + self.ci_level / 2) * psd
        return prob, mean, psd, mean - half, mean + half

    def _beta(self, n0, n1, x0, x1):
        a0, b0 = self.prior_a0 + x0, self.prior_b0 + n0 - x0
        a1, b1 = self.prior_a1 + x1, self.prior_b1 + n1 - x1
        prob = beta_difference_probability(a0, b0, a1, b1, self.threshold, self.direction)
        mean = a1 / (a1 + b1) - a0 / (a0 + b0)
        var = a0 * b0 / ((a0 + b0) ** 2 * (a0 + b0 + 1)) + a1 * b1 / ((a1 + b1) ** 2 * (a1 + b1 + 1))
        psd = np.sqrt(var)
        half = stats.norm.ppf(0.5 + self.ci_level / 2) * psd  # normal approximation to the difference's interval
        return prob, mean, psd, mean - half, mean + half

    def _fields(self, prob, mean, psd, lo, hi):
        prob = np.asarray(prob, float)
        decision = np.where(np.isfinite(prob), np.where(prob > self.eta, 0.0, 1.0), np.nan)
        return {"pvalue": decision, "estimate": mean, "se": psd, "ci_low": lo, "ci_high": hi, "statistic": prob}

    def __call__(self, data):
        y = np.asarray(data["y"], float)
        arm = np.asarray(data["arm"])
        ok = np.isfinite(y)
        y0, y1 = y[ok & (arm == 0)], y[ok & (arm == 1)]
        if self.model == "beta_binomial":
            if np.any((y[ok] != 0) & (y[ok] != 1)):
                raise ValueError("the beta-binomial model needs y in {0, 1} (NaN = missing)")
            parts = self._beta(float(y0.size), float(y1.size), float(y0.sum()), float(y1.sum()))
        else:
            if y0.size < 1 or y1.size < 1 or (self.sd is None and y0.size + y1.size < 3):
                return TestResult(pvalue=math.nan)
            ss = float(np.sum((y0 - y0.mean()) ** 2) + np.sum((y1 - y1.mean()) ** 2))
            parts = self._normal(float(y0.size), float(y1.size), float(y0.mean()), float(y1.mean()), ss)
        return result_from_fields({k: float(np.asarray(v)) for k, v in self._fields(*parts).items()})

    layouts = ("two_arm",)

    @staticmethod
    def _supports(layout) -> bool:
        return True

    def supports_batch(self, batch):
        if not super().supports_batch(batch):
            return False
        if self.model == "beta_binomial":
            y = batch.layout("two_arm").y
            ok = np.isfinite(y)
            return bool(np.all((y[ok] == 0) | (y[ok] == 1)))
        return True

    def batch(self, batch):
        if self.model == "beta_binomial":
            x0, n0, x1, n1 = batch_two_by_two(batch)
            out = self._fields(*self._beta(n0, n1, x0, x1))
        else:
            (n0, m0, v0), (n1, m1, v1) = masked_arms(batch.layout("two_arm"))
            n0, n1 = n0.astype(float), n1.astype(float)
            with np.errstate(all="ignore"):
                ss = np.where(n0 > 1, v0 * (n0 - 1), 0.0) + np.where(n1 > 1, v1 * (n1 - 1), 0.0)
            out = self._fields(*self._normal(n0, n1, m0, m1, ss))
            few = (n0 < 1) | (n1 < 1) | ((n0 + n1 < 3) if self.sd is None else False)
            for k in out:
                out[k] = np.where(few, np.nan, out[k])
        out.pop("statistic")
        return BatchResult(**out)

    def _check(self):
        if self.model == "beta_binomial" and not -1 < self.threshold < 1:
            raise ParameterError(f"`threshold` must be in (-1, 1) for the beta-binomial model (a risk difference); "
                                 f"got {self.threshold:g}.")
