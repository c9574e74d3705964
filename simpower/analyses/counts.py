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
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over, result_from_fields, rowwise
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
        from statsmodels.genmod import families  # not statsmodels.api: it loads every model
        from statsmodels.genmod.generalized_linear_model import GLM

        y, arm, expo = count_columns(data)
        if _warn_empty_arm(y, arm):
            return TestResult(pvalue=math.nan)
        model = GLM(y, _design(arm), family=families.Poisson(), offset=np.log(expo))
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
    for an arm without events.

    Batch path (layout ``two_arm``): maximum likelihood of (b0, b1, log
    alpha) by Newton-Raphson across replicates with the analytic gradient and
    observed Hessian of the NB2 log-likelihood (digamma/trigamma terms for
    alpha), step halving, starting from the Poisson MLE (the arm rates) and
    the moment estimate of alpha; the SE inverts the observed information in
    (b0, b1, alpha) at the optimum, as statsmodels' ``bse``. It reaches the
    optimum to ~1e-9 where statsmodels' default BFGS fit stops at gtol 1e-5
    (its SE is then off by up to ~4e-5 relative, b1 by ~1e-3 SE when
    exposures vary; tests/test_negbin_batch.py). With ``dispersion``, IRLS
    step for step as statsmodels GLM (start, deviance criterion, weights of
    the last iteration in the SE): agreement to rounding. Replicates with an
    arm without events, no events at all, alpha below ``_ALPHA_FLOOR`` (the
    Poisson limit, where statsmodels stops wherever its gradient test is met),
    a non-converged or non-invertible fit go to the per-replicate path
    (:func:`~simpower.analyses.base.hand_over`) and get its answer and
    warnings exactly. Giving this analysis a batch path changed its default
    chunk size (per-replicate 50, batch 2000), so a seed gives different
    numbers for scenarios using it than before this path existed.
    """

    name = "negbin_glm"
    estimand_label = "log rate ratio"
    null_hypothesis = "the event rate ratio (treatment vs control) is 1"
    params = {"alternative": ALTERNATIVE, "ci_level": CI_LEVEL, "dispersion": Real(0.0, low_open=True, optional=True)}
    defaults = {"alternative": "two-sided", "ci_level": 0.95, "dispersion": None}

    def __call__(self, data):
        from statsmodels.discrete.discrete_model import NegativeBinomial  # not statsmodels.api
        from statsmodels.genmod import families
        from statsmodels.genmod.generalized_linear_model import GLM

        y, arm, expo = count_columns(data)
        if _warn_empty_arm(y, arm):
            return TestResult(pvalue=math.nan)
        exog, offset = _design(arm), np.log(expo)
        if self.dispersion is None:
            fit = NegativeBinomial(y, exog, loglike_method="nb2", offset=offset).fit(disp=0)
        else:
            family = families.NegativeBinomial(alpha=1.0 / self.dispersion)
            fit = GLM(y, exog, family=family, offset=offset).fit()
        return result_from_fields(wald(float(fit.params[1]), float(fit.bse[1]), self.alternative, self.ci_level))

    # -- batch path ------------------------------------------------------------------------------
    layouts = ("two_arm",)

    #: the batch Newton iteration: at most this many steps; a replicate whose step (in b0, b1 and
    #: log alpha) is below ``_TOL`` in every coordinate has converged
    _MAXITER = 100
    _TOL = 1e-10
    #: alpha below this at the optimum: the likelihood is near its Poisson limit (alpha -> 0), where
    #: statsmodels' optimiser stops wherever its gradient test is met; such replicates are handed
    #: over to the per-replicate fit so both paths agree exactly
    _ALPHA_FLOOR = 1e-5

    def _supports(self, layout):
        """Counts >= 0 where observed, exposure > 0 where given."""
        return PoissonGLM._supports(self, layout)

    def batch(self, batch):
        layout = self.batch_layout(batch)
        y = layout.y
        shape = y.shape
        ok = layout.observed
        x = np.where(ok, np.asarray(layout.arm, float), 0.0)  # padding may hold any label
        w = ok.astype(float)
        yy = np.where(ok, y, 0.0)
        with np.errstate(all="ignore"):
            off = np.where(ok, np.broadcast_to(np.log(layout.column("exposure")), shape), 0.0) \
                if "exposure" in batch else np.zeros(shape)
        is1 = (x == 1) & ok
        y1 = np.sum(yy * is1, axis=1)
        y0 = np.sum(yy, axis=1) - y1
        # an arm without events (statsmodels: no finite MLE, PerfectSeparationWarning) or no events at
        # all (p = NaN): the per-replicate path decides
        empty = (y0 == 0) | (y1 == 0)
        if self.dispersion is None:
            b0, b1, se, bad = _nb2_ml(yy, x, off, w, empty)
            bad |= empty
        else:
            b0, b1, se, bad = _nb_irls(yy, x, off, w, 1.0 / self.dispersion, empty)
            bad |= empty
        b1 = np.where(bad, np.nan, b1)
        se = np.where(bad, np.nan, se)
        out = BatchResult(**wald(b1, se, self.alternative, self.ci_level))
        return hand_over(self, batch, out, bad)


class _NB2Data:
    """One batch of NB2 fits, reduced for speed without changing the likelihood.

    Every term of the NB2 log-likelihood and its derivatives is ``A(mu) + y B(mu)`` plus the
    gamma-function terms ``log Gamma(y + k) - log Gamma(k)``, ``psi(y + k) - psi(k)`` and
    ``psi'(y + k) - psi'(k)`` (k = 1/alpha). So (i) observations that share a mean (same arm, same
    exposure) can be pooled into one *cell* with weight n and outcome their mean y; and (ii) for
    integer counts the gamma-function terms summed over a replicate are
    ``sum_j G_j f(k + j)`` with ``G_j = #{i: y_i > j}`` and f = log, 1/x, -1/x^2 (from
    Gamma(x + 1) = x Gamma(x)). ``cells``: y, x, offset, weight, shape (R, M).
    """

    def __init__(self, y, x, off, w):
        R = y.shape[0]
        # equal exposure within each arm (among observed rows): one cell per arm
        m1, m0 = (w > 0) & (x == 1), (w > 0) & (x == 0)
        hi1, lo1 = np.max(off, 1, initial=-np.inf, where=m1), np.min(off, 1, initial=np.inf, where=m1)
        hi0, lo0 = np.max(off, 1, initial=-np.inf, where=m0), np.min(off, 1, initial=np.inf, where=m0)
        if np.all(((hi1 == lo1) | ~np.isfinite(hi1)) & ((hi0 == lo0) | ~np.isfinite(hi0))):
            n1, n0 = np.sum(m1, 1), np.sum(m0, 1)
            with np.errstate(all="ignore"):
                y1, q1 = np.sum(y * w * x, 1), np.sum(y * y * w * x, 1)
                ybar = np.stack([(np.sum(y * w, 1) - y1) / n0, y1 / n1], 1)
                y2 = np.stack([(np.sum(y * y * w, 1) - q1) / n0, q1 / n1], 1)
            wc = np.stack([n0, n1], 1).astype(float)
            good = wc > 0
            self.cells = (np.where(good, ybar, 0.0), np.broadcast_to([0.0, 1.0], (R, 2)).copy(),
                          np.where(good, np.stack([hi0, hi1], 1), 0.0), wc)
            self.y2 = np.where(good, y2, 0.0)        # cell means of y^2 (start values only)
        else:
            self.cells = (y, x, off, w)
            self.y2 = y * y
        ok = w > 0
        ymax = float(np.max(y, initial=0.0, where=ok))
        integer = bool(np.all(y[ok] == np.floor(y[ok])))
        self.G = None
        self.y, self.w = y, w
        if integer and ymax <= 10 * max(y.shape[1], 1):
            J = int(ymax)
            yi = y.astype(np.int64)
            code = (np.arange(R)[:, None] * (J + 1) + yi)[ok]
            hist = np.bincount(code, minlength=R * (J + 1)).reshape(R, J + 1)
            self.G = (ok.sum(1)[:, None] - np.cumsum(hist, 1))[:, :J].astype(float)
            self.j = np.arange(J, dtype=float)

    def take(self, idx):
        out = object.__new__(_NB2Data)
        out.cells = tuple(c[idx] for c in self.cells)
        out.G = None if self.G is None else self.G[idx]
        out.y, out.w = (self.y[idx], self.w[idx]) if self.G is None else (None, None)
        out.j = getattr(self, "j", None)
        return out

    def gamma_terms(self, k, derivs):
        """Per replicate: sum of log Gamma(y+k) - log Gamma(k), and (derivs) of psi and psi' differences."""
        from scipy.special import digamma, gammaln, polygamma

        if self.G is not None:
            kj = k + self.j                       # (R, J)
            lg = np.sum(self.G * np.log(kj), 1)
            if not derivs:
                return lg, None, None
            inv = self.G / kj
            return lg, np.sum(inv, 1), -np.sum(inv / kj, 1)
        y, w = self.y, self.w
        lg = np.sum(w * (gammaln(y + k) - gammaln(k)), 1)
        if not derivs:
            return lg, None, None
        return (lg, np.sum(w * (digamma(y + k) - digamma(k)), 1),
                np.sum(w * (polygamma(1, y + k) - polygamma(1, k)), 1))


