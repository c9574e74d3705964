"""The linear mixed model with a random intercept: statsmodels MixedLM per replicate, REML batches.

Model: ``y_ij = x_ij' beta + b_j + e_ij`` with ``b_j ~ N(0, sigma_b^2)`` per
group (cluster or subject) and ``e_ij ~ N(0, sigma_e^2)``, fitted by REML.
The test is on one fixed-effect coefficient (by default the arm effect).

Per replicate, :class:`MixedModel` calls ``statsmodels`` ``MixedLM`` and lets
its warnings (``ConvergenceWarning`` and the like) through, so the engine
records fit trouble per replicate.

The batch path covers the two-arm random-intercept model ``y ~ C(arm)`` with
groups = ``cluster`` (arms constant within clusters, or varying within them,
any cluster sizes). With ``gamma = sigma_b^2 / sigma_e^2`` each group's
covariance is ``sigma_e^2 (I + gamma J)``, whose inverse is
``(I - c J) / sigma_e^2`` with ``c = gamma / (1 + m gamma)``; so the GLS
estimate given ``gamma`` and the REML criterion with ``sigma_e^2`` profiled
out need only per-cluster sums (size, arm count, sum of y, sum of arm * y).
The one-dimensional criterion in the ICC ``gamma / (1 + gamma)`` is scanned
on a grid and refined by bisection on its derivative, for all replicates at
once; when the derivative at 0 is >= 0 the estimate is the boundary,
``sigma_b^2 = 0``. Standard errors then follow statsmodels: the inverse of
the observed Hessian of the profiled REML log-likelihood in (beta, gamma);
at the boundary, where that Hessian need not be definite, the fixed-effect
block alone (``sigma_e^2 (X'X)^-1``, the OLS standard error).

A second batch path covers any formula whose design is the same in every
replicate up to the observed rows: the outcome per replicate, the groups and
every formula column shared (repeated measures: ``y ~ C(arm) * C(visit,
Treatment(3))`` with groups = ``subject``). The design is the one statsmodels
builds for the full table; groups with the same type (full design) and the
same observed rows form a *pattern* sharing ``m``, ``X_j' 1`` and
``X_j' X_j``, so the criterion, its derivative and the observed Hessian above
need only per-pattern sums (count, sum of ``1' y_j``, sum of ``(1' y_j)^2``)
plus ``X'X``, ``X'y`` and ``y'y``; the same solver and boundary convention
apply. A replicate where some level is never observed (``X'X`` singular;
statsmodels then builds a smaller design or fails) goes to the per-replicate
path.
A REML estimate on the boundary (cluster variance 0) is a valid answer, not fit
trouble: statsmodels' warning "The MLE may be on the boundary of the parameter
space", which it raises below an *absolute* variance of 0.01 (so whether a
replicate "failed" would depend on the outcome's units), is not counted, and
the batch path does not flag the boundary either. What does count, on both
paths, is a Hessian that is not negative definite (batch) and every other
statsmodels warning (per replicate: failed or retried optimisation, ...),
recorded as ``warning:ConvergenceWarning``.

Degrees of freedom for the test (``df``):

``"wald"``
    normal reference distribution (statsmodels' own p-values);
``"between-within"``
    t with the between-within df: groups minus the number of fixed-effect
    columns constant within groups for a between-group coefficient
    (``clusters - 2`` in a cluster-randomised two-arm trial), else
    observations minus groups minus the number of within-group columns
    (Schluchter & Elashoff 1990; recommended for small cluster trials by
    Li & Redden 2015, BMC Medical Research Methodology);
``"satterthwaite"``
    t with Satterthwaite's df for the model-based variance
    ``[(X' V^-1 X)^-1]_kk`` and its SE, the variance-parameter covariance
    taken from the expected REML information (Giesbrecht & Burns 1985,
    Biometrics). In balanced cluster-randomised designs this SE equals the
    statsmodels one and the df equal ``clusters - 2``.
"""

from __future__ import annotations

import math
import re
import warnings

import numpy as np

from .._validation import Anything, Choice
from ..errors import ParameterError
from ..formula import FormulaText, parse_formula, require_columns
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, WARNINGS_LOCK, hand_over
from .numeric import wald_fields

DF_METHODS = ("wald", "between-within", "satterthwaite")

#: statsmodels' warning at a small (absolute) variance estimate: a boundary fit, not fit trouble
BOUNDARY_WARNING = r".*on the boundary of the parameter space"
#: message of the batch path's fit-trouble flag
TROUBLE_MESSAGE = "batch REML: the Hessian of the REML criterion is not negative definite"

#: formulas the batch path understands (after removing spaces)
BATCH_FORMULAS = ("y~C(arm)", "y~arm", "y~1+C(arm)", "y~1+arm")

#: grid over the ICC (gamma / (1 + gamma)) scanned before refinement; dense near 0
GRID = 0.999 * np.linspace(0.0, 1.0, 13) ** 2
#: Illinois steps on the derivative after the grid scan
ROOT_STEPS = 14


class _Text(Anything):
    """A non-empty string (``pattern``: a regular expression it must match)."""

    def __init__(self, what: str, pattern: str = r".+", optional: bool = False):
        object.__setattr__(self, "what", what)
        object.__setattr__(self, "pattern", pattern)
        object.__setattr__(self, "optional", optional)

    def describe(self) -> str:
        return self.what

    def clean(self, name, value):
        if value is None and self.optional:
            return None
        if not isinstance(value, str) or not re.fullmatch(self.pattern, value.strip(), re.S):
            raise ParameterError(f"`{name}` must be {self.what}; got {value!r}.")
        return value.strip()


