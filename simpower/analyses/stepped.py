"""The linear mixed model of a stepped-wedge trial: statsmodels MixedLM per replicate, REML batches.

Model (Hussey & Hughes 2007; Hooper et al. 2016 for the nested form):

    y_ikt = mu_t + theta treat_kt + b_k [+ c_kt] + e_ikt,

period fixed effects ``mu_t``, a random cluster intercept ``b_k ~ N(0, sigma_b^2)``,
with ``structure = "nested"`` also a cluster-period random effect
``c_kt ~ N(0, sigma_c^2)``, residuals ``e ~ N(0, sigma_e^2)``; fitted by REML, Wald
test of theta = 0.

Per replicate, :class:`SteppedMixed` calls statsmodels ``MixedLM`` with the
formula ``y ~ C(period) + treat``, ``groups = cluster`` and, for the nested
structure, the variance component ``0 + C(period)`` within clusters, optimised
by Powell's method with tight tolerances (statsmodels' default gradient
methods often stop short of the REML optimum here: by up to 0.1 in the log
likelihood of a nested model in our trials), or by statsmodels' default
where Powell's method steps on a variance of exactly 0 (a singular system).

The batch path (treatment constant within each cluster-period cell, every
period observed; design columns shared or, with variable cluster sizes, per
replicate and padded) uses the cell sufficient statistics: with ``n_kt`` observed
outcomes of mean ``ybar_kt`` in a cell, the within-cell sum of squares ``W``
carries ``sigma_e^2`` only, and ``z_kt = sqrt(n_kt) ybar_kt`` has, per cluster,
covariance ``sigma_e^2 (I + gamma_c diag(n) + gamma_b v v')``, ``v = sqrt(n)``,
``gamma = sigma^2 / sigma_e^2``. The REML criterion with ``sigma_e^2`` and the
fixed effects profiled out,

    f(gamma) = (N - p) log(W + Q) + log|V| + log|X' V^-1 X|,

(``Q`` the GLS residual form of the ``z``, N observations, p = periods + 1
fixed effects) is scanned on a grid of variance ratios for all replicates at
once and minimised by projected Newton steps with its analytic gradient and
Hessian (a ratio estimated at 0 stays on the boundary when the gradient
points outward). The standard error is statsmodels': the inverse of the
Hessian of the profiled log-likelihood in (fixed effects, variance ratios),
the ratios at the boundary included. Where that Hessian is not positive
definite (statsmodels then warns, and may give no standard error) the
replicate is flagged as fit trouble (``warning:ConvergenceWarning``) and
reports the standard error without the ratios held at 0.

Reference distribution (``df``): ``"wald"`` the normal (statsmodels' own and
Hussey & Hughes's); ``"clusters"`` Student's t with G - 2 degrees of freedom,
G the clusters with an observed outcome (common practice for cluster trials with
few clusters; Hemming, Kasza et al. 2020, BMJ, recommend a small-sample
correction for stepped wedges with fewer than about 40 clusters, from memory).
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from .._validation import Choice
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import wald_fields

#: statsmodels' warning at a small variance estimate: a boundary fit is an answer, not fit trouble
BOUNDARY_WARNING = r".*on the boundary of the parameter space"
TROUBLE_MESSAGE = "batch REML (stepped wedge): no interior optimum with a negative definite Hessian was reached"

GRID_1D = 0.995 * np.linspace(0.0, 1.0, 21) ** 2
GRID_2D = 0.99 * np.linspace(0.0, 1.0, 9) ** 2
NEWTON_STEPS = 60


# ---------------------------------------------------------------------------
# cell sufficient statistics
# ---------------------------------------------------------------------------
class _Cells:
    """Per-replicate cell statistics: counts n, means ybar (R, K, T), within-cell SS W and N (R,)."""

    def __init__(self, n, ybar, W, N, X, shift):
        self.n, self.ybar, self.W, self.N, self.X, self.shift = n, ybar, W, N, X, shift
        self.p = X.shape[-1]
        self.fac = N - self.p

    def subset(self, sel):
        return _Cells(self.n[sel], self.ybar[sel], self.W[sel], self.N[sel], self.X, self.shift[sel])


def cell_statistics(y, observed, cluster, period, treat, present=None) -> _Cells | None:
    """Cell statistics of a stepped batch; None if treat varies within a cell (or between replicates).

    The integer design columns are shared (N,) or per replicate (R, N) (variable cluster
    sizes, padded; ``present`` marks the rows that exist).
    """
    R, Nw = y.shape
    cluster = np.broadcast_to(np.asarray(cluster, np.intp), (R, Nw))
    period = np.broadcast_to(np.asarray(period, np.intp), (R, Nw))
    tr = np.broadcast_to(np.asarray(treat, float), (R, Nw))
    rows = np.ones((R, Nw), bool) if present is None else np.asarray(present, bool)
    K, T = int(cluster[rows].max()) + 1, int(period[rows].max()) + 1
    C = K * T
    cell = cluster * T + period
    flat = (cell + C * np.arange(R)[:, None]).ravel()
    cnt = np.bincount(flat, rows.ravel().astype(float), R * C).reshape(R, C)
    tsum = np.bincount(flat, np.where(rows, tr, 0.0).ravel(), R * C).reshape(R, C)
    if np.any((tsum != 0) & (tsum != cnt)):
        return None                                   # treat varies within a cell
    seen = cnt > 0
    t1, t0 = np.any(seen & (tsum > 0), axis=0), np.any(seen & (tsum == 0), axis=0)
    if np.any(t1 & t0):
        return None                                   # a cell treated in one replicate, not in another
    w = observed.astype(float)
    y0 = np.where(observed, y, 0.0)
    N = w.sum(1)
    with np.errstate(all="ignore"):
        shift = y0.sum(1) / N
    yc = np.where(observed, y - shift[:, None], 0.0)
    n = np.bincount(flat, w.ravel(), R * C).reshape(R, C)
    s = np.bincount(flat, yc.ravel(), R * C).reshape(R, C)
    with np.errstate(all="ignore"):
        ybar = np.where(n > 0, s / np.maximum(n, 1), 0.0)
    dev = np.where(observed, yc - np.take_along_axis(ybar, cell, axis=1), 0.0)
    W = (dev * dev).sum(1)
    X = np.zeros((K, T, T + 1))
    X[:, np.arange(T), np.arange(T)] = 1.0
    X[..., T] = t1.reshape(K, T)
    return _Cells(n.reshape(R, K, T), ybar.reshape(R, K, T), W, N, X, shift)


# ---------------------------------------------------------------------------
# the profiled REML criterion, its derivatives, the fit
# ---------------------------------------------------------------------------
def _by_cluster(w, X):
    """``sum_t w[r, k, t] X[k, t, :]`` for every replicate and cluster: (R, K, p)."""
    return np.matmul(w.transpose(1, 0, 2), X).transpose(1, 0, 2)


def _criterion(gb, gc, st: _Cells):
    """Profiled criterion f (R,) at variance ratios gb, gc (R,) (structured inverse, no derivatives).

    Per cluster ``V^-1 = D - c (D v)(D v)'`` with ``D = diag(1 / (1 + gc n))`` and
    ``c = gb / (1 + gb v' D v)`` (Sherman-Morrison); ``v * Xz = n X``, so only ``d n`` and
    ``d n ybar`` are needed.
    """
    n = st.n
    R, K, T = n.shape
    p = st.p
    d = 1.0 / (1.0 + gc[:, None, None] * n)
    dn = d * n
    dny = dn * st.ybar
    sv = dn.sum(-1)
    c = gb[:, None] / (1.0 + gb[:, None] * sv)
    XX = (st.X[..., :, None] * st.X[..., None, :]).reshape(K * T, p * p)
    dvX = _by_cluster(dn, st.X)
    A = (dn.reshape(R, K * T) @ XX).reshape(R, p, p) - np.matmul((c[..., None] * dvX).transpose(0, 2, 1), dvX)
    dvz = dny.sum(-1)
    b = _by_cluster(dny, st.X).sum(1) - np.einsum("rk,rkp->rp", c * dvz, dvX)
    zz = (dny * st.ybar).sum((1, 2)) - (c * dvz * dvz).sum(1)
    with np.errstate(all="ignore"):
        sign, logdetA = np.linalg.slogdet(A)
        beta = np.linalg.solve(A, b[..., None])[..., 0]
        Q = st.W + zz - (beta * b).sum(-1)
        logdetV = np.log1p(gc[:, None, None] * n).sum((1, 2)) + np.log1p(gb[:, None] * sv).sum(1)
        f = st.fac * np.log(Q) + logdetV + logdetA
    return np.where((sign > 0) & (Q > 0), f, np.inf)


def _flat(a):
    """(R, K, T, ...) -> (R, K * T, ...)."""
    return a.reshape((a.shape[0], a.shape[1] * a.shape[2]) + a.shape[3:])


def _xtmy(X, M, Y):
    """``sum_k X_k' M_k Y_k`` for (R, K, T, a), (R, K, T, T), (R, K, T, b): (R, a, b)."""
    return np.matmul(_flat(X).transpose(0, 2, 1), _flat(M @ Y))


def _tr(M):
    return np.trace(M, axis1=-2, axis2=-1)


def _derivatives(gb, gc, st: _Cells, nested: bool):
    """f, the profiled gradient g (R, q) and Hessian H (R, q, q), the full matrix F over (beta, gamma), beta."""
    n = st.n
    R, K, T = n.shape
    v = np.sqrt(n)
    z = (v * st.ybar)[..., None]
    Xz = v[..., None] * st.X
    eye = np.eye(T)
    V = (eye + (gc[:, None, None] * n)[..., None] * eye
         + gb[:, None, None, None] * v[..., :, None] * v[..., None, :])
    Vi = np.linalg.inv(V)
    A = _xtmy(Xz, Vi, Xz)
    b = _xtmy(Xz, Vi, z)[..., 0]
    Ai = np.linalg.inv(A)
    beta = np.einsum("rpq,rq->rp", Ai, b)
    r = z - Xz @ beta[:, None, :, None]
    Q = st.W + _xtmy(r, Vi, r)[:, 0, 0]
    fac = st.fac
    _, logdetA = np.linalg.slogdet(A)
    f = fac * np.log(Q) + np.linalg.slogdet(V)[1].sum(1) + logdetA
    Ds = [v[..., :, None] * v[..., None, :]]
    if nested:
        Ds.append(n[..., None] * eye)
    q, p = len(Ds), st.p
    ViD = [Vi @ D for D in Ds]
    P = [VD @ Vi for VD in ViD]
    Qi = [-_xtmy(r, Pi, r)[:, 0, 0] for Pi in P]
    Ai_ = [-_xtmy(Xz, Pi, Xz) for Pi in P]
    AiAi_ = [Ai @ M for M in Ai_]
    g = np.stack([fac * Qi[i] / Q + _tr(ViD[i]).sum(1) + _tr(AiAi_[i]) for i in range(q)], -1)
    F = np.empty((R, p + q, p + q))
    F[:, :p, :p] = 2.0 * fac[:, None, None] * A / Q[:, None, None]
    for i in range(q):
        F[:, :p, p + i] = F[:, p + i, :p] = 2.0 * fac[:, None] * _xtmy(Xz, P[i], r)[..., 0] / Q[:, None]
        for j in range(i, q):
            ViDiViDj = ViD[i] @ ViD[j]
            Qij = 2.0 * _xtmy(r, ViDiViDj @ Vi, r)[:, 0, 0]
            Aij = _xtmy(Xz, ViDiViDj @ Vi + ViD[j] @ ViD[i] @ Vi, Xz)
            Lij = -_tr(ViDiViDj).sum(1) + _tr(Ai @ Aij) - _tr(AiAi_[i] @ AiAi_[j])
            F[:, p + i, p + j] = F[:, p + j, p + i] = fac * (Qij / Q - Qi[i] * Qi[j] / Q**2) + Lij
    Fbb_inv = np.linalg.inv(F[:, :p, :p])
    Fbg = F[:, :p, p:]
    H = F[:, p:, p:] - Fbg.transpose(0, 2, 1) @ Fbb_inv @ Fbg
    return f, g, H, F, beta, Q


def _exchangeable(gb, st: _Cells):
    """What :func:`_derivatives` gives for the random-intercept model, from per-cluster sums only.

    With ``V = I + gb v v'`` per cluster, ``u = V^-1 v = v / (1 + gb sv)`` (``sv = sum_t n``):
    ``Q_b = -sum (u'r)^2``, ``A_b = -sum (X'u)(X'u)'``, ``Q_bb = 2 sum (v'u)(u'r)^2``,
    ``A_bb = 2 sum (v'u)(X'u)(X'u)'``, ``tr(V^-1 V_b V^-1 V_b) = sum (v'u)^2``.
    """
    n = st.n
    R, K, T = n.shape
    p = st.p
    ny = n * st.ybar
    sv = n.sum(-1)
    h = 1.0 / (1.0 + gb[:, None] * sv)
    c = gb[:, None] * h
    XX = (st.X[..., :, None] * st.X[..., None, :]).reshape(K * T, p * p)
    nX = _by_cluster(n, st.X)
    A = (n.reshape(R, K * T) @ XX).reshape(R, p, p) - np.matmul((c[..., None] * nX).transpose(0, 2, 1), nX)
    nys = ny.sum(-1)
    b = _by_cluster(ny, st.X).sum(1) - np.einsum("rk,rkp->rp", c * nys, nX)
    zz = (ny * st.ybar).sum((1, 2)) - (c * nys * nys).sum(1)
    Ai = np.linalg.inv(A)
    beta = np.einsum("rpq,rq->rp", Ai, b)
    Q = st.W + zz - (beta * b).sum(-1)
    fac = st.fac
    f = fac * np.log(Q) + np.log1p(gb[:, None] * sv).sum(1) + np.linalg.slogdet(A)[1]
    ur = (nys - np.einsum("rkp,rp->rk", nX, beta)) * h
    xu = nX * h[..., None]
    vu = sv * h
    Qb = -(ur * ur).sum(1)
    Ab = -np.matmul(xu.transpose(0, 2, 1), xu)
    AiAb = Ai @ Ab
    g = (fac * Qb / Q + vu.sum(1) + _tr(AiAb))[:, None]
    F = np.empty((R, p + 1, p + 1))
    F[:, :p, :p] = 2.0 * fac[:, None, None] * A / Q[:, None, None]
    F[:, :p, p] = F[:, p, :p] = 2.0 * fac[:, None] * np.einsum("rkp,rk->rp", xu, ur) / Q[:, None]
    Qbb = 2.0 * (vu * ur * ur).sum(1)
    Abb = 2.0 * np.matmul((vu[..., None] * xu).transpose(0, 2, 1), xu)
    Lbb = -(vu * vu).sum(1) + _tr(Ai @ Abb) - _tr(AiAb @ AiAb)
    F[:, p, p] = fac * (Qbb / Q - Qb * Qb / Q**2) + Lbb
    Fbg = F[:, :p, p:]
    H = F[:, p:, p:] - Fbg.transpose(0, 2, 1) @ np.linalg.inv(F[:, :p, :p]) @ Fbg
    return f, g, H, F, beta, Q


def _parts(gb, gc, st: _Cells, nested: bool):
    return _derivatives(gb, gc, st, True) if nested else _exchangeable(gb, st)


def _start(st: _Cells, nested: bool):
    """The best grid point per replicate (ratios gb, gc)."""
    R = st.n.shape[0]
    best = np.full(R, np.inf)
    gb_best, gc_best = np.zeros(R), np.zeros(R)
    grid_c = GRID_2D if nested else np.zeros(1)
    grid_b = GRID_2D if nested else GRID_1D
    for rc in grid_c:
        for rb in grid_b:
            gb = np.full(R, rb / (1.0 - rb))
            gc = np.full(R, rc / (1.0 - rc))
            f = _criterion(gb, gc, st)
            better = f < best
            best = np.where(better, f, best)
            gb_best = np.where(better, gb, gb_best)
            gc_best = np.where(better, gc, gc_best)
    return gb_best, gc_best


def _newton(st: _Cells, nested: bool):
    """REML variance ratios per replicate: grid start, projected Newton, backtracking."""
    R = st.n.shape[0]
    q = 2 if nested else 1
    gam = np.stack(_start(st, nested), -1)[:, :q]
    done = np.zeros(R, bool)
    for _ in range(NEWTON_STEPS):
        act = ~done
        if not act.any():
            break
        sub = st.subset(act)
        g_a = gam[act]
        gc_a = g_a[:, 1] if nested else np.zeros(g_a.shape[0])
        with np.errstate(all="ignore"):
            f0, g, H, _, _, _ = _parts(g_a[:, 0], gc_a, sub, nested)
        fixed = (g_a <= 0) & (g > 0)           # on the boundary, gradient pointing outward
        free = ~fixed
        Hf = np.where(free[:, :, None] & free[:, None, :], H, 0.0) + np.where(fixed, 1.0, 0.0)[:, :, None] * np.eye(q)
        gf = np.where(free, g, 0.0)
        with np.errstate(all="ignore"):
            step = -np.linalg.solve(Hf, gf[..., None])[..., 0]
            pd = np.all(np.linalg.eigvalsh(Hf) > 0, axis=-1)
        # not convex here: a scaled gradient step
        fallback = -gf / np.maximum(np.abs(np.diagonal(Hf, axis1=1, axis2=2)), 1e-8)
        step = np.where(pd[:, None] & np.all(np.isfinite(step), -1, keepdims=True), step, fallback)
        step = np.clip(step, -1e6, 1e6)
        scale = np.ones(g_a.shape[0])
        new = np.maximum(g_a + step, 0.0)
        accepted = np.zeros(g_a.shape[0], bool)
        for _half in range(40):
            new = np.maximum(g_a + scale[:, None] * step, 0.0)
            f1 = _criterion(new[:, 0], new[:, 1] if nested else gc_a, sub)
            ok = f1 <= f0 + 1e-12 * np.abs(f0)
            accepted |= ok
            if accepted.all():
                break
            scale = np.where(accepted, scale, 0.5 * scale)
        moved = np.abs(new - g_a).max(-1)
        gam_new = np.where(accepted[:, None], new, g_a)
        conv = (moved <= 1e-10 * (1.0 + np.abs(g_a).max(-1))) | ~accepted
        gam[act] = gam_new
        idx = np.flatnonzero(act)
        done[idx[conv]] = True
    return gam, done


def fit_cells(st: _Cells, nested: bool):
    """Batched REML fit from cell statistics: dict of arrays (R,)."""
    gam, converged = _newton(st, nested)
    gb = gam[:, 0]
    gc = gam[:, 1] if nested else np.zeros_like(gb)
    with np.errstate(all="ignore"):
        f, g, H, F, beta, Q = _parts(gb, gc, st, nested)
    p = st.p
    q = gam.shape[1]
    at_bound = gam <= 0
    free = ~at_bound
    with np.errstate(all="ignore"):
        # statsmodels' covariance: the inverse of the whole Hessian in (beta, gamma), the ratios at the
        # boundary included; where that is not positive there, the ratios held at 0 are left out
        cov = 2.0 * np.linalg.inv(F)
        keep = np.concatenate([np.ones((gb.size, p), bool), free], axis=1)
        Fk = np.where(keep[:, :, None] & keep[:, None, :], F, 0.0) + np.where(keep, 0.0, 1.0)[:, :, None] * np.eye(p + q)
        reduced = 2.0 * np.linalg.inv(Fk)
        bad = ~(cov[:, p - 1, p - 1] > 0) & at_bound.any(axis=1)
        cov[bad] = reduced[bad]
        # statsmodels warns (ConvergenceWarning) when this whole Hessian is not positive definite
        not_pd = ~np.all(np.linalg.eigvalsh(F) > 0, axis=-1)
    se = np.sqrt(cov[:, p - 1, p - 1])
    scale = Q / st.fac
    return {"theta": beta[:, p - 1], "se": se, "gamma_b": gb, "gamma_c": gc, "sigma_e2": scale,
            "trouble": not_pd | ~converged | ~np.isfinite(se)}


# ---------------------------------------------------------------------------
# the analysis
# ---------------------------------------------------------------------------
class SteppedMixed(Analysis):
    """Linear mixed model of a stepped-wedge trial: period fixed effects, treatment, random cluster effects.

    H0: theta (treated minus control, adjusted for period) is 0.

    Parameters
    ----------
    structure : {"exchangeable", "nested"}
        Random cluster intercept only (Hussey & Hughes 2007), or also a
        cluster-period random effect (Hooper et al. 2016; Girling & Hemming 2016).
    df : {"wald", "clusters"}
        Normal reference, or Student's t with clusters - 2 df (see the module notes).
    alternative : {'two-sided', 'greater', 'less'}
    ci_level : float in (0, 1)

    Notes
    -----
    Needs the columns ``y``, ``cluster``, ``period``, ``treat`` (the ``stepped_wedge``
    process's long table). Rows with a missing outcome are dropped.
    """

    name = "sw_mixed"
    null_hypothesis = "no treatment effect (theta = 0), adjusted for period"
    estimand_label = "mean difference"   # a linear model: on a binary or count outcome not the process's estimand
    params = {"structure": Choice(("exchangeable", "nested")), "df": Choice(("wald", "clusters")),
              "alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"structure": "exchangeable", "df": "wald", "alternative": "two-sided", "ci_level": 0.95}
    layouts = ("stepped",)

    # -- per replicate -------------------------------------------------------
    def __call__(self, data):
        import pandas as pd
        from statsmodels.regression.mixed_linear_model import MixedLM  # smf.mixedlm is MixedLM.from_formula

        frame = data if isinstance(data, pd.DataFrame) else pd.DataFrame(
            {k: np.asarray(v) for k, v in dict(data).items()})
        for col in ("y", "cluster", "period", "treat"):
            if col not in frame:
                raise ValueError(f"sw_mixed needs a {col!r} column (a stepped-wedge long table)")
        frame = frame[np.isfinite(frame["y"].to_numpy(float))]
        extra = ({"re_formula": "1", "vc_formula": {"period": "0 + C(period)"}} if self.structure == "nested" else {})
        model = MixedLM.from_formula("y ~ C(period) + treat", frame, groups=frame["cluster"], **extra)
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=BOUNDARY_WARNING)
            try:
                fit = model.fit(reml=True, method="powell", ftol=1e-12, maxiter=5000)
            except np.linalg.LinAlgError:  # Powell tried a variance of exactly 0: the default optimiser
                fit = model.fit(reml=True)
        est = float(fit.fe_params["treat"])
        se = float(fit.bse_fe["treat"])
        df = float(frame["cluster"].nunique() - 2) if self.df == "clusters" else None
        return self._result(np.asarray(est), np.asarray(se), df, scalar=True)

    def _result(self, est, se, df, scalar=False):
        out, stat = wald_fields(est, se, df, self.alternative, self.ci_level)
        if scalar:
            return TestResult(**{k: float(v) for k, v in out.items()}, statistic=float(stat),
                              df=math.inf if df is None else float(df))
        return out

    # -- batch ---------------------------------------------------------------
    def _supports(self, layout):
        cols = [np.asarray(c) for c in (layout.cluster, layout.period, layout.treat)]
        if any(c.shape not in (layout.y.shape, layout.y.shape[1:]) for c in cols):
            return False
        if not all(np.issubdtype(c.dtype, np.integer) for c in cols[:2]):
            return False
        return bool(np.all((cols[2] == 0) | (cols[2] == 1)) and cols[0].min() >= 0 and cols[1].min() >= 0)

    def batch(self, batch):
        layout = self.batch_layout(batch)
        st = cell_statistics(layout.y, layout.observed, layout.cluster, layout.period, layout.treat, layout.present)
        if st is None:
            raise ValueError("sw_mixed batch path: treat varies within a cluster-period cell")
        R = layout.size
        # periods or clusters without an observed outcome (or too few outcomes): statsmodels per replicate
        n_per = st.n.sum(1)
        n_cl = st.n.sum(2)
        odd = np.any(n_per == 0, axis=1) | (st.fac <= 0)
        good = ~odd
        est = np.full(R, np.nan)
        se = np.full(R, np.nan)
        trouble = np.zeros(R, bool)
        if good.any():
            fit = fit_cells(st.subset(good), self.structure == "nested")
            est[good], se[good], trouble[good] = fit["theta"], fit["se"], fit["trouble"]
        df = (n_cl > 0).sum(1) - 2.0 if self.df == "clusters" else None
        out = BatchResult(**self._result(est, se, df))
        out.trouble = {"warning:ConvergenceWarning": trouble}
        out.trouble_messages = {"warning:ConvergenceWarning": TROUBLE_MESSAGE}
        if odd.any():
            out = hand_over(self, batch, out, odd)
        return out