def _nb2_parts(data, b0, b1, s, derivs=True):
    """NB2 log-likelihood per replicate at (b0, b1, log alpha), up to the constant -sum log y!, with
    its gradient and Hessian in (b0, b1, alpha) (the observed information, as statsmodels'
    ``NegativeBinomial._hessian_nb2``)."""
    y, x, off, w = data.cells
    a1 = np.exp(s)
    a = a1[:, None]
    k1 = 1.0 / a1
    eta = b0[:, None] + b1[:, None] * x + off
    mu = np.exp(eta)
    l1p = np.log1p(a * mu)
    lg, dg, tri = data.gamma_terms(k1[:, None], derivs)
    ll = lg + np.sum(w * (-(1.0 / a) * l1p + y * (s[:, None] + eta - l1p)), axis=1)
    if not derivs:
        return ll
    den = 1.0 + a * mu
    r = w * (y - mu) / den
    rest = np.sum(w * (-l1p - a * (y - mu) / den), 1)     # d l / d(1/alpha) without the psi terms
    inner = dg + rest
    g = np.stack([r.sum(1), (r * x).sum(1), inner * (-1.0 / a1**2)], axis=1)
    c = w * mu * (1.0 + a * y) / den**2
    cab = -w * mu * (y - mu) / den**2
    haa = (2.0 / a1**3) * inner + (tri + np.sum(w * (a**2 * mu / den + a**2 * (y - mu) / den**2), 1)) / a1**4
    H = np.empty(g.shape + (3,))
    H[:, 0, 0] = -c.sum(1)
    H[:, 0, 1] = H[:, 1, 0] = H[:, 1, 1] = -(c * x).sum(1)
    H[:, 0, 2] = H[:, 2, 0] = cab.sum(1)
    H[:, 1, 2] = H[:, 2, 1] = (cab * x).sum(1)
    H[:, 2, 2] = haa
    return ll, g, H