# ---------------------------------------------------------------------------
# p-values and intervals
# ---------------------------------------------------------------------------
def _inv(M):
    """Inverse of a stack of square matrices; NaN for the singular ones (never raises)."""
    try:
        return np.linalg.inv(M)
    except np.linalg.LinAlgError:
        flat = M.reshape((-1,) + M.shape[-2:])
        out = np.full(flat.shape, np.nan)
        for i, x in enumerate(flat):
            try:
                out[i] = np.linalg.inv(x)
            except np.linalg.LinAlgError:
                pass
        return out.reshape(M.shape)


# ---------------------------------------------------------------------------
# Satterthwaite df of a random-intercept model from per-group sums (any X)
# ---------------------------------------------------------------------------
def satterthwaite(m, u, S, sb2, se2, k, n=None):
    """Model-based variance of coefficient ``k`` and its Satterthwaite df.

    Parameters
    ----------
    m : array (..., G)
        Group sizes (0 for padding groups).
    u : array (..., G, p)
        ``X_j' 1`` per group.
    S : array (..., G, p, p)
        ``X_j' X_j`` per group.
    sb2, se2 : array (...)
        Between-group and residual variances.
    k : int
        Column of X under test.
    n : array (..., G), optional
        Multiplicity of each group (groups with the same ``m``, ``u``, ``S``
        pooled: observed patterns); default one each.

    Returns
    -------
    var, df : arrays (...)
        ``[(X' V^-1 X)^-1]_kk`` and ``2 var^2 / (g' I^-1 g)`` with ``g`` the
        gradient of ``var`` in (sigma_b^2, sigma_e^2) and ``I`` the expected
        REML information (Giesbrecht & Burns 1985).
    """
    sb2 = np.asarray(sb2, float)[..., None]
    se2 = np.asarray(se2, float)[..., None]
    lam = se2 + m * sb2                      # eigenvalue of V_j along the ones vector
    c = sb2 / lam / se2                      # V_j^-1 = I/se2 - c J
    uu = u[..., :, None] * u[..., None, :]
    if n is None:
        W = lambda w: np.einsum("...g,...gij->...ij", w, uu)  # noqa: E731  sum_j w_j u_j u_j'
        Ssum = S.sum(axis=-3)
        tot = lambda v: v.sum(-1)  # noqa: E731
    else:
        W = lambda w: np.einsum("...g,...gij->...ij", w * n, uu)  # noqa: E731
        Ssum = np.einsum("...g,...gij->...ij", n, S)
        tot = lambda v: (n * v).sum(-1)  # noqa: E731
    A = Ssum / se2[..., None] - W(c)
    # X'V^-1 D V^-1 X for D = J (b) and D = I (e)
    Mb = W(1.0 / lam**2)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_m = np.where(m > 0, 1.0 / np.where(m > 0, m, 1.0), 0.0)
    Me = Ssum / se2[..., None] ** 2 - W(inv_m * (1.0 / se2**2 - 1.0 / lam**2))
    # X'V^-1 D_a V^-1 D_b V^-1 X
    Nbb = W(m / lam**3)
    Nbe = W(1.0 / lam**3)
    Nee = Ssum / se2[..., None] ** 3 - W(inv_m * (1.0 / se2**3 - 1.0 / lam**3))
    T = {("b", "b"): tot((m / lam) ** 2),
         ("b", "e"): tot(m / lam**2),
         ("e", "e"): tot(np.where(m > 0, (m - 1) / se2**2 + 1.0 / lam**2, 0.0))}
    Ai = _inv(A)
    M = {"b": Mb, "e": Me}
    Nm = {("b", "b"): Nbb, ("b", "e"): Nbe, ("e", "e"): Nee}
    AM = {a: Ai @ M[a] for a in M}
    info = np.empty(A.shape[:-2] + (2, 2))
    for i, a in enumerate("be"):
        for j, b in enumerate("be"):
            key = (a, b) if (a, b) in T else (b, a)
            tr2 = np.einsum("...ij,...ji->...", Ai, Nm[key])
            tr3 = np.einsum("...ij,...ji->...", AM[a], AM[b])
            info[..., i, j] = 0.5 * (T[key] - 2.0 * tr2 + tr3)
    var = Ai[..., k, k]
    grad = np.stack([(AM[a] @ Ai)[..., k, k] for a in "be"], axis=-1)
    with np.errstate(all="ignore"):
        cov = _inv(info)
        df = 2.0 * var**2 / np.einsum("...i,...ij,...j->...", grad, cov, grad)
    return var, df


def _group_sums(exog, groups):
    """Per-group ``m``, ``X_j' 1`` and ``X_j' X_j`` of a design matrix."""
    labels, g = np.unique(groups, return_inverse=True)
    G, p = labels.size, exog.shape[1]
    m = np.bincount(g, minlength=G).astype(float)
    u = np.zeros((G, p))
    np.add.at(u, g, exog)
    S = np.zeros((G, p, p))
    np.add.at(S, g, exog[:, :, None] * exog[:, None, :])
    return m, u, S, g


def between_within_df(exog, groups, k):
    """Between-within df for column ``k`` of ``exog`` (Schluchter & Elashoff 1990)."""
    _, g = np.unique(groups, return_inverse=True)
    G = g.max() + 1
    between = []
    for j in range(exog.shape[1]):
        col = exog[:, j]
        lo = np.full(G, np.inf)
        hi = np.full(G, -np.inf)
        np.minimum.at(lo, g, col)
        np.maximum.at(hi, g, col)
        between.append(bool(np.all(hi - lo <= 1e-12 * max(1.0, float(np.abs(col).max())))))
    n_between = sum(between)
    if between[k]:
        return float(G - n_between)
    return float(exog.shape[0] - G - (exog.shape[1] - n_between))


