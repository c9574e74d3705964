"""Two-arm count outcomes: Poisson and negative binomial regression with an exposure offset.

Layout understood: a long table with counts ``y`` (NaN = missing, dropped),
``arm`` in {0, 1} and optionally ``exposure`` (> 0; 1 when absent). Both
models are ``log E[y] = b0 + b1 * arm + log(exposure)``; the estimate is
``b1``, the log rate ratio (treatment over control), with its model SE and a
Wald CI, and the test is the Wald z-test of ``b1 = 0``. A replicate without
any event has nothing to fit: its p-value is NaN (the engine counts it as
``nonfinite_pvalue``).
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from .._validation import Choice, Real
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, result_from_fields, rowwise
from .numeric import wald


def count_columns(data):
    """``y``, ``arm`` (as float) and ``exposure`` of one replicate, complete cases only."""
    y = np.asarray(data["y"], float)
    arm = np.asarray(data["arm"])
    levels = set(np.unique(arm).tolist())
    if levels != {0, 1}:
        raise ValueError(f"two-arm analyses need arm labels 0 and 1; got {sorted(levels)}")
    expo = np.asarray(data["exposure"], float) if "exposure" in data else np.ones(y.shape)
    ok = np.isfinite(y)
    if np.any(y[ok] < 0):
        raise ValueError("count analyses need y >= 0")
    if np.any(~(expo[ok] > 0)):
        raise ValueError("count analyses need exposure > 0")
    return y[ok], arm[ok].astype(float), expo[ok]


def _warn_empty_arm(y, arm) -> bool:
    """Warn when an arm has no events; True when there are no events at all (nothing to fit)."""
    if not np.any(y > 0):
        return True
    for a in (0, 1):
        if not np.any(y[arm == a] > 0):
            from statsmodels.tools.sm_exceptions import PerfectSeparationWarning  # heavy: imported on use

            warnings.warn(PerfectSeparationWarning(
                f"no events in arm {a}: the log rate ratio has no finite maximum likelihood estimate"))
            break
    return False


def _design(arm):
    return np.column_stack([np.ones(arm.size), arm])


class PoissonGLM(Analysis):
    """Poisson regression (statsmodels GLM, log link, ``log(exposure)`` offset); Wald test of the arm.

    H0: the event rate ratio (treatment vs control) is 1, i.e. the log rate
    ratio is 0. ``scale='pearson'`` estimates a dispersion factor from the
    Pearson chi-square over the residual df and widens the SE by its root
    (quasi-Poisson); the default 'model' trusts the Poisson variance and is
    liberal under overdispersion.

    With the arm as the only covariate the maximum likelihood estimate is
    ``log((Y1 / E1) / (Y0 / E0))`` (Y: total count, E: total exposure per
    arm) with SE ``sqrt(1/Y1 + 1/Y0)``; the batch path uses these closed
    forms. The per-replicate fit uses Newton-Raphson (statsmodels GLM
    ``method='newton'``), whose SE comes from the Hessian at the final
    estimate, so the two paths agree to rounding. An arm without any event has no finite MLE:
    the analysis warns :class:`PerfectSeparationWarning` and the engine counts
    the replicate as fit trouble (the batch path sends those replicates
    through the per-replicate fit).
    """

    name = "poisson_glm"
    estimand_label = "log rate ratio"
    null_hypothesis = "the event rate ratio (treatment vs control) is 1"
    params = {"alternative": ALTERNATIVE, "ci_level": CI_LEVEL, "scale": Choice(("model", "pearson"))}
    defaults = {"alternative": "two-sided", "ci_level": 0.95, "scale": "model"}

    def __call__(self, data):
        import statsmodels.api as sm

        y, arm, expo = count_columns(data)
        if _warn_empty_arm(y, arm):
            return TestResult(pvalue=math.nan)
        model = sm.GLM(y, _design(arm), family=sm.families.Poisson(), offset=np.log(expo))
        fit = model.fit(method="newton", scale="X2" if self.scale == "pearson" else None)
        return result_from_fields(wald(float(fit.params[1]), float(fit.bse[1]), self.alternative, self.ci_level))

    layouts = ("two_arm",)

    def _supports(self, layout):
        """Counts >= 0 where observed, exposure > 0 where given."""
        y = layout.y
        ok = np.isfinite(y)
        expo = layout.column("exposure")
        return bool(np.all(y[ok] >= 0) and (expo is None or np.all(expo > 0)))

    def batch(self, batch):
        layout = self.batch_layout(batch)
        y = layout.y
        shape = y.shape
        arm = np.broadcast_to(layout.arm, shape)
        expo = np.broadcast_to(layout.column("exposure"), shape) if "exposure" in batch else np.ones(shape)
        ok = layout.observed
        yy = np.where(ok, y, 0.0)
        ee = np.where(ok, expo, 0.0)
        is1 = arm == 1
        y1, e1 = np.sum(yy * is1, axis=1), np.sum(ee * is1, axis=1)
        y0, e0 = np.sum(yy, axis=1) - y1, np.sum(ee, axis=1) - e1
        with np.errstate(all="ignore"):
            est = np.log(y1 / e1) - np.log(y0 / e0)
            se = np.sqrt(1 / y1 + 1 / y0)
            if self.scale == "pearson":
                rate = np.where(is1, (y1 / e1)[:, None], (y0 / e0)[:, None])
                mu = rate * ee
                x2 = np.sum(np.where(ok, (yy - mu) ** 2 / mu, 0.0), axis=1)
                se = se * np.sqrt(x2 / (ok.sum(axis=1) - 2))
        out = BatchResult(**wald(est, se, self.alternative, self.ci_level))
        rows = np.flatnonzero((y0 == 0) | (y1 == 0))
        if rows.size:
            fields, out.trouble, out.trouble_messages = rowwise(self, batch, rows)
            for f, v in fields.items():
                out[f][rows] = v
        return out


class NegBinGLM(Analysis):
    """Negative binomial (NB2) regression with a ``log(exposure)`` offset; Wald test of the arm.

    H0: the event rate ratio (treatment vs control) is 1. Var(y) = mu +
    alpha mu^2 with alpha = 1/k. By default alpha is estimated jointly with
    the coefficients by maximum likelihood (statsmodels
    ``discrete_model.NegativeBinomial``, ``loglike_method='nb2'``, its default
    optimiser); give ``dispersion`` = k to fix alpha = 1/k instead (statsmodels
    GLM with the ``NegativeBinomial(alpha)`` family, IRLS). Convergence and
    other fit warnings propagate, as does :class:`PerfectSeparationWarning`
    for an arm without events. Per replicate only (no closed form).
    """

    name = "negbin_glm"
    estimand_label = "log rate ratio"
    null_hypothesis = "the event rate ratio (treatment vs control) is 1"
    params = {"alternative": ALTERNATIVE, "ci_level": CI_LEVEL, "dispersion": Real(0.0, low_open=True, optional=True)}
    defaults = {"alternative": "two-sided", "ci_level": 0.95, "dispersion": None}

    def __call__(self, data):
        import statsmodels.api as sm

        y, arm, expo = count_columns(data)
        if _warn_empty_arm(y, arm):
            return TestResult(pvalue=math.nan)
        exog, offset = _design(arm), np.log(expo)
        if self.dispersion is None:
            fit = sm.NegativeBinomial(y, exog, loglike_method="nb2", offset=offset).fit(disp=0)
        else:
            family = sm.families.NegativeBinomial(alpha=1.0 / self.dispersion)
            fit = sm.GLM(y, exog, family=family, offset=offset).fit()
        return result_from_fields(wald(float(fit.params[1]), float(fit.bse[1]), self.alternative, self.ci_level))