def _nb2_ml(y, x, off, w, skip):
    """Maximum likelihood of the NB2 model ``log mu = b0 + b1 x + off`` for every replicate.

    Newton-Raphson in (b0, b1, log alpha) with the analytic gradient and
    observed Hessian, step halving on the log-likelihood, and a Levenberg
    shift where the Hessian is not negative definite. Starts from the
    Poisson MLE (the arm rates, closed form for a binary covariate with an
    offset) and the moment estimate of alpha. The SE of b1 is from the
    inverse of the observed information in (b0, b1, alpha) at the optimum, as
    statsmodels' ``NegativeBinomial.fit`` (``bse``). Returns b0, b1, se and a
    mask of replicates to hand over (no convergence, alpha below
    ``_ALPHA_FLOOR``, information not positive definite).
    """
    R = y.shape[0]
    data = _NB2Data(y, x, off, w)
    yc, xc, oc, wc = data.cells
    e = np.exp(oc) * wc
    with np.errstate(all="ignore"):
        r1 = np.sum(yc * wc * xc, 1) / np.sum(e * xc, 1)
        r0 = np.sum(yc * wc * (1 - xc), 1) / np.sum(e * (1 - xc), 1)
        b0, b1 = np.log(r0), np.log(r1) - np.log(r0)
        mu = np.where(wc > 0, np.exp(b0[:, None] + b1[:, None] * xc + oc), 1.0)
        n = wc.sum(1)
        # sum over a cell of (y - mu)^2 = w (mean of y^2 - 2 mu mean y + mu^2)
        ss = wc * (data.y2 - 2 * mu * yc + mu**2)
        amom = np.sum((ss - wc * mu) / mu**2, 1) / (n - 2)
    s = np.log(np.clip(amom, 0.05, 1e3))
    theta = np.stack([b0, b1, s], 1)
    bad = skip | ~np.all(np.isfinite(theta), 1)
    theta[bad] = 0.0
    active = ~bad
    conv = np.zeros(R, bool)
    floor = np.log(NegBinGLM._ALPHA_FLOOR)
    for _ in range(NegBinGLM._MAXITER):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        di = data.take(idx) if idx.size < R else data
        th = theta[idx]
        with np.errstate(all="ignore"):
            ll, g, H = _nb2_parts(di, th[:, 0], th[:, 1], th[:, 2])
            a = np.exp(th[:, 2])
            # to (b0, b1, s = log alpha): g_s = a g_a, H_ss = a^2 H_aa + a g_a, H_bs = a H_ba
            gs = g.copy()
            gs[:, 2] *= a
            Hs = H.copy()
            Hs[:, :2, 2] *= a[:, None]
            Hs[:, 2, :2] *= a[:, None]
            Hs[:, 2, 2] = a**2 * H[:, 2, 2] + a * g[:, 2]
            info = -Hs
            finite = np.all(np.isfinite(info), (1, 2)) & np.all(np.isfinite(gs), 1) & np.isfinite(ll)
            info[~finite] = np.eye(3)
            lam = np.linalg.eigvalsh(info)[:, 0]
            shift = np.where(lam > 0, 0.0, 1e-6 - 1.5 * lam)
            step = np.linalg.solve(info + shift[:, None, None] * np.eye(3), gs[:, :, None])[:, :, 0]
        newton = finite & (shift == 0)
        done = newton & (np.max(np.abs(step), 1) < NegBinGLM._TOL)
        conv[idx[done]] = True
        fail = ~finite
        # step halving: accept the first t in 1, 1/2, ... that does not lower the log-likelihood
        t = np.ones(idx.size)
        todo = finite & ~done
        new = th.copy()
        for _h in range(40):
            j = np.flatnonzero(todo)
            if j.size == 0:
                break
            cand = th[j] + t[j, None] * step[j]
            with np.errstate(all="ignore"):
                lln = _nb2_parts(di.take(j), cand[:, 0], cand[:, 1], cand[:, 2], derivs=False)
            okj = np.isfinite(lln) & (lln >= ll[j] - 1e-12 * np.abs(ll[j]))
            new[j[okj]] = cand[okj]
            todo[j[okj]] = False
            t[j[~okj]] *= 0.5
        # no acceptable step: at the optimum to rounding when Newton's step is tiny, else stuck
        stuck = todo
        tiny = stuck & newton & (np.max(np.abs(step), 1) < 1e-6)
        conv[idx[tiny]] = True
        fail |= stuck & ~tiny
        theta[idx] = new
        low = new[:, 2] < floor
        bad[idx[fail | low]] = True
        active[idx[done | tiny | fail | low]] = False
    bad |= ~conv
    b0, b1, s = theta.T
    se = np.full(R, np.nan)
    idx = np.flatnonzero(~bad)
    if idx.size:
        with np.errstate(all="ignore"):
            _, _, H = _nb2_parts(data.take(idx), b0[idx], b1[idx], s[idx])
            info = -H
            fin = np.all(np.isfinite(info), (1, 2))
            info[~fin] = np.eye(3)
            lam = np.linalg.eigvalsh(info)[:, 0]
            pd = fin & (lam > 0)
            info[~pd] = np.eye(3)
            cov = np.linalg.inv(info)
        se[idx] = np.sqrt(cov[:, 1, 1])
        bad[idx[~pd]] = True  # statsmodels: HessianInversionWarning, no bse
    return b0, b1, se, bad