# ---------------------------------------------------------------------------
# the batched REML solver for y ~ arm, random intercept by cluster
# ---------------------------------------------------------------------------
class _Sums:
    """Per-cluster sums of a batch, shape (R, G); y centred per replicate."""

    def __init__(self, m, a, s, sa, yy, shift, n_obs, n_groups, arm_within):
        self.m, self.a, self.s, self.sa, self.yy = m, a, s, sa, yy
        self.shift, self.n_obs, self.n_groups, self.arm_within = shift, n_obs, n_groups, arm_within
        self.fac = n_obs - 2.0               # REML: N - p


def _profile(g, st: _Sums, derivative: bool = True):
    """Profiled REML criterion ``-2 l`` (up to a constant), its d/dgamma, and the GLS fit.

    ``g`` has shape (R,) or (R, K) (K trial values per replicate).
    """
    if isinstance(st, _PatternSums):
        return _profile_design(g, st, derivative)
    extra = g.ndim == 2
    m, a, s, sa = (x[:, None, :] if extra else x for x in (st.m, st.a, st.s, st.sa))
    gg = g[..., None]
    h = 1.0 / (1.0 + m * gg)
    c = gg * h
    A00 = (m - c * m * m).sum(-1)
    A01 = (a - c * m * a).sum(-1)
    A11 = (a - c * a * a).sum(-1)
    w0 = (s - c * m * s).sum(-1)
    w1 = (sa - c * a * s).sum(-1)
    det = A00 * A11 - A01 * A01
    b0 = (A11 * w0 - A01 * w1) / det
    b1 = (A00 * w1 - A01 * w0) / det
    yy = st.yy[:, None] if extra else st.yy
    fac = st.fac[:, None] if extra else st.fac
    Q = yy - (c * s * s).sum(-1) - (b0 * w0 + b1 * w1)
    f = fac * np.log(Q) + np.log1p(m * gg).sum(-1) + np.log(det)
    if not derivative:
        return f, None, (b0, b1, Q, det, A00, A01, A11)
    e = s - m * b0[..., None] - a * b1[..., None]
    h2 = h * h
    # tr(A^-1 A') with A' = -sum h^2 u u'
    D00, D01, D11 = (h2 * m * m).sum(-1), (h2 * m * a).sum(-1), (h2 * a * a).sum(-1)
    tr = (A11 * D00 - 2 * A01 * D01 + A00 * D11) / det
    df = -fac * (h2 * e * e).sum(-1) / Q + (m * h).sum(-1) - tr
    return f, df, (b0, b1, Q, det, A00, A01, A11)


def _solve_gamma(st: _Sums):
    """REML estimate of gamma per replicate.

    The criterion and its derivative are evaluated on :data:`GRID` (in the
    ICC scale ``rho = gamma / (1 + gamma)``); the grid minimum gives a
    bracket with a sign change of the derivative, refined by the Illinois
    variant of regula falsi (or golden-section search on the criterion for
    the rare replicate whose bracket shows no sign change). A minimum at
    rho = 0 with a derivative >= 0 there is the boundary estimate 0.
    """
    R = st.yy.shape[0]
    rho = np.broadcast_to(GRID, (R, GRID.size))
    with np.errstate(all="ignore"):
        f, _, _ = _profile(rho / (1.0 - rho), st, derivative=False)
    f = np.where(np.isfinite(f), f, np.inf)
    k = np.argmin(f, axis=1)
    dk = _deriv_rho(GRID[k], st)
    boundary = (k == 0) & (dk >= 0)
    left = (dk >= 0) & (k > 0)
    k_last = GRID.size - 1
    right = ~left & (k < k_last)
    lo = np.where(left, GRID[np.maximum(k - 1, 0)], GRID[k])
    hi = np.where(left, GRID[k], GRID[np.minimum(k + 1, k_last)])
    dother = _deriv_rho(np.where(left, lo, hi), st)
    dlo = np.where(left, dother, dk)
    dhi = np.where(left, dk, dother)
    dhi = np.where(~left & ~right, np.inf, dhi)  # minimum at the top of the grid: no bracket
    signed = (dlo < 0) & (dhi > 0)
    x = _illinois(st, lo, hi, dlo, dhi)
    if not np.all(signed | boundary):
        sel = ~(signed | boundary)
        j = k[sel]
        x[sel] = _golden(_subset(st, sel), GRID[np.maximum(j - 1, 0)], GRID[np.minimum(j + 1, GRID.size - 1)])
    rho_hat = np.where(boundary, 0.0, x)
    return rho_hat / (1.0 - rho_hat)


def _deriv_rho(r, st):
    with np.errstate(all="ignore"):
        return _profile(r / (1.0 - r), st)[1]


def _illinois(st, lo, hi, dlo, dhi):
    """Root of the criterion's derivative in [lo, hi] (rho scale), where dlo < 0 < dhi."""
    lo, hi, dlo, dhi = (np.array(v, float) for v in (lo, hi, dlo, dhi))
    side = np.zeros(lo.shape, np.int8)
    for _ in range(ROOT_STEPS):
        with np.errstate(all="ignore"):
            x = hi - dhi * (hi - lo) / (dhi - dlo)
        x = np.where(np.isfinite(x) & (x > lo) & (x < hi), x, 0.5 * (lo + hi))
        dx = _deriv_rho(x, st)
        up = dx > 0
        down = ~up
        hi = np.where(up, x, hi)
        dhi = np.where(up, dx, dhi)
        lo = np.where(down, x, lo)
        dlo = np.where(down, dx, dlo)
        # Illinois: halve the value kept at the end that stayed twice in a row
        dlo = np.where(up & (side == 1), 0.5 * dlo, dlo)
        dhi = np.where(down & (side == -1), 0.5 * dhi, dhi)
        side = np.where(up, 1, -1).astype(np.int8)
    return np.where(np.abs(dlo) < np.abs(dhi), lo, hi)


