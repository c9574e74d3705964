"""Two-arm ordinal outcomes: the proportional-odds model, and a dichotomised comparison.

Layout understood: a long table with ``y`` holding ordered categories (any
numbers; their sorted distinct values are the categories, as statsmodels'
``OrderedModel`` takes them; NaN = missing, dropped) and ``arm`` in {0, 1}.

``proportional_odds`` fits the cumulative-logit model

    logit P(Y <= k | arm) = theta_k - beta * arm,    k = 1..K-1,

by maximum likelihood, so ``beta`` = log of the odds ratio of a higher
category, treated over control (> 0: the treated arm is higher). This is the
parameterisation and sign of ``statsmodels.miscmodels.ordinal_model.
OrderedModel`` with ``distr="logit"`` and the arm as the only column of
``exog`` (``P(Y <= k | x) = F(cut_k - x b)``); the per-replicate path calls it.
Each replicate reduces to its 2 x K table of counts (the sufficient
statistics), so the batch path fits every replicate of a chunk at once by
Newton-Raphson on the counts; see :func:`fit_po_counts`.

``dichotomised`` compares the share of outcomes at or above ``cut`` between
the arms with the two-proportion z-test of ``two_proportions`` (by delegation).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import special

from .._validation import Bool, Choice, Real
from ..batch import Batch
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over, result_from_fields
from .binary import TwoProportions
from .numeric import p_from_z, wald

#: the batch path handles chunks with at most this many distinct outcome values (ordinal data);
#: more (e.g. continuous outcomes) go replicate by replicate
MAX_BATCH_LEVELS = 20
#: Newton-Raphson: iteration limit and the step size (relative to 1 + |parameter|) counted as converged
MAX_ITER = 100
STEP_TOL = 1e-10


# -- the two samples of one replicate ------------------------------------------------------------
def ordinal_arms(data) -> tuple[np.ndarray, np.ndarray]:
    """Observed outcomes of arm 0 and arm 1 of one replicate; ValueError without both arms."""
    y = np.asarray(data["y"], float)
    arm = np.asarray(data["arm"])
    ok = np.isfinite(y)
    levels = set(np.unique(arm[ok]).tolist())
    if levels != {0, 1}:
        raise ValueError(f"ordinal two-arm analyses need observed outcomes in arms 0 and 1; got arms {sorted(levels)}")
    return y[ok & (arm == 0)], y[ok & (arm == 1)]


def separated(lo0, hi0, lo1, hi1):
    """Whether the proportional-odds MLE of the arm effect is infinite (arrays or scalars).

    With one binary covariate the cumulative-logit likelihood has a direction of
    recession in beta exactly when the arms overlap in at most one category:
    ``max(arm 0) <= min(arm 1)`` or ``max(arm 1) <= min(arm 0)`` (the ordinal
    form of (quasi-)complete separation, Albert & Anderson 1984, Biometrika 71:1-10;
    derived here for this model). Then the estimate diverges and a fit stops
    wherever its optimiser does.
    """
    return (hi0 <= lo1) | (hi1 <= lo0)


# -- the batch fit on counts -------------------------------------------------------------------------
def _po_parts(theta, beta, counts, hessian=True):
    """Log-likelihood, gradient and Hessian of the cumulative-logit model on 2 x K tables.

    ``theta`` (R, K-1) increasing cut points, ``beta`` (R,), ``counts`` (R, 2, K).
    Parameters are ordered (theta_1..theta_{K-1}, beta). Each cell (arm a, category j)
    has probability pi = F(u) - F(l), u = theta_j - beta a, l = theta_{j-1} - beta a
    (F logistic; theta_0 = -inf, theta_K = inf), and adds n log pi; so its gradient is
    n dpi / pi and its Hessian n (d2pi / pi - dpi dpi' / pi^2), with
    dpi = f(u) du - f(l) dl and d2pi = f'(u) du du' - f'(l) dl dl' (f = F (1 - F),
    f' = f (1 - 2F)). Returns (loglik, grad, hess, ok); ``ok`` marks rows where
    every cell probability with a count is positive.
    """
    r, _, k = counts.shape
    arm = np.array([0.0, 1.0])
    eta = theta[:, None, :] - beta[:, None, None] * arm[None, :, None]           # (R, 2, K-1)
    big = special.expit(eta)
    f = big * (1.0 - big)
    zeros, ones = np.zeros((r, 2, 1)), np.ones((r, 2, 1))
    cdf = np.concatenate([zeros, big, ones], axis=2)                             # (R, 2, K+1)
    pi = cdf[:, :, 1:] - cdf[:, :, :-1]                                          # (R, 2, K)
    has = counts > 0
    ok = np.all(~has | (pi > 0), axis=(1, 2))
    with np.errstate(divide="ignore", invalid="ignore"):
        loglik = np.sum(np.where(has, counts * np.log(np.where(has, pi, 1.0)), 0.0), axis=(1, 2))
        w = np.where(has, counts / pi, 0.0)                                      # n / pi
    loglik = np.where(ok, loglik, -np.inf)
    fx = np.concatenate([zeros, f, zeros], axis=2)
    f_up, f_low = fx[:, :, 1:], fx[:, :, :-1]                                    # (R, 2, K)
    grad = np.empty((r, k))
    grad[:, :k - 1] = np.sum(f * (w[:, :, :-1] - w[:, :, 1:]), axis=1)
    grad[:, k - 1] = -np.sum(w[:, 1, :] * (f_up[:, 1, :] - f_low[:, 1, :]), axis=1)
    if not hessian:
        return loglik, grad, None, ok
    # d pi / d parameters of each cell: (R, 2, K, P), P = K
    d = np.zeros((r, 2, k, k))
    j = np.arange(k - 1)
    d[:, :, j, j] = f_up[:, :, :-1]
    d[:, :, j + 1, j] = -f_low[:, :, 1:]
    d[:, 1, :, k - 1] = -(f_up[:, 1, :] - f_low[:, 1, :])
    with np.errstate(divide="ignore", invalid="ignore"):
        v = np.where(has, counts / pi**2, 0.0)
    hess = -np.einsum("raj,rajp,rajq->rpq", v, d, d)
    # the second derivatives of pi: cut k is the upper bound of category k and the lower of k + 1
    c = f * (1.0 - 2.0 * big) * (w[:, :, :-1] - w[:, :, 1:])                    # (R, 2, K-1)
    hess[:, j, j] += c[:, 0, :] + c[:, 1, :]
    hess[:, j, k - 1] -= c[:, 1, :]
    hess[:, k - 1, j] -= c[:, 1, :]
    hess[:, k - 1, k - 1] += c[:, 1, :].sum(axis=1)
    return loglik, grad, hess, ok


def null_fit(counts):
    """Cut points and log-likelihood of the model without the arm (beta = 0): pooled cumulative logits."""
    pooled = counts.sum(axis=1)
    total = pooled.sum(axis=1, keepdims=True)
    cum = np.cumsum(pooled, axis=1)[:, :-1] / total
    theta = special.logit(cum)
    with np.errstate(divide="ignore", invalid="ignore"):
        ll0 = np.sum(np.where(pooled > 0, pooled * np.log(pooled / total), 0.0), axis=1)
    return theta, ll0


def fit_po_counts(counts):
    """Maximum likelihood fit of the proportional-odds model to 2 x K tables, all rows at once.

    Parameters
    ----------
    counts : ndarray (R, 2, K)
        Counts per arm (0, 1) and category; every category must be observed in
        some arm (pooled count > 0) and the arms must not be separated
        (:func:`separated`), so that the MLE exists.

    Returns
    -------
    beta, se, loglik, loglik0, converged : ndarrays (R,)
        The arm coefficient (log odds ratio of a higher category, treated over
        control), its SE from the observed information (the inverse Hessian's
        beta entry), the maximised log-likelihood, that of the null model
        (beta = 0), and whether Newton-Raphson converged.

    Newton-Raphson from the null fit (beta = 0, pooled cumulative logits), with the
    step halved until the log-likelihood does not decrease; a row has converged when
    its step is below 1e-10 (1 + |parameter|) in every parameter, at most 100
    iterations.
    """
    counts = np.asarray(counts, float)
    r, _, k = counts.shape
    theta, ll0 = null_fit(counts)
    beta = np.zeros(r)
    done = np.zeros(r, bool)
    for _ in range(MAX_ITER):
        act = np.flatnonzero(~done)
        if act.size == 0:
            break
        th, b, n = theta[act], beta[act], counts[act]
        cur, grad, hess, _ = _po_parts(th, b, n)
        with np.errstate(all="ignore"):
            try:
                step = np.linalg.solve(hess, -grad[:, :, None])[:, :, 0]
            except np.linalg.LinAlgError:
                step = np.stack([_solve_one(h, -g) for h, g in zip(hess, grad)])
        bad = ~np.all(np.isfinite(step), axis=1)
        step[bad] = 0.0
        scale = np.ones(act.size)
        new_th, new_b = th + step[:, :-1], b + step[:, -1]
        new_ll = _po_parts(new_th, new_b, n, hessian=False)[0]
        worse = ~(new_ll >= cur - 1e-12 * np.abs(cur))
        for _half in range(40):
            if not worse.any():
                break
            scale[worse] *= 0.5
            new_th[worse] = th[worse] + scale[worse, None] * step[worse, :-1]
            new_b[worse] = b[worse] + scale[worse] * step[worse, -1]
            new_ll[worse] = _po_parts(new_th[worse], new_b[worse], n[worse], hessian=False)[0]
            worse = ~(new_ll >= cur - 1e-12 * np.abs(cur))
        keep = ~worse & ~bad
        theta[act[keep]], beta[act[keep]] = new_th[keep], new_b[keep]
        size = np.max(np.abs(scale[:, None] * step) / (1.0 + np.abs(np.column_stack([th, b]))), axis=1)
        done[act[keep & (size <= STEP_TOL)]] = True
        done[act[~keep]] = True     # no ascent possible: stop (the gradient test below flags it)
    loglik, grad, hess, ok = _po_parts(theta, beta, counts)
    with np.errstate(all="ignore"):
        try:
            inv = np.linalg.inv(hess)
            var = -inv[:, k - 1, k - 1]
        except np.linalg.LinAlgError:
            var = np.array([-_inverse_entry(h) for h in hess])
        se = np.sqrt(np.where(var > 0, var, np.nan))
        gscale = np.max(np.abs(grad), axis=1) / (1.0 + np.abs(loglik))
    converged = done & ok & (gscale < 1e-6)
    return beta, se, loglik, ll0, converged


def _solve_one(h, g):
    try:
        return np.linalg.solve(h, g)
    except np.linalg.LinAlgError:
        return np.full(g.shape, np.nan)


def _inverse_entry(h):
    try:
        return np.linalg.inv(h)[-1, -1]
    except np.linalg.LinAlgError:
        return np.nan


def _compact_tables(counts, nonempty, rows, m):
    """The tables of ``rows`` with their ``m`` observed categories only, in order: (len(rows), 2, m)."""
    idx = np.argsort(~nonempty[rows], axis=1, kind="stable")[:, :m]
    return np.take_along_axis(counts[rows], np.broadcast_to(idx[:, None, :], (rows.size, 2, m)), axis=2)


def batch_tables(layout):
    """2 x K tables of counts (R, 2, K) over the sorted distinct observed values of a two-arm layout."""
    y, obs = layout.y, layout.observed
    levels = np.unique(y[obs])
    r, n = y.shape
    k = levels.size
    code = np.searchsorted(levels, np.where(obs, y, levels[0] if k else 0.0))
    arm = np.broadcast_to(np.asarray(layout.arm, np.intp), (r, n))
    cell = (np.arange(r)[:, None] * 2 + arm) * k + code
    counts = np.bincount(cell[obs], minlength=r * 2 * k).reshape(r, 2, k).astype(float)
    return counts, levels


class ProportionalOdds(Analysis):
    """Proportional-odds (cumulative logit) regression of an ordinal outcome on the arm.

    H0: the odds ratio of a higher category, treated vs control, is 1 (beta = 0).
    The estimate is beta, the log odds ratio (> 0: the treated arm is higher),
    with its SE from the observed information, a Wald CI, and the Wald test
    (``test = "wald"``, default) or the likelihood-ratio test (``"lr"``; one-sided
    by the signed root). The score test of beta = 0 in this model is the
    Mann-Whitney test with mid-ranks (McCullagh 1980), offered as ``mann_whitney``.

    Per replicate: statsmodels ``OrderedModel(y, arm, distr="logit")`` fitted by
    its Newton method (numerical derivatives; the slope to about 1e-8, its SE,
    from a finite-difference Hessian, to about 1e-5 relative); its slope has this sign, and its threshold
    parameterisation (the first cut, then log increments) leaves the slope and
    its SE unchanged. Categories nobody in the replicate falls into are dropped
    (OrderedModel relabels the observed values), which leaves the likelihood of
    the others unchanged. Where the arms overlap in at most one category the
    MLE is infinite (:func:`separated`): the analysis then warns
    ``PerfectSeparationWarning`` (fit trouble, by replicate) and reports where
    OrderedModel's BFGS stops (a large slope with a larger SE). A
    replicate with one observed category has nothing to fit (p-value NaN).

    Batch path: the 2 x K tables of a chunk, fitted at once by Newton-Raphson
    (:func:`fit_po_counts`), replicates grouped by their number of observed
    categories; separated replicates and those lacking an arm go to the
    per-replicate path; a replicate whose Newton-Raphson does not converge is
    flagged ``warning:ConvergenceWarning``. It agrees with OrderedModel to its
    optimiser's accuracy (tests/test_ordinal.py).
    """

    name = "proportional_odds"
    estimand_label = "log odds ratio"
    null_hypothesis = "the odds ratio of a higher category (treatment vs control) is 1"
    params = {"alternative": ALTERNATIVE, "test": Choice(("wald", "lr")), "ci_level": CI_LEVEL}
    defaults = {"alternative": "two-sided", "test": "wald", "ci_level": 0.95}

    def _fields(self, est, se, ll, ll0):
        out = wald(est, se, self.alternative, self.ci_level)
        if self.test == "lr":
            with np.errstate(invalid="ignore"):
                z = np.sign(est) * np.sqrt(np.maximum(2.0 * (ll - ll0), 0.0))
            out["pvalue"] = p_from_z(z, self.alternative)
        return out

    def __call__(self, data):
        from statsmodels.miscmodels.ordinal_model import OrderedModel

        y0, y1 = ordinal_arms(data)
        both = np.concatenate([y0, y1])
        if np.unique(both).size < 2:
            return TestResult(pvalue=math.nan)
        split = bool(separated(y0.min(), y0.max(), y1.min(), y1.max()))
        if split:
            from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

            warnings.warn(PerfectSeparationWarning(
                "the arms overlap in at most one category: the log odds ratio has no finite maximum "
                "likelihood estimate"))
        arm = np.concatenate([np.zeros(y0.size), np.ones(y1.size)])[:, None]
        # Newton needs the Hessian's inverse, singular on the way to an infinite slope: BFGS then
        method = "bfgs" if split else "newton"
        fit = OrderedModel(both, arm, distr="logit").fit(method=method, disp=0, maxiter=1000 if split else 200)
        est, se = float(fit.params[0]), float(fit.bse[0])
        ll0 = float(fit.llnull) if self.test == "lr" else math.nan
        return result_from_fields(self._fields(est, se, float(fit.llf), ll0))

    layouts = ("two_arm",)

    def _supports(self, layout):
        """Ordinal outcomes: at most :data:`MAX_BATCH_LEVELS` distinct observed values in the chunk."""
        return np.unique(layout.y[layout.observed]).size <= MAX_BATCH_LEVELS

    def batch(self, batch):
        layout = self.batch_layout(batch)
        counts, _ = batch_tables(layout)
        r, _, k = counts.shape
        nonempty = counts.sum(axis=1) > 0
        present = np.arange(k)
        big = k + 1
        lo = np.where(counts > 0, present, big).min(axis=2)                     # (R, 2) lowest category per arm
        hi = np.where(counts > 0, present, -1).max(axis=2)
        handed = (counts.sum(axis=2) == 0).any(axis=1) | separated(lo[:, 0], hi[:, 0], lo[:, 1], hi[:, 1])
        m = nonempty.sum(axis=1)
        out = {f: np.full(r, np.nan) for f in ("pvalue", "estimate", "se", "ci_low", "ci_high")}
        unconverged = np.zeros(r, bool)
        fit_rows = ~handed & (m >= 2)
        for size in np.unique(m[fit_rows]):
            rows = np.flatnonzero(fit_rows & (m == size))
            tables = counts[rows] if size == k else _compact_tables(counts, nonempty, rows, int(size))
            est, se, ll, ll0, conv = fit_po_counts(tables)
            for f, v in self._fields(est, se, ll, ll0).items():
                out[f][rows] = v
            unconverged[rows] = ~conv
        res = BatchResult(**out)
        if unconverged.any():
            res.mark("warning:ConvergenceWarning", unconverged,
                     "Newton-Raphson for the proportional-odds model did not converge in 100 iterations")
        return hand_over(self, batch, res, handed)


# -- dichotomised ----------------------------------------------------------------------------------
class Dichotomised(Analysis):
    """The share of outcomes at or above ``cut``, compared between arms by the two-proportion z-test.

    Each outcome becomes 1 if ``y >= cut`` and 0 otherwise (missing stays
    missing); then exactly ``two_proportions`` (pooled SE under H0, optional
    continuity correction; the estimate is the difference in shares, treatment
    minus control, with the Wald CI), per replicate and on a batch.

    Parameters
    ----------
    cut : float
        The lowest category counted as a "success" (categories 0..K-1 of
        ``ordinal_two_arm``: 1..K-1).
    alternative, continuity, ci_level
        As for ``two_proportions``.
    """

    name = "dichotomised"
    estimand_label = "difference in the share at or above the cut"
    null_hypothesis = "the share of outcomes at or above the cut is the same in both arms"
    params = {"cut": Real(), "alternative": ALTERNATIVE, "continuity": Bool(), "ci_level": CI_LEVEL}
    defaults = {"alternative": "two-sided", "continuity": False, "ci_level": 0.95}

    @property
    def test(self) -> TwoProportions:
        """The two-proportion test it delegates to."""
        return TwoProportions(alternative=self.alternative, continuity=self.continuity, ci_level=self.ci_level)

    def _split(self, y):
        with np.errstate(invalid="ignore"):
            return np.where(np.isfinite(y), (y >= self.cut).astype(float), np.nan)

    def __call__(self, data):
        table = dict(data)
        table["y"] = self._split(np.asarray(data["y"], float))
        return self.test(table)

    layouts = ("two_arm",)

    def batch(self, batch):
        self.batch_layout(batch)
        per_rep = dict(batch.per_rep)
        per_rep["y"] = self._split(np.asarray(batch["y"], float))
        return self.test.batch(Batch(batch.size, per_rep, batch.shared, batch.info))


__all__ = ["ProportionalOdds", "Dichotomised", "fit_po_counts", "separated", "batch_tables", "ordinal_arms"]