def _nb_irls(y, x, off, w, alpha, skip):
    """IRLS of the GLM with the NB2 family at known ``alpha`` and log link, step for step as
    statsmodels' ``GLM._fit_irls`` (start mu = (y + mean y) / 2, stop when the deviance changes by
    less than 1e-8, at most 100 iterations). The SE of b1 is from ``inv(X' W X)`` (scale 1) with
    the IRLS weights ``mu / (1 + alpha mu)`` of the last iteration, as statsmodels' ``bse``."""
    R = y.shape[0]
    k = 1.0 / alpha
    n = w.sum(1)
    with np.errstate(all="ignore"):
        ybar = np.sum(y * w, 1) / n
    mu = (y + ybar[:, None]) / 2.0
    eta = np.log(np.where(w > 0, mu, 1.0))

    def deviance(y, w, mu):
        with np.errstate(all="ignore"):
            t1 = y * np.log(np.clip(y / mu, np.finfo(float).eps, np.inf))
            t2 = (y + k) * np.log((y + k) / (mu + k))
        return np.sum(w * 2 * (t1 - t2), 1)

    dev = deviance(y, w, np.where(w > 0, mu, 1.0))
    beta = np.full((R, 2), np.nan)
    wts = np.zeros(y.shape)
    active = ~skip & np.isfinite(dev)
    conv = np.zeros(R, bool)
    for _ in range(100):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        mi, ei, xi, wi, oi = mu[idx], eta[idx], x[idx], w[idx], off[idx]
        ww = wi * mi / (1.0 + alpha * mi)
        z = ei + (y[idx] - mi) / np.where(wi > 0, mi, 1.0) - oi
        s00, s01 = ww.sum(1), (ww * xi).sum(1)
        t0, t1 = (ww * z).sum(1), (ww * xi * z).sum(1)
        det = s00 * s01 - s01 * s01          # x is 0/1: sum w x^2 = sum w x
        with np.errstate(all="ignore"):
            c0 = (s01 * t0 - s01 * t1) / det
            c1 = (-s01 * t0 + s00 * t1) / det
            etan = c0[:, None] + c1[:, None] * xi + oi
            mun = np.exp(etan)
        devn = deviance(y[idx], wi, np.where(wi > 0, mun, 1.0))
        beta[idx] = np.stack([c0, c1], 1)
        wts[idx] = ww
        mu[idx], eta[idx] = mun, etan
        done = np.isclose(dev[idx], devn, atol=1e-8, rtol=0.0)
        dev[idx] = devn
        conv[idx[done]] = True
        broken = ~np.isfinite(devn) | ~np.isfinite(c1)
        active[idx[done | broken]] = False
    s00, s01 = wts.sum(1), (wts * x).sum(1)
    with np.errstate(all="ignore"):
        se = np.sqrt(s00 / (s00 * s01 - s01 * s01))
    bad = skip | ~conv | ~np.isfinite(se)
    return beta[:, 0], beta[:, 1], se, bad