def _golden(st, lo, hi, steps: int = 60):
    """Minimiser of the criterion in [lo, hi] (rho scale) by golden-section search."""
    inv = (math.sqrt(5.0) - 1.0) / 2.0
    crit = lambda r: _profile(r / (1.0 - r), st, derivative=False)[0]  # noqa: E731
    a, b = np.array(lo, float), np.array(hi, float)
    with np.errstate(all="ignore"):
        for _ in range(steps):
            c = b - inv * (b - a)
            e = a + inv * (b - a)
            left = crit(c) < crit(e)
            b = np.where(left, e, b)
            a = np.where(left, a, c)
        x = 0.5 * (a + b)
        at_zero = (a == 0.0) & (crit(np.zeros_like(a)) <= crit(x))
    return np.where(at_zero, 0.0, x)


def _subset(st: _Sums, sel) -> _Sums:
    if isinstance(st, _PatternSums):
        return st.take(sel)
    return _Sums(*(getattr(st, k)[sel] for k in ("m", "a", "s", "sa", "yy", "shift", "n_obs", "n_groups",
                                                "arm_within")))


def _observed_cov(g, st: _Sums, fit):
    """Inverse of minus statsmodels' Hessian of the profiled REML log-likelihood in (b0, b1, gamma)."""
    b0, b1, Q, det, A00, A01, A11 = fit
    m, a, s = st.m, st.a, st.s
    gg = g[:, None]
    h = 1.0 / (1.0 + m * gg)
    c1 = h * h                                # dc/dgamma
    c2 = -2.0 * m * h**3                      # d2c/dgamma2
    e = s - m * b0[:, None] - a * b1[:, None]
    fac = st.fac
    H = np.empty((g.size, 3, 3))
    H[:, 0, 0] = -fac * A00 / Q
    H[:, 0, 1] = H[:, 1, 0] = -fac * A01 / Q
    H[:, 1, 1] = -fac * A11 / Q
    H[:, 0, 2] = H[:, 2, 0] = -fac * (c1 * e * m).sum(-1) / Q
    H[:, 1, 2] = H[:, 2, 1] = -fac * (c1 * e * a).sum(-1) / Q
    qg = (c1 * e * e).sum(-1)
    # A^-1, A' = -sum c1 uu', A'' = -sum c2 uu'
    Ai = np.stack([np.stack([A11, -A01], -1), np.stack([-A01, A00], -1)], -2) / det[:, None, None]

    def usum(w):
        out = np.empty((g.size, 2, 2))
        out[:, 0, 0] = (w * m * m).sum(-1)
        out[:, 0, 1] = out[:, 1, 0] = (w * m * a).sum(-1)
        out[:, 1, 1] = (w * a * a).sum(-1)
        return out

    A1 = -usum(c1)
    A2 = -usum(c2)
    AiA1 = Ai @ A1
    tr_ld2 = np.einsum("rii->r", Ai @ A2) - np.einsum("rij,rji->r", AiA1, AiA1)
    H[:, 2, 2] = (0.5 * fac * ((c2 * e * e).sum(-1) / Q + qg**2 / Q**2)
                  + 0.5 * (m * m * h * h).sum(-1) - 0.5 * tr_ld2)
    not_pd = np.any(np.diagonal(H, axis1=1, axis2=2) >= 0, axis=1)
    # at the boundary gamma = 0 the variance ratio is held at its bound: fixed-effect block only
    at_bound = g == 0
    H[at_bound, :2, 2] = H[at_bound, 2, :2] = 0.0
    H[at_bound, 2, 2] = -1.0
    with np.errstate(all="ignore"):
        ok = np.all(np.isfinite(H), axis=(1, 2))
        H[~ok] = -np.eye(3)
        cov = _inv(-H)
        cov[~ok] = np.nan
        cov[at_bound, 2, 2] = np.nan
    not_pd |= ~(cov[:, 1, 1] > 0)
    return cov, not_pd


def _ids(col):
    """Integer codes 0..G-1 of cluster ids, shape (N,) or (R, N), and G."""
    col = np.asarray(col)
    if np.issubdtype(col.dtype, np.integer) and col.size and col.min() >= 0 and col.max() < 64 * col.shape[-1]:
        return col.astype(np.intp), int(col.max()) + 1
    labels, inv = np.unique(col, return_inverse=True)
    return inv.reshape(col.shape), labels.size


def batch_sums(batch) -> _Sums:
    """Per-cluster sums of a Batch with columns ``y``, ``arm``, ``cluster`` (and optional ``present``)."""
    y = np.asarray(batch.per_rep["y"], float)
    R, N = y.shape
    ok = np.isfinite(y)
    if "present" in batch.per_rep:
        ok &= np.asarray(batch.per_rep["present"], bool)
    arm = np.broadcast_to(np.asarray(batch["arm"]), (R, N)).astype(float)
    ids, G = _ids(batch["cluster"])
    w = ok.astype(float)
    y0 = np.where(ok, y, 0.0)
    n_obs = w.sum(1)
    with np.errstate(all="ignore"):
        shift = y0.sum(1) / n_obs
    yc = np.where(ok, y - shift[:, None], 0.0)
    aw = arm * w
    if ids.ndim == 1:
        onehot = np.zeros((N, G))
        onehot[np.arange(N), ids] = 1.0
        m, a, s, sa = w @ onehot, aw @ onehot, yc @ onehot, (aw * yc) @ onehot
    else:
        flat = (ids + G * np.arange(R)[:, None]).ravel()
        bc = lambda v: np.bincount(flat, v.ravel(), R * G).reshape(R, G)  # noqa: E731
        m, a, s, sa = bc(w), bc(aw), bc(yc), bc(aw * yc)
    present_groups = m > 0
    n_groups = present_groups.sum(1).astype(float)
    # arm constant within every cluster <=> each cluster's arm count is 0 or its size
    within = np.any(present_groups & (a > 0.5) & (a < m - 0.5), axis=1)
    yy = (yc * yc).sum(1)
    return _Sums(m, a, s, sa, yy, shift, n_obs, n_groups, within)


