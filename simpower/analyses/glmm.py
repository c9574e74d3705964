"""Random-intercept generalised linear mixed model (GLMM) for clustered binary and count outcomes.

Model (cluster ``i``, participant ``j``)::

    y_ij | u_i ~ Bernoulli(expit(b0 + b1 * arm_ij + u_i))     family = "binomial" (logit link)
    y_ij | u_i ~ Poisson(exp(b0 + b1 * arm_ij + u_i))         family = "poisson"  (log link)
    u_i ~ N(0, sigma^2)

fitted by maximum likelihood, the integral over each cluster's random intercept done by
adaptive Gauss-Hermite quadrature (AGHQ; ``quadrature_points = 1`` is the Laplace
approximation). The test is the Wald test of ``b1 = 0``: ``b1`` is the *conditional*
(cluster-specific) log odds ratio or log rate ratio, its SE the root of the ``b1`` entry
of the inverse observed information (minus the inverse Hessian of the marginal
log-likelihood at the optimum).

How the likelihood is computed. With ``u = sigma * v``, ``v ~ N(0, 1)``, a cluster's
log integrand is ``g(v) = sum_j log f(y_j | b0 + b1 arm_j + sigma v) - v^2 / 2 - log(2 pi) / 2``.
With the arm coded 0/1 the sum over a cluster's participants depends on the data only
through the observed count ``n_a`` and the outcome total ``s_a`` of each arm ``a`` within
the cluster (plus ``sum log y!`` for counts), so a replicate reduces to a (clusters x 2)
table of cells whatever the cluster sizes. For each replicate and cluster the mode
``v^`` of ``g`` is found by Newton's method safeguarded by bisection (``g`` is strictly
concave: ``g'' <= -1``), all replicates and clusters at once; with ``h = -g''(v^)``,
nodes ``v^ + sqrt(2 / h) z_k`` and weights ``w_k exp(z_k^2)`` (``z_k, w_k``: Gauss-Hermite)
give the cluster's likelihood (Liu & Pierce 1994, Biometrika; Pinheiro & Bates 1995,
J. Comput. Graph. Stat.).

The fit maximises the marginal log-likelihood over ``(b0, b1, sigma)``. The gradient is
analytic: the derivative of the AGHQ approximation itself, including the movement of
the nodes with the mode and curvature (implicit function theorem), so the optimum found
is the optimum of the approximation. The Hessian is the observed information by Louis's
identity, ``E[d2 g] + Var[d g]`` over each cluster's random intercept given its data (Louis
1982, JRSS B 44:226-233), evaluated with the same nodes; with one node (Laplace), where that
variance vanishes, a central finite difference of the analytic gradient instead. The
batch path runs Newton's method for all replicates at once (Hessian eigenvalues flipped
to negative where needed, steps halved until the log-likelihood does not decrease); the
per-replicate path hands the same log-likelihood and gradient to
``scipy.optimize.minimize`` (BFGS) and is the reference the batch path is tested against.
The SE of ``b1`` is the root of the ``b1`` entry of minus the inverse of that Hessian at the
optimum. With numba the batch fit evaluates the log-likelihood, gradient and Hessian by the
compiled :func:`simpower.analyses._glmm_kernels.aghq_cells` (one pass over each cluster's nodes),
over each replicate's distinct clusters weighted by their counts (:func:`distinct_clusters`); it
equals :func:`loglik_cells` to rounding, and :func:`glmm_backend` says which one runs.

``sigma`` is optimised on the whole real line rather than as ``log sigma``: the
likelihood is even in ``sigma`` and smooth through 0, where the model is the GLM (the
quadrature is then exact, so the log-likelihood at ``sigma = 0`` is the GLM's). An
estimate on the boundary (``sigma^ = 0``) is therefore reached like any other, is
reported by :meth:`GLMM.fit` / :meth:`GLMM.fit_batch` (``boundary``), and is not fit
trouble: the fixed effects are then the GLM's (pooled data) and, the Hessian being
block diagonal at ``sigma = 0`` (the likelihood is even in ``sigma``), the SE of ``b1`` is
the GLM's.

Rows with a missing outcome are dropped (all available data: a likelihood analysis,
valid when outcomes are missing at random given the model's terms). Fit trouble is
flagged per replicate, on both paths alike:

``warning:PerfectSeparationWarning``
    an arm has no events (or, for binary outcomes, only events): ``b1`` has no finite
    maximum likelihood estimate. The replicate gets p-value 1, the limit of the Wald
    test along the diverging likelihood (Hauck & Donner 1977, JASA; from memory), and a
    NaN estimate; the run's fit-trouble policy decides how it counts.
``warning:ConvergenceWarning``
    the optimiser stopped without a maximum (gradient not small, Hessian not negative
    definite, non-finite values, ``maxiter`` reached), or there is none: binary outcomes
    with every cluster all events or all non-events, where the likelihood grows without
    bound in ``sigma`` (:func:`unbounded`). Values are kept but not trusted.

A replicate in which one arm has no observed outcome at all cannot be fitted: the
per-replicate path raises ``ValueError`` and the batch path hands the replicate to it.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from .._validation import Choice, Int
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult, hand_over
from .numeric import p_from_t, p_from_z

FAMILIES = ("binomial", "poisson")
LOG_2PI = math.log(2.0 * math.pi)
#: inner Newton iterations for the modes (bisection-safeguarded; the concave integrand converges in ~5)
MODE_STEPS = 80
#: relative step of the finite-difference Hessian
FD_STEP = 1e-5
#: largest gradient (sup norm, relative to 1 + |loglik|) accepted at an optimum
GRADIENT_TOL = 1e-6
#: a Newton step below this (relative to 1 + |parameter|) means the optimum is reached
STEP_TOL = 1e-9
#: step halvings tried per Newton step
HALVINGS = 40

SEPARATION = "warning:PerfectSeparationWarning"
NONCONVERGENCE = "warning:ConvergenceWarning"
NONCONVERGENCE_MESSAGE = ("glmm: the optimiser stopped without a maximum of the likelihood (e.g. every cluster "
                          "all events or all non-events: sigma has no finite estimate)")


def _mean(family: str, eta):
    """The mean (= the cumulant's derivative) at the linear predictor ``eta``: expit or exp."""
    return special.expit(eta) if family == "binomial" else np.exp(eta)


def gauss_hermite(points: int):
    """Nodes ``z_k`` and log weights ``log(w_k) + z_k^2`` of ``points``-point Gauss-Hermite quadrature."""
    z, w = np.polynomial.hermite.hermgauss(points)
    return z, np.log(w) + z * z


#: environment variable: set to 1 (or true/yes), the batch fit uses the numpy log-likelihood
NO_NUMBA_ENV = "SIMPOWER_NO_NUMBA"


def glmm_backend() -> str:
    """Which function the batch fit evaluates the log-likelihood with now: 'numba' or 'numpy'.

    'numba' (the compiled :func:`simpower.analyses._glmm_kernels.aghq_cells`) when numba is
    importable and ``SIMPOWER_NO_NUMBA`` is unset (or 0, false, no); read at each call. The two
    agree to rounding; the per-replicate fit always uses :func:`loglik_cells` (numpy).
    """
    if os.environ.get(NO_NUMBA_ENV, "").strip().lower() not in ("", "0", "false", "no"):
        return "numpy"
    from . import _glmm_kernels  # imports numba (if there) on first use only

    return "numba" if _glmm_kernels.HAVE_NUMBA else "numpy"


def loglik_cells_compiled(theta, n, s, family: str, nodes, v0=None, gradient: bool = True, ca=None,
                          hessian: bool = False, weights=None):
    """:func:`loglik_cells` by the compiled kernel (same arguments and returns; agrees to rounding).

    ``weights`` (R, G), optional: each cluster's contribution counts this many times (a table
    of distinct clusters, :func:`distinct_clusters`); a cluster of weight 0 is left out.
    """
    from ._glmm_kernels import aghq_cells, compile_notice

    z, logw = nodes
    R, G, C = n.shape
    ca = _cell_arms(n) if ca is None else ca
    f = lambda x: np.ascontiguousarray(x, dtype=np.float64)  # noqa: E731
    theta, n, s, ca = f(theta), f(n), f(s), f(np.broadcast_to(ca, n.shape))
    want = 2 if hessian else 1 if gradient else 0
    ll, v = np.empty(R), np.empty((R, G))
    grad = np.zeros((R, 3)) if want else np.empty((0, 3))
    H = np.zeros((R, 3, 3)) if want == 2 else np.empty((0, 3, 3))
    use_v0 = v0 is not None
    m = np.ones((R, G)) if weights is None else f(weights)
    with compile_notice():          # the first call of an installation compiles it: say so if slow
        aghq_cells(theta, n, s, ca, m, f(z), f(logw), family == "binomial", f(v0) if use_v0 else v, use_v0, want,
                   MODE_STEPS, ll, grad, v, H)
    if not gradient:
        return ll, None, v
    return (ll, grad, v, H) if hessian else (ll, grad, v)


# ---------------------------------------------------------------------------
# the cell table: per cluster, C cells (C = 2: arms 0 and 1; C = 1: cluster-randomised) holding
# the observed count n, the outcome total s and the arm ca of the cell, arrays (..., G, C)
# ---------------------------------------------------------------------------
def _mode(family, base, sigma, n, s, v0):
    """Mode of each cluster's log integrand in v (..., G): safeguarded Newton, all clusters at once.

    ``g'(v) = sigma * sum_c (s_c - n_c mu_c(v)) - v`` is strictly decreasing (``g'' <= -1``).
    A bracket ``[lo, hi]`` with ``g'(lo) >= 0 >= g'(hi)`` is kept; a Newton step that leaves
    it is replaced by the midpoint. For binary outcomes ``mu`` is in (0, 1), so the root
    lies between ``sigma (S - N)`` and ``sigma S`` (S, N: the cluster's totals); for counts
    ``mu > 0`` bounds it on one side by ``sigma S``.
    """
    S, N = s.sum(-1), n.sum(-1)
    sg = sigma[..., None]
    a, b = sg * S, sg * (S - N) if family == "binomial" else np.where(sg >= 0, -np.inf, np.inf)
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    v = np.clip(v0, lo, hi) if v0 is not None else np.clip(np.zeros_like(S), lo, hi)
    v = np.where(np.isfinite(v), v, a)
    for _ in range(MODE_STEPS):
        mu = _mean(family, base + (sg * v)[..., None])
        w = mu * (1.0 - mu) if family == "binomial" else mu
        f = sg * (s - n * mu).sum(-1) - v
        d = 1.0 + sg * sg * (n * w).sum(-1)
        lo = np.where(f > 0, v, lo)
        hi = np.where(f < 0, v, hi)
        new = v + f / d
        mid = 0.5 * (lo + hi)
        slack = 1e-9 * (1.0 + np.abs(v))             # a step onto the bracket's end is a converged step
        inside = (new > lo - slack) & (new < hi + slack)
        new = np.where(inside, np.clip(new, lo, hi), np.where(np.isfinite(mid), mid, new))
        done = np.abs(new - v) <= 1e-13 * (1.0 + np.abs(v))
        v = new
        if np.all(done | ~np.isfinite(v)):
            break
    return v


def _cell_arms(n):
    """The arm of each cell when the cells are (arm 0, arm 1)."""
    return np.broadcast_to(np.array([0.0, 1.0]), n.shape)


def loglik_cells(theta, n, s, family: str, nodes, v0=None, gradient: bool = True, ca=None, hessian: bool = False):
    """Marginal log-likelihood (AGHQ) of a cell table, its gradient in ``(b0, b1, sigma)``.

    Parameters
    ----------
    theta : array (..., 3)
        ``(b0, b1, sigma)`` per replicate.
    n, s : arrays (..., G, C)
        Observed count and outcome total of each cluster (rows) and cell; clusters with
        no observed outcome contribute nothing.
    family : {'binomial', 'poisson'}
    nodes : tuple
        :func:`gauss_hermite` of the number of quadrature points.
    v0 : array (..., G), optional
        Starting values of the modes (e.g. those of a nearby ``theta``).
    ca : array (..., G, C), optional
        Arm (0 or 1) of each cell; default: C = 2 cells, arm 0 then arm 1.
    hessian : bool
        Also return the Hessian by Louis's identity: the quadrature of ``E[g_tt] + Var[g_t]``
        over each cluster's random intercept given its data (measured: the SE of b1 from it
        and from the finite-difference Hessian of ``ll`` differ by about 1e-5 relative with
        10 nodes, 1e-8 with 20);
        with one node (Laplace) the approximation ``g_tt + g_tv g_tv' / h`` at the mode,
        used for Newton steps only.

    Returns
    -------
    ll : array (...)
        Log-likelihood without the count outcomes' ``-sum log y!`` (add it for the full one).
    grad : array (..., 3) or None
    modes : array (..., G)
    hess : array (..., 3, 3), only with ``hessian``
    """
    z, logw = nodes
    ca = _cell_arms(n) if ca is None else ca
    b0, b1, sigma = theta[..., 0], theta[..., 1], theta[..., 2]
    base = b0[..., None, None] + b1[..., None, None] * ca          # (..., G, C)
    v = _mode(family, base, sigma, n, s, v0)
    sg = sigma[..., None]
    mu = _mean(family, base + (sg * v)[..., None])
    w = mu * (1.0 - mu) if family == "binomial" else mu
    nw = n * w
    h = 1.0 + sg * sg * nw.sum(-1)
    sc = np.sqrt(2.0 / h)
    # node arrays put the node axis (and the cell axis) first: (Q, ..., G), (C, Q, ..., G), so the
    # inner loops of numpy run over the contiguous replicates x clusters
    zq = z.reshape((-1,) + (1,) * v.ndim)
    vk = v + sc * zq                                               # (Q, ..., G)
    svk = sg * vk
    one = n.shape[-1] == 1                                         # one cell per cluster: no sum over cells
    if one:
        nn, ss, cq = n[..., 0], s[..., 0], ca[..., 0]
        etak = base[..., 0] + svk
        cs = lambda x: x  # noqa: E731
    else:
        nn, ss, cq = (np.moveaxis(x, -1, 0)[:, None] for x in (n, s, ca))  # (C, 1, ..., G)
        etak = np.moveaxis(base, -1, 0)[:, None] + svk
        cs = lambda x: x.sum(0)  # noqa: E731
    E = lambda x: np.einsum("q...,q...->...", pk, x)  # noqa: E731  quadrature over a cluster's nodes
    if family == "binomial":
        muk = special.expit(etak)
        psik = np.log(muk)
        np.subtract(etak, psik, out=psik)                          # log(1 + e^eta) = eta - log(expit(eta))
    else:
        psik = muk = np.exp(etak)
    a = ss * etak
    a -= nn * psik
    if not one:
        a = a.sum(0)
    a -= 0.5 * vk * vk
    a += (logw - 0.5 * LOG_2PI).reshape(zq.shape)
    top = a.max(0)
    a -= top
    ea = np.exp(a, out=a)
    tot = ea.sum(0)
    used = n.sum(-1) > 0
    ll = np.where(used, np.log(sc) + np.log(tot) + top, 0.0).sum(-1)
    if not gradient:
        return ll, None, v
    pk = ea
    pk /= tot                                                      # weights of the nodes
    rk = ss - nn * muk                                             # residuals per node (and cell)
    P = cs(rk)
    vP = vk * P
    m = [E(P), None, E(vP)]
    m[1] = cq * m[0] if one else E((rk * cq).sum(0))
    dg = np.stack(m, -1)
    gv = sg * P
    gv -= vk                                                       # g'(v_k)
    e_gv = E(gv)
    gv *= zq
    e_gvz = E(gv)
    # the nodes move with the mode and the curvature: their derivatives (implicit function theorem)
    dv, dsc, dgv = _node_movement(family, n, s, ca, sg, v, mu, nw, h, sc)
    gi = dg + e_gv[..., None] * dv + (1.0 / sc + e_gvz)[..., None] * dsc
    grad = np.where(used[..., None], gi, 0.0).sum(-2)
    if not hessian:
        return ll, grad, v
    if z.size == 1:
        H = _laplace_hessian(used, h, v, nw, ca, dgv)
    else:
        wk = muk * (1.0 - muk) if family == "binomial" else muk
        H = _louis_hessian(E, P, rk, nn * wk, cq, vk, dg, one)
    return ll, grad, v, H


def _node_movement(family, n, s, ca, sg, v, mu, nw, h, sc):
    """Derivatives in theta of a cluster's mode ``v^`` and node scale ``sqrt(2 / h)``, and of ``g'(v^)``.

    ``g'(v^(theta); theta) = 0`` gives ``dv^ = (d g' / d theta) / h``; ``h = -g''(v^)`` changes
    through theta directly and through ``v^`` (the third derivative of g). Arrays (..., G, 3).
    """
    r0 = (s - n * mu).sum(-1)
    w3 = nw * (1.0 - 2.0 * mu) if family == "binomial" else nw
    wsum, w1 = nw.sum(-1), (nw * ca).sum(-1)
    wp, wp1 = w3.sum(-1), (w3 * ca).sum(-1)
    dgv = np.stack([-sg * wsum, -sg * w1, r0 - sg * v * wsum], -1)          # d g'(v^) / d theta
    dv = dgv / h[..., None]                                                 # d v^ / d theta
    dgvv = np.stack([-sg**2 * wp, -sg**2 * wp1, -2 * sg * wsum - sg**2 * v * wp], -1)
    g3 = -(sg**3) * wp
    dh = -(dgvv + g3[..., None] * dv)
    dsc = -0.5 * (sc / h)[..., None] * dh
    return dv, dsc, dgv


def _sym3(h00, h01, h02, h11, h12, h22):
    return np.stack([np.stack([h00, h01, h02], -1), np.stack([h01, h11, h12], -1),
                     np.stack([h02, h12, h22], -1)], -2)


def _laplace_hessian(used, h, v, nw, ca, dgv):
    """One node: ``g_tt + g_tv g_tv' / h`` at the mode, summed over clusters (Newton steps only)."""
    u = used.astype(float)
    wsum, w1 = nw.sum(-1), (nw * ca).sum(-1)
    dd = dgv * (u / h)[..., None]
    c = lambda x: (x * u).sum(-1)  # noqa: E731
    return _sym3(-c(wsum) + (dd[..., 0] * dgv[..., 0]).sum(-1), -c(w1) + (dd[..., 0] * dgv[..., 1]).sum(-1),
                 -c(v * wsum) + (dd[..., 0] * dgv[..., 2]).sum(-1), -c(w1) + (dd[..., 1] * dgv[..., 1]).sum(-1),
                 -c(v * w1) + (dd[..., 1] * dgv[..., 2]).sum(-1), -c(v * v * wsum) + (dd[..., 2] * dgv[..., 2]).sum(-1))


def _louis_hessian(E, P, rk, nwk, cq, vk, dg, one):
    """Louis's identity by quadrature: ``sum_i E[g_tt] + E[g_t g_t'] - E[g_t] E[g_t]'`` over the nodes.

    ``g_t = (P, P1, v P)`` with ``P`` the residual total at a node and ``P1`` that of arm 1;
    ``g_tt = -(A, B, ...)`` with ``A`` the total variance and ``B`` that of arm 1. Clusters
    without data have ``P = A = B = 0`` and add nothing.
    """
    m0, m1, m2 = dg[..., 0], dg[..., 1], dg[..., 2]
    if one:                      # the cell's arm cq (0 or 1) is constant over the nodes: P1 = cq P, B = cq A
        PPA = P * P
        PPA -= nwk
        e0 = E(PPA)
        PPA *= vk
        e1 = E(PPA)
        PPA *= vk
        e2 = E(PPA)
        return _sym3((e0 - m0 * m0).sum(-1), (cq * e0 - m0 * m1).sum(-1), (e1 - m0 * m2).sum(-1),
                     (cq * e0 - m1 * m1).sum(-1), (cq * e1 - m1 * m2).sum(-1), (e2 - m2 * m2).sum(-1))
    A = nwk.sum(0)
    B = (nwk * cq).sum(0)
    P1 = (rk * cq).sum(0)
    PPA, PPB = P * P - A, P * P1 - B
    return _sym3((E(PPA) - m0 * m0).sum(-1), (E(PPB) - m0 * m1).sum(-1), (E(vk * PPA) - m0 * m2).sum(-1),
                 (E(P1 * P1 - B) - m1 * m1).sum(-1), (E(vk * PPB) - m1 * m2).sum(-1),
                 (E(vk * vk * PPA) - m2 * m2).sum(-1))


def log_factorial_total(y, mask):
    """``sum log y!`` over the observed counts of each replicate (the Poisson constant)."""
    return np.where(mask, special.gammaln(np.where(mask, y, 0.0) + 1.0), 0.0).sum(-1)


def _hessian(theta, n, s, family, nodes, v0, ca=None):
    """Central finite-difference Hessian (..., 3, 3) of the analytic gradient, symmetrised."""
    return _fd_hessian(theta, lambda th: loglik_cells(th, n, s, family, nodes, v0, ca=ca)[1])


def _fd_hessian(theta, gradient_at):
    """Central finite differences (..., 3, 3) of ``gradient_at(theta)`` (..., 3), symmetrised."""
    H = np.empty(theta.shape + (3,))
    step = FD_STEP * np.maximum(1.0, np.abs(theta))
    for j in range(3):
        e = np.zeros(theta.shape)
        e[..., j] = step[..., j]
        H[..., j] = (gradient_at(theta + e) - gradient_at(theta - e)) / (2.0 * step[..., j, None])
    return 0.5 * (H + np.swapaxes(H, -1, -2))


def _inv(M):
    try:
        return np.linalg.inv(M)
    except np.linalg.LinAlgError:
        out = np.full(M.shape, np.nan)
        flat = out.reshape((-1, 3, 3))
        for i, x in enumerate(M.reshape((-1, 3, 3))):
            try:
                flat[i] = np.linalg.inv(x)
            except np.linalg.LinAlgError:
                pass
        return out


def _arm_totals(n, s, ca):
    ca = _cell_arms(n) if ca is None else ca
    N = np.stack([(n * (1 - ca)).sum((-1, -2)), (n * ca).sum((-1, -2))], -1)
    S = np.stack([(s * (1 - ca)).sum((-1, -2)), (s * ca).sum((-1, -2))], -1)
    return N, S


def start_values(n, s, family, ca=None):
    """Starting values (..., 3): the GLM fit of the pooled data (closed forms for a 0/1 arm) and
    a one-step estimate of sigma from the GLM residuals.

    The one-step estimate is the score for ``sigma^2`` at 0, ``sum_i (r_i^2 - W_i) / 2``
    (``r_i``, ``W_i``: cluster totals of the GLM residuals and variances), over its
    information ``sum_i W_i^2 / 2`` (common practice for variance components); where it is
    not positive the start is sigma = 0.05, close to the boundary it points to.
    """
    ca = _cell_arms(n) if ca is None else ca
    N, S = _arm_totals(n, s, ca)
    with np.errstate(all="ignore"):
        if family == "binomial":
            p = np.clip(S / N, 1e-3, 1 - 1e-3)
            lin = np.log(p) - np.log1p(-p)
        else:
            p = np.maximum(S / N, 1e-3)
            lin = np.log(p)
        lin = np.where(np.isfinite(lin), lin, 0.0)
        p = np.where(np.isfinite(p), p, 0.5)
        mu = p[..., 0, None, None] + (p[..., 1] - p[..., 0])[..., None, None] * ca
        var = mu * (1.0 - mu) if family == "binomial" else mu
        r = (s - n * mu).sum(-1)
        W = (n * var).sum(-1)
        s2 = (r * r - W).sum(-1) / (W * W).sum(-1)
    sigma = np.where(np.isfinite(s2) & (s2 > 0.0025), np.sqrt(np.abs(s2)), 0.05)
    return np.stack([lin[..., 0], lin[..., 1] - lin[..., 0], sigma], -1)


def separated(n, s, family, ca=None):
    """(...,) bool: an arm has no events (binary: or only events), so b1 has no finite MLE."""
    N, S = _arm_totals(n, s, ca)
    bad = S <= 0
    if family == "binomial":
        bad = bad | (S >= N)
    return np.any(bad & (N > 0), axis=-1)


def unbounded(n, s, family):
    """(...,) bool: binary outcomes with every cluster all events or all non-events.

    The likelihood then grows without bound as sigma grows (each cluster's probability
    tends to that of its intercept lying on one side), so there is no finite maximum; a
    quadrature with finitely many nodes may still show a spurious one. Such a replicate is
    reported as not converged on both paths.
    """
    if family != "binomial":
        return np.zeros(n.shape[:-2], bool)
    N, S = n.sum(-1), s.sum(-1)
    return np.all((S == 0) | (S == N), -1)


def distinct_clusters(n, s, ca=None):
    """Each replicate's distinct clusters and how often each occurs: ``n, s, ca`` (R, D, C), ``m`` (R, D).

    Two clusters with the same cells (observed count, outcome total and arm of each) add the
    same term to the log-likelihood, its gradient and Hessian at every parameter value, so a
    replicate's sums can run over its distinct clusters, each weighted by its count ``m``.
    D is the largest number of distinct clusters in a replicate; a replicate with fewer is
    padded with empty clusters of weight 0. Clusters without data are dropped.
    """
    R, G, C = n.shape
    ca = _cell_arms(n) if ca is None else np.broadcast_to(ca, n.shape)
    keys = np.concatenate([n, s, ca], -1).reshape(R * G, 3 * C)
    rep = np.repeat(np.arange(R), G)
    keep = n.reshape(R * G, C).sum(-1) > 0
    keys, rep = keys[keep], rep[keep]
    order = np.lexsort(tuple(keys[:, j] for j in range(3 * C - 1, -1, -1)) + (rep,))
    keys, rep = keys[order], rep[order]
    first = np.ones(rep.size, bool)
    first[1:] = (rep[1:] != rep[:-1]) | np.any(keys[1:] != keys[:-1], -1)
    group = np.cumsum(first) - 1                               # distinct cluster, numbered over the batch
    start = np.full(R, 0)
    heads = np.flatnonzero(first)
    new_rep = heads[np.r_[True, rep[heads[1:]] != rep[heads[:-1]]]] if heads.size else heads
    start[rep[new_rep]] = group[new_rep]
    local = group - start[rep]                                 # its number within its replicate
    D = int(local.max()) + 1 if local.size else 1
    m = np.bincount(rep * D + local, minlength=R * D).reshape(R, D).astype(float)
    out = np.zeros((3 * C, R, D))
    out[:, rep[first], local[first]] = keys[first].T
    nd, sd, cd = (np.moveaxis(out[j * C:(j + 1) * C], 0, -1) for j in range(3))
    return nd, sd, cd, m


# ---------------------------------------------------------------------------
# the batch fit: Newton across replicates
# ---------------------------------------------------------------------------
def _ascent_step(H, g):
    """Newton's ascent step ``(-H~)^-1 g`` (R, 3): ``H~`` is ``H`` with its eigenvalues made negative and
    at least 1e-8 of the largest (or of 1) in size.

    Where ``-H`` is positive definite (Sylvester's leading minors) with its smallest eigenvalue
    provably above that floor (it is at least ``det / (trace / 2)^2``, the largest at most the
    trace), ``H~ = H`` and the step is solved by the cofactors of the 3 x 3 matrix; elsewhere
    by the eigendecomposition.
    """
    A = -H
    a00, a01, a02, a11, a12, a22 = A[:, 0, 0], A[:, 0, 1], A[:, 0, 2], A[:, 1, 1], A[:, 1, 2], A[:, 2, 2]
    with np.errstate(all="ignore"):
        c00, c01, c02 = a11 * a22 - a12 * a12, a02 * a12 - a01 * a22, a01 * a12 - a02 * a11
        c11, c12, c22 = a00 * a22 - a02 * a02, a01 * a02 - a00 * a12, a00 * a11 - a01 * a01
        det = a00 * c00 + a01 * c01 + a02 * c02
        tr = a00 + a11 + a22
        fast = (a00 > 0) & (c22 > 0) & (det > 0) & (det >= 1e-8 * np.maximum(1.0, tr) * (0.5 * tr) ** 2)
        fast &= np.isfinite(det) & np.isfinite(tr) & np.all(np.isfinite(g), -1)
        g0, g1, g2 = g[:, 0], g[:, 1], g[:, 2]
        step = np.stack([c00 * g0 + c01 * g1 + c02 * g2, c01 * g0 + c11 * g1 + c12 * g2,
                         c02 * g0 + c12 * g1 + c22 * g2], -1) / det[:, None]
    slow = np.flatnonzero(~fast)
    if slow.size:
        with np.errstate(all="ignore"):
            lam, V = np.linalg.eigh(np.where(np.isfinite(H[slow]), H[slow], 0.0))
        lam = np.maximum(np.abs(lam), 1e-8 * np.maximum(1.0, np.abs(lam).max(-1, keepdims=True)))
        step[slow] = np.einsum("rij,rj->ri", V, np.einsum("rji,rj->ri", V, g[slow]) / lam)
    return step


def fit_cells(n, s, family: str, points: int, maxiter: int, ca=None):
    """Maximum likelihood fit of every replicate of a cell table (R, G, C), vectorised.

    Newton steps with the Hessian of :func:`loglik_cells` (eigenvalues made negative),
    halved until the log-likelihood does not decrease; stops when a step changes no
    parameter by more than 1e-10 (relative). The SE of b1 and the check that the optimum
    is a maximum use the observed information: with two or more nodes Louis's identity
    evaluated by the same quadrature, with one node (Laplace) the central finite-difference
    Hessian of the exact    gradient. Returns a dict of arrays (R,): ``b0``, ``b1``, ``sigma`` (>= 0), ``se`` (of
    b1), ``loglik`` (without ``-sum log y!``), ``converged``, ``boundary``, ``iterations``.
    """
    nodes = gauss_hermite(points)
    R = n.shape[0]
    theta = start_values(n, s, family, ca)
    if glmm_backend() == "numba":
        # each replicate's distinct clusters once, weighted by how often they occur
        nd, sd, cd, md = distinct_clusters(n, s, ca)

        def lik(th, sel, v0, **kw):
            return loglik_cells_compiled(th, nd[sel], sd[sel], family, nodes, v0, ca=cd[sel], weights=md[sel], **kw)
    else:
        def lik(th, sel, v0, **kw):
            return loglik_cells(th, n[sel], s[sel], family, nodes, v0, ca=None if ca is None else ca[sel], **kw)
    everyone = slice(None)
    ll, g, v, H = lik(theta, everyone, None, hessian=True)
    active = np.isfinite(ll) & np.all(np.isfinite(g), -1)
    iters = np.zeros(R, int)
    converged = np.zeros(R, bool)
    for _ in range(maxiter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        step = _ascent_step(H[idx], g[idx])
        # converged: the next Newton step (about the distance to the optimum) is negligible
        small = np.all(np.abs(step) <= STEP_TOL * (1.0 + np.abs(theta[idx])), -1)
        converged[idx[small]] = True
        active[idx[small]] = False
        idx, step = idx[~small], step[~small]
        if idx.size == 0:
            break
        th, vv, l0 = theta[idx], v[idx], ll[idx]
        iters[idx] += 1
        tol = 1e-12 * (1.0 + np.abs(l0))
        with np.errstate(all="ignore"):
            l1, g1, v1, H1 = lik(th + step, idx, vv, hessian=True)
        ok = np.isfinite(l1) & (l1 >= l0 - tol) & np.all(np.isfinite(g1), -1)
        new_th = th + step
        t = np.ones(idx.size)
        k = np.flatnonzero(~ok)
        for _h in range(HALVINGS):                                # step halving (rarely needed)
            if k.size == 0:
                break
            t[k] *= 0.5
            trial = th[k] + t[k, None] * step[k]
            with np.errstate(all="ignore"):
                lt = lik(trial, idx[k], vv[k], gradient=False)[0]
            good = np.isfinite(lt) & (lt >= l0[k] - tol[k])
            new_th[k[good]] = trial[good]
            ok[k[good]] = True
            k = k[~good]
        redo = np.flatnonzero(ok & (t < 1))
        if redo.size:
            with np.errstate(all="ignore"):
                out = lik(new_th[redo], idx[redo], vv[redo], hessian=True)
            l1[redo], g1[redo], v1[redo], H1[redo] = out
        acc = idx[ok]
        theta[acc], ll[acc], g[acc], v[acc], H[acc] = new_th[ok], l1[ok], g1[ok], v1[ok], H1[ok]
        active[idx[~ok]] = False                                  # no step increases it: stop, unconverged
    with np.errstate(all="ignore"):
        Hc = H if points > 1 else _fd_hessian(theta, lambda th: lik(th, everyone, v)[1])
        cov = _inv(-Hc)
        lam = np.linalg.eigvalsh(np.where(np.isfinite(Hc), Hc, 0.0))
    nd = np.all(lam < 0, -1) & np.all(np.isfinite(Hc), (-1, -2))
    gsmall = np.max(np.abs(g), -1) <= GRADIENT_TOL * (1.0 + np.abs(ll))
    ok = converged & nd & gsmall & np.isfinite(ll) & ~unbounded(n, s, family)
    sigma = np.abs(theta[:, 2])
    return {"b0": theta[:, 0], "b1": theta[:, 1], "sigma": sigma, "se": np.sqrt(cov[:, 1, 1]), "loglik": ll,
            "converged": ok, "boundary": sigma < 1e-6, "iterations": iters}


# ---------------------------------------------------------------------------
# one replicate: its cell table, and the scipy fit
# ---------------------------------------------------------------------------
def cells_of(data, family: str):
    """Cell table (G, 2) ``n``, ``s`` of one long table, and ``sum log y!`` (observed rows only).

    Raises ``ValueError`` for arm labels other than 0/1, outcomes outside the family's
    support, or an arm without any observed outcome.
    """
    y = np.asarray(data["y"], float)
    arm = np.asarray(data["arm"])
    cluster = np.asarray(data["cluster"])
    ok = np.isfinite(y)
    y, arm, cluster = y[ok], arm[ok], cluster[ok]
    if not np.all((arm == 0) | (arm == 1)):
        raise ValueError(f"glmm needs arm labels 0 and 1; got {sorted(set(np.unique(arm).tolist()))}")
    if family == "binomial" and np.any((y != 0) & (y != 1)):
        raise ValueError("glmm with family 'binomial' needs y in {0, 1} (NaN = missing)")
    if family == "poisson" and np.any((y < 0) | (y != np.floor(y))):
        raise ValueError("glmm with family 'poisson' needs counts y = 0, 1, 2, ... (NaN = missing)")
    for a in (0, 1):
        if not np.any(arm == a):
            raise ValueError(f"glmm: arm {a} has no observed outcome; the arm effect cannot be estimated")
    _, code = np.unique(cluster, return_inverse=True)
    G = int(code.max()) + 1
    idx = 2 * code + arm.astype(np.intp)
    n = np.bincount(idx, minlength=2 * G).reshape(G, 2).astype(float)
    s = np.bincount(idx, weights=y, minlength=2 * G).reshape(G, 2)
    return n, s, float(special.gammaln(y + 1.0).sum()) if family == "poisson" else 0.0


@dataclass(frozen=True)
class GLMMFit:
    """One replicate's fit: fixed effects, the random-intercept SD, the SE of ``b1``, diagnostics."""

    b0: float
    b1: float
    sigma: float
    se: float
    loglik: float
    clusters: int
    converged: bool
    boundary: bool
    separated: bool


def fit_one(n, s, family: str, points: int, maxiter: int, log_fact: float = 0.0):
    """Fit one replicate's cell table (G, 2) with ``scipy.optimize.minimize`` (BFGS, analytic gradient).

    A separated table (see :func:`separated`) is not fitted: its fields are NaN.
    """
    from scipy import optimize

    nodes = gauss_hermite(points)
    n, s = n[None], s[None]
    clusters = int(np.count_nonzero(n[0].sum(-1) > 0))
    if separated(n, s, family)[0]:
        return GLMMFit(b0=math.nan, b1=math.nan, sigma=math.nan, se=math.nan, loglik=math.nan, clusters=clusters,
                       converged=False, boundary=False, separated=True)
    cache = {}

    def fun(th):
        ll, g, v = loglik_cells(th[None], n, s, family, nodes, cache.get("v"))
        if np.isfinite(ll[0]):
            cache["v"] = v
        return -ll[0], -g[0]

    x0 = start_values(n, s, family)[0]
    with np.errstate(all="ignore"):
        res = optimize.minimize(fun, x0, jac=True, method="BFGS",
                                options={"gtol": 1e-9, "maxiter": 100 * maxiter})
        th = res.x[None]
        ll, g, v, H = loglik_cells(th, n, s, family, nodes, hessian=True)
        H = H[0] if points > 1 else _hessian(th, n, s, family, nodes, v)[0]
        cov = _inv(-H[None])[0]
    nd = bool(np.all(np.isfinite(H)) and np.all(np.linalg.eigvalsh(np.where(np.isfinite(H), H, 0.0)) < 0))
    gsmall = bool(np.max(np.abs(g[0])) <= GRADIENT_TOL * (1.0 + abs(ll[0])))
    sigma = abs(float(th[0, 2]))
    return GLMMFit(b0=float(th[0, 0]), b1=float(th[0, 1]), sigma=sigma, se=float(np.sqrt(cov[1, 1])),
                   loglik=float(ll[0]) - log_fact, clusters=clusters,
                   converged=bool(nd and gsmall and np.isfinite(ll[0]) and not unbounded(n, s, family)[0]),
                   boundary=sigma < 1e-6, separated=False)


# ---------------------------------------------------------------------------
# the analysis
# ---------------------------------------------------------------------------
class GLMM(Analysis):
    """Random-intercept GLMM (logit or log link) fitted by maximum likelihood with adaptive Gauss-Hermite quadrature.

    H0: the conditional (cluster-specific) arm effect ``b1`` is 0 (odds ratio or rate
    ratio 1), against ``alternative``; Wald test.

    Parameters
    ----------
    family : {'binomial', 'poisson'}
        Binary outcomes (y in {0, 1}, logit link) or counts (log link).
    quadrature_points : int >= 1
        Gauss-Hermite points per cluster (default 10); 1 is the Laplace approximation.
    alternative : {'two-sided', 'greater', 'less'}
    ci_level : float in (0, 1)
    distribution : {'normal', 't'}
        Reference distribution of the Wald statistic: standard normal, or t with
        ``clusters - 2`` df (clusters with an observed outcome), common practice with
        few clusters.
    maxiter : int
        Newton iterations of the batch fit (the per-replicate BFGS gets 100 times as many).

    Notes
    -----
    See the module notes for the model, the fit, the boundary ``sigma = 0`` and fit
    trouble. :meth:`fit` returns one replicate's full fit (``sigma``, ``boundary``, ...).

    Examples
    --------
    >>> import numpy as np
    >>> from simpower.analyses.glmm import GLMM
    >>> rng = np.random.default_rng(5)
    >>> cluster = np.repeat(np.arange(20), 30)
    >>> arm = (cluster >= 10).astype(int)
    >>> u = rng.normal(0.0, 0.5, 20)[cluster]
    >>> y = (rng.random(600) < 1 / (1 + np.exp(-(-0.5 + 0.8 * arm + u)))).astype(float)
    >>> fit = GLMM().fit({"y": y, "arm": arm, "cluster": cluster})
    >>> fit.clusters, fit.converged, fit.boundary
    (20, True, False)
    """

    name = "glmm"
    null_hypothesis = "the conditional (cluster-specific) arm effect b1 is 0 (odds ratio or rate ratio 1)"
    params = {"family": Choice(FAMILIES), "quadrature_points": Int(low=1, high=100), "alternative": ALTERNATIVE,
              "ci_level": CI_LEVEL, "distribution": Choice(("normal", "t")), "maxiter": Int(low=1, high=10_000)}
    defaults = {"family": "binomial", "quadrature_points": 10, "alternative": "two-sided", "ci_level": 0.95,
                "distribution": "normal", "maxiter": 50}
    layouts = ("clustered",)

    @property
    def estimand_label(self) -> str:
        """'conditional log odds ratio' (binomial) or 'log rate ratio' (poisson: with a random
        intercept the conditional and the marginal rate ratio coincide)."""
        return "conditional log odds ratio" if self.family == "binomial" else "log rate ratio"

    # -- per replicate ----------------------------------------------------------------
    def fit(self, data) -> GLMMFit:
        """The maximum likelihood fit of one long table (``y``, ``arm``, ``cluster``)."""
        for col in ("y", "arm", "cluster"):
            if col not in data:
                raise ValueError(f"glmm needs a {col!r} column")
        n, s, lf = cells_of(data, self.family)
        return fit_one(n, s, self.family, self.quadrature_points, self.maxiter, lf)

    def __call__(self, data):
        fit = self.fit(data)
        if fit.separated:
            from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

            warnings.warn(PerfectSeparationWarning(
                "an arm has no events (or only events): the arm effect has no finite maximum likelihood estimate"))
            return TestResult(pvalue=1.0)
        if not fit.converged:
            from statsmodels.tools.sm_exceptions import ConvergenceWarning

            warnings.warn(ConvergenceWarning(NONCONVERGENCE_MESSAGE))
        out = self._result(np.asarray(fit.b1), np.asarray(fit.se), np.asarray(float(fit.clusters)))
        return TestResult(**{k: float(v) for k, v in out.items()})

    def _result(self, est, se, clusters):
        with np.errstate(all="ignore"):
            z = est / se
            if self.distribution == "t":
                df = clusters - 2.0
                p, crit = p_from_t(z, df, self.alternative), stats.t.ppf(0.5 + self.ci_level / 2, df)
            else:
                p, crit = p_from_z(z, self.alternative), special.ndtri(0.5 + self.ci_level / 2)
            return {"pvalue": p, "estimate": est, "se": se, "ci_low": est - crit * se, "ci_high": est + crit * se}

    # -- batch --------------------------------------------------------------------------
    def _supports(self, layout) -> bool:
        arm = np.asarray(layout.arm)
        if not np.all((arm == 0) | (arm == 1)):       # labels outside 0/1 matter only on present rows
            if layout.present is None:
                return False
            arm = np.broadcast_to(arm, layout.y.shape)[layout.present]
            if not np.all((arm == 0) | (arm == 1)):
                return False
        y = layout.y
        with np.errstate(invalid="ignore"):
            bad = ~((y == 0) | (y == 1)) if self.family == "binomial" else ~((y >= 0) & (y == np.floor(y)))
        return not np.any(bad & layout.observed) if bad.any() else True

    def batch_cells(self, batch):
        """The cell table of a batch: ``n``, ``s``, ``ca`` (R, G, C) and ``sum log y!`` per replicate.

        C = 1 (one cell per cluster, ``ca`` its arm) when every cluster of every replicate
        is in one arm (a cluster-randomised trial), else C = 2 (arm 0, arm 1; ``ca`` None).
        """
        layout = self.batch_layout(batch)
        codes, G = layout.codes
        R, N = layout.y.shape
        obs = layout.observed
        lf = log_factorial_total(layout.y, obs) if self.family == "poisson" else np.zeros(R)
        arm = np.asarray(layout.arm)
        if arm.ndim == 1 and codes.ndim == 1:
            # arms and clusters shared by all replicates: a cluster-randomised trial is seen from them alone
            lo, hi = np.full(G, 2), np.full(G, -1)
            np.minimum.at(lo, codes, arm.astype(np.intp))
            np.maximum.at(hi, codes, arm.astype(np.intp))
            if np.all((lo == hi) | (lo > hi)):
                idx = (codes + G * np.arange(R)[:, None])[obs]
                n = np.bincount(idx, minlength=R * G).reshape(R, G).astype(float)
                s = np.bincount(idx, weights=layout.y[obs], minlength=R * G).reshape(R, G)
                ca = np.where(n > 0, np.maximum(hi, 0).astype(float), 0.0)
                return n[..., None], s[..., None], ca[..., None], lf
        arm = np.broadcast_to(arm, (R, N)).astype(np.intp)
        idx = (np.broadcast_to(codes, (R, N)) * 2 + arm + (2 * G) * np.arange(R)[:, None])[obs]
        n = np.bincount(idx, minlength=R * G * 2).reshape(R, G, 2).astype(float)
        s = np.bincount(idx, weights=layout.y[obs], minlength=R * G * 2).reshape(R, G, 2)
        ca = None
        if np.all(layout.cluster_randomised):
            one = n[..., 1] > 0
            ca = one[..., None].astype(float)
            n = np.where(one, n[..., 1], n[..., 0])[..., None]
            s = np.where(one, s[..., 1], s[..., 0])[..., None]
        return n, s, ca, lf

    def fit_batch(self, batch) -> dict:
        """The fit of every replicate: dict of arrays (R,) ``b0, b1, sigma, se, loglik, clusters,
        converged, boundary, separated, unfit`` (``unfit``: an arm without observed outcomes)."""
        n, s, ca, lf = self.batch_cells(batch)
        N, _ = _arm_totals(n, s, ca)
        unfit = np.any(N == 0, -1)
        sep = separated(n, s, self.family, ca) & ~unfit
        rows = ~unfit & ~sep
        R = n.shape[0]
        out = {k: np.full(R, np.nan) for k in ("b0", "b1", "sigma", "se", "loglik")}
        out.update(converged=np.zeros(R, bool), boundary=np.zeros(R, bool), iterations=np.zeros(R, int))
        if rows.any():
            res = fit_cells(n[rows], s[rows], self.family, self.quadrature_points, self.maxiter,
                            None if ca is None else ca[rows])
            for k, v in res.items():
                out[k][rows] = v
        out["loglik"] = out["loglik"] - lf
        out["clusters"] = np.count_nonzero(n.sum(-1) > 0, -1).astype(float)
        out["separated"], out["unfit"] = sep, unfit
        return out

    def batch(self, batch):
        fit = self.fit_batch(batch)
        res = BatchResult(**self._result(fit["b1"], fit["se"], fit["clusters"]))
        sep = fit["separated"]
        if sep.any():
            res.pvalue = np.where(sep, 1.0, res.pvalue)
            res.mark(SEPARATION, sep, "an arm has no events (or only events): the arm effect has no finite "
                                      "maximum likelihood estimate")
        trouble = ~fit["converged"] & ~sep & ~fit["unfit"]
        if trouble.any():
            res.mark(NONCONVERGENCE, trouble, NONCONVERGENCE_MESSAGE)
        return hand_over(self, batch, res, fit["unfit"])