def fit_batch(batch):
    """Batched REML fit: dict of arrays (R,) ``b0, b1, se, gamma, sigma_b2, sigma_e2, ...``."""
    st = batch_sums(batch)
    g = _solve_gamma(st)
    with np.errstate(all="ignore"):
        _, _, fit = _profile(g, st, derivative=False)
        b0, b1, Q, det = fit[:4]
        scale = Q / st.fac
        cov, not_pd = _observed_cov(g, st, fit)
        se = np.sqrt(cov[:, 1, 1])
    return {"b0": b0 + st.shift, "b1": b1, "se": se, "gamma": g, "sigma_b2": g * scale,
            "sigma_e2": scale, "sums": st, "not_pd": not_pd}


# ---------------------------------------------------------------------------
# the batched REML solver for a general design shared by the replicates
# ---------------------------------------------------------------------------
#: most rows a group may have on the general batch path (its observed rows are a bit mask)
MAX_GROUP_ROWS = 16


class _PatternSums:
    """Sums of a batch whose design ``X`` (N, p) is the same in every replicate up to the observed rows.

    Groups with the same full design (their *type*) and the same observed rows share ``m``
    (observed rows), ``U = X_j' 1`` and ``X_j' X_j``; such a *pattern* k is shared by all
    replicates (arrays ``m`` (K,), ``U`` (K, p), ``S`` (K, p, p)), and per replicate only its
    count ``n`` (R, K), the sum over its groups of ``1' y_j`` (``s``) and of ``(1' y_j)^2``
    (``t``) vary, plus ``X'X``, ``X'y`` and ``y'y`` (y centred per replicate when the ones
    vector is in the column space of X).
    """

    FIELDS = ("n", "s", "t", "XtX", "Xty", "yy", "shift", "n_obs", "n_groups", "fac", "between")

    def __init__(self, m, U, S, **per_rep):
        self.m, self.U, self.S = m, U, S
        self.UU = U[:, :, None] * U[:, None, :]
        for k in self.FIELDS:
            setattr(self, k, per_rep[k])

    def take(self, sel) -> "_PatternSums":
        return _PatternSums(self.m, self.U, self.S, **{k: getattr(self, k)[sel] for k in self.FIELDS})


def _profile_design(g, st: _PatternSums, derivative: bool = True):
    """:func:`_profile` for :class:`_PatternSums` (any X): criterion, d/dgamma, (beta, Q, A, log|A|)."""
    extra = g.ndim == 2
    n, s, t = (x[:, None, :] if extra else x for x in (st.n, st.s, st.t))
    XtX, Xty = (st.XtX[:, None], st.Xty[:, None]) if extra else (st.XtX, st.Xty)
    yy = st.yy[:, None] if extra else st.yy
    fac = st.fac[:, None] if extra else st.fac
    gg = g[..., None]
    h = 1.0 / (1.0 + st.m * gg)
    c = gg * h
    A = XtX - np.einsum("...k,kij->...ij", c * n, st.UU)
    w = Xty - np.einsum("...k,ki->...i", c * s, st.U)
    b = np.linalg.solve(A, w[..., None])[..., 0]
    _, logdet = np.linalg.slogdet(A)
    Q = yy - (c * t).sum(-1) - (b * w).sum(-1)
    f = fac * np.log(Q) + (n * np.log1p(st.m * gg)).sum(-1) + logdet
    if not derivative:
        return f, None, (b, Q, A)
    tb = np.einsum("...i,ki->...k", b, st.U)
    E = t - 2.0 * s * tb + n * tb * tb          # sum over the pattern's groups of (1' e_j)^2
    h2 = h * h
    tr = np.einsum("...ij,...ji->...", _inv(A), np.einsum("...k,kij->...ij", h2 * n, st.UU))
    df = -fac * (h2 * E).sum(-1) / Q + (n * st.m * h).sum(-1) - tr
    return f, df, (b, Q, A)


def _observed_cov_design(g, st: _PatternSums, fit):
    """:func:`_observed_cov` for :class:`_PatternSums`: inverse of minus the Hessian in (beta, gamma)."""
    b, Q, A = fit
    R, p = b.shape
    gg = g[:, None]
    h = 1.0 / (1.0 + st.m * gg)
    c1 = h * h
    c2 = -2.0 * st.m * h**3
    tb = b @ st.U.T
    res = st.s - st.n * tb                      # sum over the pattern's groups of 1' e_j
    E = st.t - 2.0 * st.s * tb + st.n * tb * tb
    fac = st.fac
    H = np.empty((R, p + 1, p + 1))
    H[:, :p, :p] = -fac[:, None, None] * A / Q[:, None, None]
    H[:, :p, p] = H[:, p, :p] = -fac[:, None] * ((c1 * res) @ st.U) / Q[:, None]
    qg = (c1 * E).sum(-1)
    Ai = _inv(A)
    A1 = -np.einsum("rk,kij->rij", c1 * st.n, st.UU)
    A2 = -np.einsum("rk,kij->rij", c2 * st.n, st.UU)
    AiA1 = Ai @ A1
    tr_ld2 = np.einsum("rii->r", Ai @ A2) - np.einsum("rij,rji->r", AiA1, AiA1)
    H[:, p, p] = (0.5 * fac * ((c2 * E).sum(-1) / Q + qg**2 / Q**2)
                  + 0.5 * (st.n * st.m * st.m * h * h).sum(-1) - 0.5 * tr_ld2)
    at_bound = g == 0
    H[at_bound, :p, p] = H[at_bound, p, :p] = 0.0
    H[at_bound, p, p] = -1.0
    with np.errstate(all="ignore"):
        ok = np.all(np.isfinite(H), axis=(1, 2))
        H[~ok] = -np.eye(p + 1)
        not_pd = np.linalg.eigvalsh(H).max(-1) >= 0
        cov = _inv(-H)
        cov[~ok] = np.nan
        cov[at_bound, p, p] = np.nan
    return cov, not_pd | ~ok


def shared_design(formula, groups, shared):
    """The fixed-effects design of ``formula`` on the shared columns, as statsmodels builds it.

    Returns ``(X, names)``: the (N, p) matrix and column names of ``statsmodels``'
    ``MixedLM`` for the full table (every row observed).
    """
    import pandas as pd
    from statsmodels.regression.mixed_linear_model import MixedLM  # smf.mixedlm is MixedLM.from_formula

    f = parse_formula(formula)
    frame = pd.DataFrame({c: np.asarray(shared[c]) for c in f.columns[1:]})
    frame[f.outcome] = 0.0
    with WARNINGS_LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = MixedLM.from_formula(formula, frame, groups=np.asarray(shared[groups]))
    return np.asarray(model.exog, float), list(model.exog_names)


def design_sums(y, ok, X, groups) -> tuple[_PatternSums, np.ndarray]:
    """:class:`_PatternSums` of outcomes ``y`` (R, N) observed where ``ok``, shared design ``X`` and groups.

    Also returns the replicates whose ``X'X`` over the observed rows is singular (a
    column never observed, e.g. no outcome at some visit in one arm).
    """
    R, N = y.shape
    p = X.shape[1]
    gid, G = _ids(groups)
    order = np.argsort(gid, kind="stable")
    size = np.bincount(gid, minlength=G)
    start = np.concatenate([[0], np.cumsum(size)[:-1]])
    pos = np.empty(N, np.int64)
    pos[order] = np.arange(N) - start[gid[order]]
    L = int(size.max())
    cells, cell = np.unique(X, axis=0, return_inverse=True)
    cell = cell.reshape(-1)
    C = cells.shape[0]
    full = np.full((G, L), -1, np.int64)
    full[gid, pos] = cell
    types, gtype = np.unique(full, axis=0, return_inverse=True)
    gtype = gtype.reshape(-1)
    w = ok.astype(float)
    flat = (gid + G * np.arange(R)[:, None]).ravel()
    bits = np.bincount(flat, (w * (2.0 ** pos)).ravel(), R * G).reshape(R, G).astype(np.int64)
    key = gtype[None, :] * (2**L) + bits
    ukeys, inv = np.unique(key, return_inverse=True)
    inv = inv.reshape(R, G)
    K = ukeys.size
    ktype, kbits = ukeys // (2**L), ukeys % (2**L)
    seen = ((kbits[:, None] >> np.arange(L)) & 1).astype(bool) & (types[ktype] >= 0)   # (K, L)
    kcells = np.where(seen, types[ktype], 0)
    m = seen.sum(1).astype(float)
    U = np.einsum("kl,klp->kp", seen.astype(float), cells[kcells])
    S = np.einsum("kl,klp,klq->kpq", seen.astype(float), cells[kcells], cells[kcells])
    kflat = (inv + K * np.arange(R)[:, None]).ravel()
    n = np.bincount(kflat, minlength=R * K).reshape(R, K).astype(float)
    n_obs = w.sum(1)
    # centre y when the ones vector is a combination of the columns (then only that combination moves)
    delta = np.linalg.lstsq(cells, np.ones(C), rcond=None)[0]
    centre = bool(np.allclose(cells @ delta, 1.0, rtol=0, atol=1e-10))
    y0 = np.where(ok, y, 0.0)
    with np.errstate(all="ignore"):
        shift = y0.sum(1) / n_obs if centre else np.zeros(R)
    yc = np.where(ok, y - shift[:, None], 0.0)
    ysum = np.bincount(flat, yc.ravel(), R * G).reshape(R, G)
    s = np.bincount(kflat, ysum.ravel(), R * K).reshape(R, K)
    t = np.bincount(kflat, (ysum * ysum).ravel(), R * K).reshape(R, K)
    onehot = np.zeros((N, C))
    onehot[np.arange(N), cell] = 1.0
    ncell = w @ onehot
    XtX = np.einsum("rc,cp,cq->rpq", ncell, cells, cells)
    Xty = (yc @ onehot) @ cells
    # a column is "between groups" in a replicate when it is constant over every group's observed rows
    vals = np.where(seen[:, :, None], cells[kcells], np.nan)
    with np.errstate(all="ignore"), WARNINGS_LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        spread = np.nanmax(vals, 1) - np.nanmin(vals, 1)
    const = ~(spread > 1e-12 * max(1.0, float(np.abs(cells).max())))   # (K, p); empty patterns count as constant
    between = np.all(const[None, :, :] | (n[:, :, None] == 0), axis=1)
    n_groups = (n * (m > 0)).sum(1)
    scale = np.maximum(np.einsum("rii->r", XtX), 1.0)
    singular = ~(np.linalg.eigvalsh(XtX / scale[:, None, None]).min(-1) > 1e-10)
    st = _PatternSums(m, U, S, n=n, s=s, t=t, XtX=XtX, Xty=Xty, yy=(yc * yc).sum(1), shift=shift,
                      n_obs=n_obs, n_groups=n_groups, fac=n_obs - p, between=between)
    st.delta = delta if centre else np.zeros(p)
    return st, singular


def fit_design_batch(y, ok, X, groups):
    """Batched REML fit with a shared design: dict of arrays ``beta`` (R, p), ``cov`` (R, p+1, p+1), ...

    Replicates with a singular ``X'X`` (``singular``) are not fitted (NaN).
    """
    st, singular = design_sums(y, ok, X, groups)
    R, p = y.shape[0], X.shape[1]
    beta = np.full((R, p), np.nan)
    cov = np.full((R, p + 1, p + 1), np.nan)
    gamma, scale = np.full(R, np.nan), np.full(R, np.nan)
    not_pd = np.zeros(R, bool)
    good = ~singular
    if good.any():
        sub = st.take(good) if not good.all() else st
        g = _solve_gamma(sub)
        with np.errstate(all="ignore"):
            _, _, fit = _profile_design(g, sub, derivative=False)
            c, bad = _observed_cov_design(g, sub, fit)
        beta[good] = fit[0] + sub.shift[:, None] * st.delta
        cov[good], not_pd[good] = c, bad
        gamma[good], scale[good] = g, fit[1] / sub.fac
    return {"beta": beta, "cov": cov, "gamma": gamma, "sigma_e2": scale, "sigma_b2": gamma * scale,
            "not_pd": not_pd, "singular": singular, "sums": st}


# ---------------------------------------------------------------------------
# the analysis
# ---------------------------------------------------------------------------
class MixedModel(Analysis):
    """Linear mixed model with a random intercept per group, fitted by REML (statsmodels MixedLM).

    H0: the fixed-effect coefficient ``term`` (by default the arm effect,
    arm 1 minus arm 0) is 0, against ``alternative``.

    Parameters
    ----------
    formula : str
        Fixed-effects formula of the grammar in :mod:`simpower.formula` (column
        names, ``C(column)``, ``C(column, Treatment(k))``, ``a:b``, ``a*b``),
        default ``"y ~ C(arm)"``; e.g. ``"y ~ C(arm) * C(visit)"`` for repeated
        measures. Checked at construction: nothing else reaches statsmodels.
    groups : str
        Column holding the random-intercept groups: ``"cluster"`` (default)
        or ``"subject"`` for repeated measures.
    term : str, optional
        Coefficient to test; default ``"C(arm)[T.1]"`` or ``"arm"``,
        whichever the formula produces.
    df : {'wald', 'between-within', 'satterthwaite'}
        Reference distribution of the test (see the module notes).
    alternative : {'two-sided', 'greater', 'less'}
    ci_level : float in (0, 1)

    Notes
    -----
    Rows with a missing outcome are dropped (complete cases). The batch path
    applies to ``y ~ C(arm)`` (or ``y ~ arm``) with ``groups = "cluster"`` and
    arm coded 0/1, and to any formula whose columns and groups are the same in
    every replicate (repeated measures); other cases are fitted replicate by
    replicate.

    Examples
    --------
    >>> import numpy as np
    >>> from simpower.analyses.mixed import MixedModel
    >>> rng = np.random.default_rng(2)
    >>> cluster = np.repeat(np.arange(12), 10)
    >>> arm = (cluster >= 6).astype(int)
    >>> y = 0.8 * arm + rng.normal(0, 0.5, 12)[cluster] + rng.normal(0, 1, 120)
    >>> res = MixedModel(df="between-within")({"y": y, "arm": arm, "cluster": cluster})
    >>> res.df   # 12 clusters - 2
    10.0
    >>> round(res.estimate, 3), round(res.pvalue, 3)
    (0.799, 0.073)
    """

    name = "mixed_model"
    null_hypothesis = "the fixed-effect coefficient under test (the arm effect) is 0"
    params = {"formula": FormulaText(strip=True),
              "groups": _Text("a column name like 'cluster' or 'subject'", r"\w+"),
              "term": _Text("a coefficient name like 'C(arm)[T.1]'", optional=True),
              "df": Choice(DF_METHODS), "alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"formula": "y ~ C(arm)", "groups": "cluster", "term": None, "df": "wald",
                "alternative": "two-sided", "ci_level": 0.95}

    # -- per replicate -------------------------------------------------------
    def _term_index(self, names):
        if self.term is not None:
            if self.term not in names:
                from ..errors import nearest

                raise ParameterError(f"`term` {self.term!r} is not a coefficient of the model.{nearest(self.term, names)}")
            return names.index(self.term)
        for cand in ("C(arm)[T.1]", "arm"):
            if cand in names:
                return names.index(cand)
        raise ParameterError(f"`term` is needed: the formula has no arm coefficient; coefficients: {', '.join(names)}.")

    def __call__(self, data):
        import pandas as pd
        from statsmodels.regression.mixed_linear_model import MixedLM  # smf.mixedlm is MixedLM.from_formula

        frame = pd.DataFrame({k: np.asarray(v) for k, v in dict(data).items()}) if not isinstance(data, pd.DataFrame) else data
        if self.groups not in frame:
            raise ValueError(f"mixed_model needs a {self.groups!r} column (the `groups` parameter)")
        outcome = require_columns(self.formula, frame.columns, "mixed_model").outcome
        if outcome in frame:
            frame = frame[np.isfinite(frame[outcome].to_numpy(float))]
        model = MixedLM.from_formula(self.formula, frame, groups=frame[self.groups])
        with warnings.catch_warnings():
            # a boundary fit is an answer (see the module notes); every other warning reaches the engine
            warnings.filterwarnings("ignore", message=BOUNDARY_WARNING)
            fit = model.fit(reml=True)
        names = list(model.exog_names)
        k = self._term_index(names)
        est = float(fit.fe_params.iloc[k])
        se = float(fit.bse_fe.iloc[k])
        df = None
        if self.df == "between-within":
            df = between_within_df(model.exog, model.groups, k)
        elif self.df == "satterthwaite":
            m, u, S, _ = _group_sums(model.exog, model.groups)
            var, df = satterthwaite(m, u, S, float(fit.cov_re.iloc[0, 0]), float(fit.scale), k)
            se, df = float(np.sqrt(var)), float(df)
        return self._result(np.asarray(est), np.asarray(se), df, scalar=True)

    def _result(self, est, se, df, scalar=False):
        out, z = wald_fields(est, se, df, self.alternative, self.ci_level)
        if scalar:
            return TestResult(**{k: float(v) for k, v in out.items()}, statistic=float(z),
                              df=math.inf if df is None else float(df))
        return out

    # -- batch ---------------------------------------------------------------
    # cluster trials; repeated measures (any shared design); the formula and column checks below are its own
    layouts = ("clustered", "longitudinal")

    def supports_batch(self, batch):
        return self._cluster_batch(batch) or self._design_batch(batch) is not None

    def _design_batch(self, batch):
        """``(X, names, k)`` when the general batch path applies (else None): the outcome per
        replicate, the groups and every column of the formula shared by the replicates (so the
        design is the same up to the observed rows), at most :data:`MAX_GROUP_ROWS` rows a group,
        a design of full column rank and ``term`` one of its coefficients."""
        if self._cluster_batch(batch):
            return None
        f = parse_formula(self.formula)
        y = batch.per_rep.get(f.outcome)
        if y is None or y.ndim != 2 or y.shape[0] != batch.size or self.groups not in batch.shared:
            return None
        N = y.shape[1]
        for col in [self.groups] + f.columns[1:]:
            v = batch.shared.get(col)
            if v is None or v.shape != (N,) or not np.issubdtype(np.asarray(v).dtype, np.number):
                return None
        present = batch.per_rep.get("present")
        if present is not None and np.shape(present) != y.shape:
            return None
        gid, G = _ids(batch.shared[self.groups])
        if np.bincount(gid.ravel(), minlength=G).max() > MAX_GROUP_ROWS:
            return None
        try:
            X, names = shared_design(self.formula, self.groups, batch.shared)
            k = self._term_index(names)
        except (ParameterError, ValueError, np.linalg.LinAlgError):
            return None
        if X.shape[1] == 0 or np.linalg.matrix_rank(X) < X.shape[1]:
            return None
        return X, names, k

    def _cluster_batch(self, batch):
        if self.formula.replace(" ", "") not in BATCH_FORMULAS or self.groups != "cluster":
            return False
        if self.term not in (None, "C(arm)[T.1]" if "C(" in self.formula else "arm"):
            return False
        if not all(c in batch for c in ("y", "arm", "cluster")) or "y" not in batch.per_rep:
            return False
        y = batch.per_rep["y"]
        if y.ndim != 2 or y.shape[0] != batch.size:
            return False
        for col in ("arm", "cluster", "present"):
            if col not in batch:
                continue
            v = np.asarray(batch[col])
            if v.shape not in (y.shape, y.shape[1:]) or (col == "present" and v.shape != y.shape):
                return False
        arm = np.asarray(batch["arm"])
        if not np.issubdtype(arm.dtype, np.number):
            return False
        if "present" in batch.per_rep:
            arm = np.broadcast_to(arm, y.shape)[np.asarray(batch.per_rep["present"], bool)]
        if not np.all((arm == 0) | (arm == 1)):
            return False
        cl = np.asarray(batch["cluster"])
        return bool(np.issubdtype(cl.dtype, np.integer))

    def batch(self, batch):
        if not self._cluster_batch(batch):
            return self._batch_design(batch)
        fit = fit_batch(batch)
        st = fit["sums"]
        est, se = fit["b1"], fit["se"]
        df = None
        if self.df == "between-within":
            df = np.where(st.arm_within, st.n_obs - st.n_groups - 1.0, st.n_groups - 2.0)
        elif self.df == "satterthwaite":
            u = np.stack([st.m, st.a], -1)
            S = np.empty(st.m.shape + (2, 2))
            S[..., 0, 0], S[..., 0, 1], S[..., 1, 0], S[..., 1, 1] = st.m, st.a, st.a, st.a
            with np.errstate(all="ignore"):
                var, df = satterthwaite(st.m, u, S, fit["sigma_b2"], fit["sigma_e2"], 1)
            se = np.sqrt(var)
        out = self._result(est, se, df)
        # at the boundary the SE comes from the fixed-effect block alone, so the Hessian's sign is moot
        interior = np.asarray(fit["gamma"]) > 0
        out = BatchResult(**out)
        out.trouble = {"warning:ConvergenceWarning": np.asarray(fit["not_pd"], bool) & interior}
        out.trouble_messages = {"warning:ConvergenceWarning": TROUBLE_MESSAGE}
        return out

    def _batch_design(self, batch):
        X, _, k = self._design_batch(batch)
        f = parse_formula(self.formula)
        y = np.asarray(batch.per_rep[f.outcome], float)
        ok = np.isfinite(y)
        if "present" in batch.per_rep:
            ok &= np.asarray(batch.per_rep["present"], bool)
        fit = fit_design_batch(y, ok, X, np.asarray(batch.shared[self.groups]))
        st = fit["sums"]
        est = fit["beta"][:, k]
        se = np.sqrt(fit["cov"][:, k, k])
        df = None
        if self.df == "between-within":
            between = st.between
            nb = between.sum(1)
            df = np.where(between[:, k], st.n_groups - nb, st.n_obs - st.n_groups - (X.shape[1] - nb))
        elif self.df == "satterthwaite":
            with np.errstate(all="ignore"):
                var, df = satterthwaite(st.m, st.U, st.S, fit["sigma_b2"], fit["sigma_e2"], k, n=st.n)
            se = np.sqrt(var)
        out = BatchResult(**self._result(est, se, df))
        interior = np.asarray(fit["gamma"]) > 0
        singular = fit["singular"]
        out.trouble = {"warning:ConvergenceWarning": np.asarray(fit["not_pd"], bool) & interior & ~singular}
        out.trouble_messages = {"warning:ConvergenceWarning": TROUBLE_MESSAGE}
        # a level never observed (e.g. no outcome at a visit in one arm): statsmodels builds a smaller
        # design from the observed rows, so those replicates go to the per-replicate path
        return hand_over(self, batch, out, singular)
