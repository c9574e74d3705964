"""MMRM: the mixed model for repeated measures, fitted by REML, for two-arm longitudinal trials.

Model. Subject i (arm ``a_i`` in {0, 1}) has outcomes ``y_i`` at visits
1..T; its mean at visit j is ``mu_j + delta_j a_i`` (visit-by-arm means), plus
``gamma_j b_i`` with the baseline adjustment (``baseline = true``: the
``baseline`` column by visit; the first visit, the baseline measurement
itself, is then not an outcome). The residual vector has covariance
``Sigma`` (T x T): ``"unstructured"`` (default), ``"toeplitz"``
(homogeneous; parameterised by partial autocorrelations, Barndorff-Nielsen &
Schou 1973, so every value is a valid correlation), ``"ar1"`` or ``"cs"``
(compound symmetry; correlation in (-1/(T-1), 1)). All available data: a
subject contributes the visits it was observed at (monotone dropout and
intermittent missingness alike), which is valid under MAR (Rubin 1976;
Mallinckrodt et al. 2008, Drug Information Journal 42:303). Fit by REML
(Patterson & Thompson 1971; Harville 1977)::

    -2 l_R = (N - p) log 2 pi + sum_i log|Sigma_i| + log|X' V^-1 X| + r' V^-1 r

with ``Sigma_i`` the sub-matrix of the visits subject i was seen at,
``r = y - X beta_hat`` and ``beta_hat`` the GLS estimate (profiled out).

Test. The treatment difference at the final visit (``contrast = "final"``,
``delta_T``) or averaged over the visits modelled (``"average"``), its
model-based SE ``sqrt(L' (X' V^-1 X)^-1 L)`` and a t reference with
``df_method``:

``"satterthwaite"`` (default)
    ``2 v^2 / (g' I^-1 g)`` with ``v`` the contrast variance, ``g`` its
    gradient in the covariance parameters and ``I`` the *expected* REML
    information (Satterthwaite 1946; Giesbrecht & Burns 1985, Biometrics 41:477;
    Fai & Cornelius 1996, J Stat Comput Simul 54:363). With complete data and
    an unstructured Sigma this is exactly ``N_subjects - 2`` (the pooled
    two-sample t-test at the final visit; tests/test_mmrm.py).
``"between_within"``
    the arm is a between-subject factor: subjects with an observed outcome
    minus the subject-level columns (2, or 3 with the baseline)
    (Schluchter & Elashoff 1990, J Stat Comput Simul 37:11).

Kenward-Roger's adjusted SE and df are not offered (not validated here).

Computation. Subjects with the same pattern of observed visits share the
sub-matrix of Sigma, so everything REML needs reduces to per-pattern sums
(counts, ``sum u u'``, ``sum y u'``, ``sum y y'`` with ``u_i = (1, a_i[, b_i])``)
computed once; each evaluation then costs one Cholesky per pattern,
whatever the number of subjects. The batch path runs Fisher scoring (expected
information, recomputed every :data:`REFRESH` steps and after a shortened step;
step halving) for all replicates at once, on arrays with a leading replicate
axis, from a pairwise moment estimate of Sigma; the per-replicate path
minimises the same REML criterion (analytic gradient) with scipy's BFGS from
the same start (restarted if it stops short). Both call a fit converged when
the Newton decrement is below :data:`DECREMENT_TOL`. An evaluation is staged
(criterion, gradient, information) and kept between steps and for the final
information, so nothing is computed twice at one theta. With complete data
and an unstructured Sigma the batch path takes the closed form
(:func:`complete_data_reml`: residual cross-products over N - q). Outcomes (and the baseline) are centred and
scaled per replicate before fitting; results are returned in outcome units.

Trouble, per replicate, on both paths: a design that cannot be fitted (a
visit without enough observed outcomes in an arm, two visits never observed
together under an unstructured Sigma) is an ``error:ValueError``; a fit that
does not reach a stationary point, or whose Sigma is numerically singular,
is ``warning:ConvergenceWarning``.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import special

from .._validation import Bool, Choice
from .base import ALTERNATIVE, CI_LEVEL, Analysis, BatchResult, TestResult
from .numeric import p_from_t

COVARIANCES = ("unstructured", "toeplitz", "ar1", "cs")
DF_METHODS = ("satterthwaite", "between_within")
CONTRASTS = ("final", "average")

#: Fisher-scoring iterations of the batch path before a replicate is flagged
MAX_ITER = 300
#: a fit is at a stationary point when the Newton decrement s' I^-1 s (log-likelihood units) is below this
DECREMENT_TOL = 1e-11
#: the batch path stops iterating once every step changes no parameter by more than this
STEP_TOL = 1e-8
#: Fisher-scoring iterations between two evaluations of the expected information
REFRESH = 10
#: Sigma is flagged as singular when its correlation matrix's smallest eigenvalue is below this
SINGULAR_TOL = 1e-8

NOT_CONVERGED = "mmrm: the REML fit did not reach a stationary point"
SINGULAR = "mmrm: the REML estimate of the covariance matrix is numerically singular"


class ConvergenceWarning(UserWarning):
    """The REML fit of one data set did not converge, or its covariance estimate is singular."""


# ---------------------------------------------------------------------------
# data: a (R, S, T) cube of outcomes and (R, S, q) subject covariates
# ---------------------------------------------------------------------------
def _codes(values):
    vals, inv = np.unique(np.asarray(values), return_inverse=True)
    return vals, inv.reshape(np.shape(values))


def design_index(arm, visit, subject):
    """Row index of each (subject, visit) cell (-1: no row), the arm of each subject, the visit values.

    Raises ``ValueError`` when a subject has two rows at one visit or rows in both arms.
    """
    arm = np.asarray(arm)
    if not np.all((arm == 0) | (arm == 1)):
        raise ValueError("mmrm: `arm` must be coded 0 (control) and 1 (treatment)")
    visits, v = _codes(visit)
    _, s = _codes(subject)
    S, T = int(s.max()) + 1 if s.size else 0, visits.size
    index = np.full((S, T), -1, np.intp)
    index[s, v] = np.arange(s.size)
    if np.count_nonzero(index >= 0) != s.size:
        raise ValueError("mmrm: a subject has two rows at the same visit")
    sub_arm = np.zeros(S)
    sub_arm[s] = arm
    if np.any(sub_arm[s] != arm):
        raise ValueError("mmrm: a subject's rows are in both arms")
    return index, sub_arm, visits


def _gather(col, index):
    """Column values (R, N) or (N,) at ``index`` (S, T) -> (R, S, T) (NaN where -1)."""
    col = np.asarray(col, float)
    if col.ndim == 1:
        col = col[None, :]
    out = col[:, np.maximum(index, 0)]
    out[:, index < 0] = np.nan
    return out


def subject_baseline(b_cube):
    """The baseline of each subject (R, S): its value on the first of its rows (NaN if none)."""
    has = np.isfinite(b_cube)
    first = np.argmax(has, axis=2)
    b = np.take_along_axis(b_cube, first[..., None], axis=2)[..., 0]
    return np.where(has.any(axis=2), b, np.nan)


def standardise(Y, sub_arm, b=None):
    """Centre and scale the outcomes (and the baseline) per replicate.

    Returns the scaled cube, the covariates ``u`` (R, S, q) = (1, arm[, baseline]),
    and the scale of each replicate (R,). Subjects without a baseline lose their outcomes.
    """
    Y = np.array(Y, float)
    R, S, T = Y.shape
    if b is not None:
        Y[~np.isfinite(b)] = np.nan
    ok = np.isfinite(Y)
    n = ok.sum(axis=(1, 2))
    with np.errstate(all="ignore"):
        mean = np.where(ok, Y, 0.0).sum(axis=(1, 2)) / n
        dev = np.where(ok, Y - mean[:, None, None], 0.0)
        scale = np.sqrt((dev * dev).sum(axis=(1, 2)) / n)
    scale = np.where(np.isfinite(scale) & (scale > 0), scale, 1.0)
    mean = np.where(np.isfinite(mean), mean, 0.0)
    Ys = np.where(ok, (Y - mean[:, None, None]) / scale[:, None, None], np.nan)
    cols = [np.ones((R, S)), np.broadcast_to(np.asarray(sub_arm, float), (R, S))]
    if b is not None:
        bok = np.isfinite(b)
        with np.errstate(all="ignore"):
            nb = bok.sum(1)
            bm = np.where(bok, b, 0.0).sum(1) / nb
            bd = np.where(bok, b - bm[:, None], 0.0)
            bs = np.sqrt((bd * bd).sum(1) / nb)
        bs = np.where(np.isfinite(bs) & (bs > 0), bs, 1.0)
        cols.append(np.where(bok, bd / bs[:, None], 0.0))
    return Ys, np.stack(cols, axis=-1), scale


def _everything(sel, R) -> bool:
    """Whether the integer index ``sel`` selects all R rows in order (a take that would only copy)."""
    sel = np.asarray(sel)
    return sel.dtype.kind in "iu" and sel.shape == (R,) and bool(np.all(sel == np.arange(R)))


class Patterns:
    """Per-pattern sufficient statistics of a cube of outcomes.

    ``masks`` (P, T) bool: the distinct patterns of observed visits; per
    replicate and pattern: ``n`` (R, P) subjects, ``U`` (R, P, q, q) = sum u u',
    ``M`` (R, P, T, q) = sum y u', ``C`` (R, P, T, T) = sum y y' (y with 0 at
    unobserved visits).
    """

    def __init__(self, Y, u):
        Y = np.asarray(Y, float)
        u = np.broadcast_to(np.asarray(u, float), Y.shape[:2] + (np.shape(u)[-1],))
        R, S, T = Y.shape
        q = u.shape[-1]
        obs = np.isfinite(Y)
        code = np.zeros((R, S), np.int64)
        for t in range(T):
            code += obs[..., t].astype(np.int64) << t
        codes = np.flatnonzero(np.bincount(code.ravel(), minlength=1 << T)[1:]) + 1   # sorted, as np.unique
        self.masks = ((codes[:, None] >> np.arange(T)) & 1).astype(bool)
        P = codes.size
        # per pattern, sum over its subjects of z z' with z = (u, y): a batched product per pattern,
        # a block of replicates at a time (the block's arrays stay in cache)
        Zt = np.concatenate([u, np.where(obs, Y, 0.0)], axis=2)                # (R, S, q+T)
        Z = np.ascontiguousarray(np.swapaxes(Zt, 1, 2))
        ZZ = np.empty((R, P, q + T, q + T))
        n = np.empty((R, P))
        for k in range(P):
            n[:, k] = (code == codes[k]).sum(axis=1)
        step = max(1, 2**17 // max(S * (q + T), 1))
        for r0 in range(0, R, step):
            r1 = min(R, r0 + step)
            for k in range(P):
                h = code[r0:r1] == codes[k]
                ZZ[r0:r1, k] = (Z[r0:r1] * h[:, None, :].astype(float)) @ Zt[r0:r1]
        self.n = n
        self.U = np.ascontiguousarray(ZZ[..., :q, :q])
        self.M = np.ascontiguousarray(ZZ[..., q:, :q])
        self.C = np.ascontiguousarray(ZZ[..., q:, q:])
        self.R, self.T, self.q, self.P = R, T, q, P
        self.n_obs = (self.n * self.masks.sum(1)).sum(1)        # (R,)
        self.n_subjects = self.n.sum(1)
        # per visit: sum of u u' over subjects seen there; jointly seen counts of two visits
        self.visit_U = np.einsum("pt,rpkl->rtkl", self.masks.astype(float), self.U)
        mf = self.masks.astype(float)
        self.joint = self.n @ (mf[:, :, None] * mf[:, None, :]).reshape(P, T * T)
        self.joint = self.joint.reshape(R, T, T)

    def take(self, sel) -> "Patterns":
        if _everything(sel, self.R):
            return self
        out = object.__new__(Patterns)
        out.__dict__.update(self.__dict__)
        for k in ("n", "U", "M", "C", "n_obs", "n_subjects", "visit_U", "joint"):
            setattr(out, k, getattr(self, k)[sel])
        out.R = out.n.shape[0]
        return out


def design_problems(st: Patterns, covariance: str) -> tuple[np.ndarray, list[str]]:
    """Replicates (R,) whose model cannot be fitted, and the first reason (one line) for each."""
    R, T, q = st.R, st.T, st.q
    with np.errstate(all="ignore"):
        ev = np.linalg.eigvalsh(st.visit_U)                    # (R, T, q)
    rank_ok = ev[..., 0] > 1e-10 * np.maximum(ev[..., -1], 1e-300)
    bad = ~rank_ok.all(axis=1)
    reasons = ["" for _ in range(R)]
    for r in np.flatnonzero(bad):
        j = int(np.argmin(rank_ok[r]))
        reasons[r] = (f"mmrm: visit {j + 1} of {T} has too few observed outcomes in an arm to estimate its "
                      "visit-by-arm mean")
    p = T * q
    if covariance == "unstructured":
        nj = np.diagonal(st.joint, axis1=1, axis2=2)
        few = np.any(nj <= q, axis=1) & ~bad
        for r in np.flatnonzero(few):
            j = int(np.argmin(nj[r]))
            reasons[r] = (f"mmrm: visit {j + 1} of {T} has {int(nj[r, j])} observed outcomes, too few to estimate "
                          "its variance under an unstructured covariance")
        bad |= few
        never = np.any(st.joint == 0, axis=(1, 2)) & ~bad
        for r in np.flatnonzero(never):
            j, l = np.argwhere(st.joint[r] == 0)[0]
            reasons[r] = (f"mmrm: visits {j + 1} and {l + 1} are never observed in one subject, so their "
                          "covariance is not estimable: use covariance = \"toeplitz\", \"ar1\" or \"cs\"")
        bad |= never
    else:
        few = (st.n_obs <= p + 1) & ~bad
        for r in np.flatnonzero(few):
            reasons[r] = "mmrm: too few observed outcomes to estimate the covariance"
        bad |= few
    return bad, reasons


# ---------------------------------------------------------------------------
# covariance structures: Sigma(theta) and its Jacobian J_k = dSigma/dtheta_k
# ---------------------------------------------------------------------------
def n_params(kind: str, T: int) -> int:
    return {"unstructured": T * (T + 1) // 2, "toeplitz": T, "ar1": 2, "cs": 2}[kind]


def _tril(T):
    return [(i, j) for i in range(T) for j in range(i + 1)]


def _toeplitz_corr(z, T):
    """Autocorrelations r_0..r_{T-1} from partial autocorrelations tanh(z) (Durbin-Levinson); complex-safe."""
    phi = np.tanh(z)                                           # (R, T-1)
    R = z.shape[0]
    r = [np.ones(R, dtype=z.dtype)]
    a = np.zeros((R, 0), dtype=z.dtype)
    v = np.ones(R, dtype=z.dtype)
    for k in range(1, T):
        pk = phi[:, k - 1]
        # r_k = sum_j a_j r_{k-j} + phi_k v_{k-1}
        rk = pk * v
        for j in range(1, k):
            rk = rk + a[:, j - 1] * r[k - j]
        r.append(rk)
        a = np.concatenate([a - pk[:, None] * a[:, ::-1], pk[:, None]], axis=1)
        v = v * (1.0 - pk * pk)
    return np.stack(r, axis=1)                                 # (R, T)


def sigma_of(theta, kind: str, T: int, jacobian: bool = True):
    """Sigma (R, T, T) from parameters ``theta`` (R, m), and its Jacobian (R, m, T, T)."""
    theta = np.asarray(theta, float)
    R, m = theta.shape
    lag = np.abs(np.subtract.outer(np.arange(T), np.arange(T)))
    J = None
    if kind == "unstructured":
        L = np.zeros((R, T, T))
        idx = _tril(T)
        rows, cols = np.array([i for i, _ in idx]), np.array([j for _, j in idx])
        diag = rows == cols
        L[:, rows, cols] = np.where(diag, np.exp(np.minimum(theta, 300.0)), theta)
        S = L @ np.swapaxes(L, 1, 2)
        if jacobian:
            J = np.zeros((R, m, T, T))
            for k, (i, j) in enumerate(idx):
                col = L[:, :, j]                               # dL = E_ij (times L_ii on the diagonal)
                f = L[:, i, i] if i == j else 1.0
                J[:, k, i, :] += col
                J[:, k, :, i] += col
                J[:, k] *= np.reshape(f, (-1, 1, 1)) if np.ndim(f) else f
    elif kind == "cs":
        s2 = np.exp(theta[:, 0])
        lo = -1.0 / (T - 1)
        e = special.expit(theta[:, 1])
        rho = lo + (1.0 - lo) * e
        corr = np.where(lag == 0, 1.0, rho[:, None, None])
        S = s2[:, None, None] * corr
        if jacobian:
            J = np.stack([S, s2[:, None, None] * (lag > 0) * ((1.0 - lo) * e * (1 - e))[:, None, None]], axis=1)
    elif kind == "ar1":
        s2 = np.exp(theta[:, 0])
        rho = np.tanh(theta[:, 1])[:, None, None]
        S = s2[:, None, None] * rho**lag
        if jacobian:
            dr = np.where(lag > 0, lag * rho ** np.maximum(lag - 1, 0), 0.0) * (1.0 - rho**2)
            J = np.stack([S, s2[:, None, None] * dr], axis=1)
    elif kind == "toeplitz":
        s2 = np.exp(theta[:, 0])
        corr = _toeplitz_corr(theta[:, 1:], T)[:, lag]
        S = s2[:, None, None] * corr
        if jacobian:
            J = np.empty((R, m, T, T))
            J[:, 0] = S
            h = 1e-30                                          # complex-step derivative: exact to rounding
            for k in range(1, m):
                zc = theta[:, 1:].astype(complex)
                zc[:, k - 1] += 1j * h
                J[:, k] = s2[:, None, None] * (_toeplitz_corr(zc, T).imag / h)[:, lag]
    else:
        raise ValueError(f"unknown covariance {kind!r}")
    return S, J


def theta_of(Sigma, kind: str) -> np.ndarray:
    """Parameters (R, m) of a positive definite ``Sigma`` (R, T, T) (projected onto the structure)."""
    Sigma = np.asarray(Sigma, float)
    R, T, _ = Sigma.shape
    sd = np.sqrt(np.diagonal(Sigma, axis1=1, axis2=2))
    corr = Sigma / sd[:, :, None] / sd[:, None, :]
    s2 = np.log(np.mean(sd * sd, axis=1))
    lag = np.abs(np.subtract.outer(np.arange(T), np.arange(T)))
    if kind == "unstructured":
        L = np.linalg.cholesky(Sigma)
        return np.stack([np.log(L[:, i, i]) if i == j else L[:, i, j] for i, j in _tril(T)], axis=1)
    r1 = np.array([corr[:, lag == 1].mean(1)]).reshape(R)
    if kind == "cs":
        lo = -1.0 / (T - 1)
        rho = np.clip(corr[:, lag > 0].mean(1), lo + 0.05 * (1 - lo), 0.95)
        return np.stack([s2, special.logit((rho - lo) / (1.0 - lo))], axis=1)
    r1 = np.clip(r1, -0.95, 0.95)
    if kind == "ar1":
        return np.stack([s2, np.arctanh(r1)], axis=1)
    out = np.zeros((R, T))
    out[:, 0], out[:, 1] = s2, np.arctanh(r1)
    return out


def start_sigma(st: Patterns) -> np.ndarray:
    """Pairwise moment estimate of Sigma (R, T, T), shrunk towards its diagonal until positive definite.

    Residuals from the least-squares fit of each visit on ``u`` (its observed subjects);
    covariances from the subjects seen at both visits (all from the per-pattern sums).
    """
    q = st.q
    mf = st.masks.astype(float)
    Uy = np.einsum("pt,rptk->rtk", mf, st.M)
    coef = np.linalg.solve(st.visit_U + 1e-9 * np.eye(q), Uy[..., None])[..., 0]   # (R, T, q)
    Mc = st.M @ coef.transpose(0, 2, 1)[:, None]               # (R, P, T, T): M_p[t] . c_u
    cUc = coef[:, None] @ st.U @ coef.transpose(0, 2, 1)[:, None]                    # c_t' U_p c_u
    both = mf[:, :, None] * mf[:, None, :]
    cross = (both * (st.C - Mc - np.swapaxes(Mc, 2, 3) + cUc)).sum(axis=1)
    cnt = st.joint
    with np.errstate(all="ignore"):
        cov = cross / np.maximum(cnt, 1.0)
    var = np.diagonal(cov, axis1=1, axis2=2).copy()
    var = np.where(np.isfinite(var) & (var > 1e-8), var, 1.0)
    sd = np.sqrt(var)
    corr = np.clip(cov / sd[:, :, None] / sd[:, None, :], -0.99, 0.99)
    corr = np.where(cnt > 0, corr, 0.0)
    T = st.T
    corr[:, np.arange(T), np.arange(T)] = 1.0
    emin = np.linalg.eigvalsh(corr)[:, 0]
    lam = np.where(emin < 0.05, 0.95 / np.maximum(1.0 - emin, 0.95), 1.0)
    corr = lam[:, None, None] * corr + (1.0 - lam)[:, None, None] * np.eye(T)
    return corr * sd[:, :, None] * sd[:, None, :]


# ---------------------------------------------------------------------------
# the REML criterion, its gradient and the expected information
# ---------------------------------------------------------------------------
def _pattern_inverses(Sigma, masks):
    """Per pattern: log|Sigma_P| (R, P) and the embedded inverses W_P (R, P, T, T) (zeros off the pattern)."""
    R, T, _ = Sigma.shape
    logdet = np.empty((R, len(masks)))
    W = np.zeros((R, len(masks), T, T))
    for k, mask in enumerate(masks):
        idx = np.flatnonzero(mask)
        sub = Sigma[:, idx[:, None], idx[None, :]]
        Lc = np.linalg.cholesky(sub)
        logdet[:, k] = 2.0 * np.log(np.diagonal(Lc, axis1=1, axis2=2)).sum(1)
        W[:, k, idx[:, None], idx[None, :]] = np.linalg.inv(sub)
    return logdet, W


class Evaluation:
    """The REML criterion at Sigma(theta) for every replicate of ``st``: ``dev`` = -2 l_R and friends.

    All patterns at once: the sums over patterns are batched matrix products over a (replicate,
    pattern) stack, with the index pairs of a Kronecker product laid out so that each is one product.

    Staged: the criterion first, then (:meth:`add_gradient`) the gradient and (:meth:`add_information`)
    the expected information, each from the stored pieces of the stage before; :meth:`take` and
    :meth:`merge` select and assemble replicates. Every stage works replicate by replicate, so a
    replicate's numbers do not depend on which others are evaluated with it or in which stage order.
    """

    #: per-replicate arrays (leading axis: replicate) a stage may have stored
    _ROWS = ("theta", "Sigma", "J", "W", "Ainv", "B", "dev", "K", "G", "grad", "info", "Ak", "D")

    def __init__(self, theta, st: Patterns, kind: str, gradient: bool = True, information: bool = False):
        R, T, q, P = st.R, st.T, st.q, st.P
        p, TT, qq = T * q, T * T, q * q
        self.st, self.kind = st, kind
        self.theta = np.asarray(theta, float)
        self.Sigma, self.J = sigma_of(theta, kind, T, jacobian=gradient or information)
        self.logdets, W = _pattern_inverses(self.Sigma, st.masks)
        self.W = W
        n = st.n
        Uf = st.U.reshape(R, P, qq)
        # X'V^-1 X = sum_p W_p (x) U_p, X'V^-1 y = sum_p W_p M_p, y'V^-1 y = sum_p tr(W_p C_p)
        A = (W.reshape(R, P, TT).transpose(0, 2, 1) @ Uf).reshape(R, T, T, q, q)
        A = A.transpose(0, 1, 3, 2, 4).reshape(R, p, p)
        c = W.transpose(0, 2, 1, 3).reshape(R, T, P * T) @ st.M.reshape(R, P * T, q)
        yWy = (W * st.C).sum(axis=(1, 2, 3))
        La = np.linalg.cholesky(A)
        self.Ainv = np.linalg.inv(A)
        beta = (self.Ainv @ c.reshape(R, p, 1))[..., 0]
        self.B = beta.reshape(R, T, q)
        self.dev = ((n * self.logdets).sum(1) + 2.0 * np.log(np.diagonal(La, axis1=1, axis2=2)).sum(1) + yWy
                    - np.einsum("ri,ri->r", c.reshape(R, p), beta) + (st.n_obs - p) * math.log(2.0 * math.pi))
        self.A = A
        self.K = self.G = self.grad = self.info = self.Ak = self.D = None
        if gradient or information:
            self.add_gradient()
        if information:
            self.add_information()

    # -- selecting and assembling replicates ------------------------------------------------------
    def take(self, sel, st: Patterns | None = None) -> "Evaluation":
        """The replicates ``sel`` (with their Patterns ``st``, else ``self.st.take(sel)``)."""
        if _everything(sel, self.st.R) and (st is None or st is self.st):
            return self
        out = object.__new__(Evaluation)
        out.__dict__.update(self.__dict__)
        out.A = out.logdets = None                              # criterion-stage only: not carried
        for k in self._ROWS:
            v = getattr(self, k)
            if v is not None:
                setattr(out, k, v[sel])
        out.st = self.st.take(sel) if st is None else st
        return out

    @staticmethod
    def merge(parts, st: Patterns) -> "Evaluation":
        """One evaluation of the replicates of ``st`` from ``parts`` [(evaluation, its rows, their positions
        in st)] covering them all; a stage is kept only if every part has it."""
        first, sel, pos = parts[0]
        if len(parts) == 1 and _everything(sel, first.st.R) and _everything(pos, st.R):
            out = object.__new__(Evaluation)
            out.__dict__.update(first.__dict__)
            out.st = st
            return out
        out = object.__new__(Evaluation)
        out.__dict__.update(first.__dict__)
        out.st = st
        out.A = out.logdets = None                              # criterion-stage only: not carried
        for k in Evaluation._ROWS:
            vals = [getattr(e, k) for e, _, _ in parts]
            if any(v is None for v in vals):
                setattr(out, k, None)
                continue
            arr = np.empty((st.R,) + vals[0].shape[1:], vals[0].dtype)
            for v, (_, sel, pos) in zip(vals, parts):
                arr[pos] = v[sel]
            setattr(out, k, arr)
        return out

    # -- stages -------------------------------------------------------------------------------------
    def add_gradient(self) -> "Evaluation":
        """Store ``grad`` = d(-2 l_R)/dtheta (R, m) (and the pieces the information needs)."""
        if self.grad is not None:
            return self
        st, R = self.st, self.st.R
        T, q, P = st.T, st.q, st.P
        TT, qq = T * T, q * q
        if self.J is None:
            self.J = sigma_of(self.theta, self.kind, T)[1]
        W, B, n = self.W, self.B, st.n
        Uf = st.U.reshape(R, P, qq)
        # K_p = sum_i X_i A^-1 X_i' over the pattern's subjects: K_p[j, l] = sum_km Ainv[j,k,l,m] U_p[k,m]
        Ai = self.Ainv.reshape(R, T, q, T, q).transpose(0, 1, 3, 2, 4).reshape(R, TT, qq)
        K = (Ai @ Uf.transpose(0, 2, 1)).transpose(0, 2, 1).reshape(R, P, T, T)
        # residual cross-products per pattern: C - M B' - B M' + B U B'
        Bt = B.transpose(0, 2, 1)
        MB = (st.M.reshape(R, P * T, q) @ Bt).reshape(R, P, T, T)
        BU = (B @ st.U.transpose(0, 2, 1, 3).reshape(R, q, P * q)).reshape(R, T, P, q).transpose(0, 2, 1, 3)
        BUB = (BU.reshape(R, P * T, q) @ Bt).reshape(R, P, T, T)
        inner = n[..., None, None] * self.Sigma[:, None] - (st.C - MB - MB.transpose(0, 1, 3, 2) + BUB) - K
        G = (W @ inner @ W).sum(axis=1)
        self.K = K
        self.G = G                                              # d(-2 l_R) = tr(G dSigma)
        self.grad = (self.J.reshape(R, -1, TT) @ G.reshape(R, TT, 1))[..., 0]   # d(-2 l_R)/dtheta
        return self

    def add_information(self) -> "Evaluation":
        """Store ``info``, the expected information of l_R in theta (R, m, m), with ``Ak`` and ``D``."""
        if self.info is not None:
            return self
        self.add_gradient()
        st, R = self.st, self.st.R
        T, q, P = st.T, st.q, st.P
        p, TT, qq = T * q, T * T, q * q
        W, K, n = self.W, self.K, st.n
        Uf = st.U.reshape(R, P, qq)
        # expected information in the free elements sigma_ab (a >= b) of Sigma, then D' I D with
        # D = dsigma/dtheta; S_ab = E_ab + E_ba (E_aa on the diagonal). W and X are symmetric.
        a_, b_ = np.tril_indices(T)
        half = np.where(a_ == b_, 0.5, 1.0)
        n_s = a_.size
        X = n[..., None, None] * W - 2.0 * W @ K @ W
        # tr(X S_ab W S_cd) from Q[i, l, j, k] = sum_p X_p[l, i] W_p[j, k], symmetrised in (i, j) and
        # in (k, l): Q(a, b, c, d) + Q(b, a, c, d) + (Q(a, b, d, c) + Q(b, a, d, c)), read off at the pairs
        Q = (X.reshape(R, P, TT).transpose(0, 2, 1) @ W.reshape(R, P, TT)).reshape(R, T**4)
        i_, j_ = a_[:, None], b_[:, None]
        k_, l_ = a_[None, :], b_[None, :]

        def at(i, j, k, l):                                     # noqa: E741 - Q[i, j, k, l] in [i, l, j, k] storage
            return np.take(Q, (((i * T + l) * T + j) * T + k).ravel(), axis=1).reshape(R, n_s, n_s)

        info = (((at(i_, j_, k_, l_) + at(j_, i_, k_, l_)) + (at(i_, j_, l_, k_) + at(j_, i_, l_, k_)))
                * half[:, None] * half[None, :])
        # A_ab = X' V^-1 S_ab V^-1 X = sum_p (W_p S_ab W_p) (x) U_p, from sum_p W_p[i,x] W_p[j,y] U_p[k,m]
        Wf = W.reshape(R, P, TT)
        WW = (Wf[..., :, None] * Wf[..., None, :]).reshape(R, P, TT * TT)
        T4 = (WW.transpose(0, 2, 1) @ Uf).reshape(R, -1)                          # [i,x,j,y,k,m]
        x_ = np.arange(T)[None, :, None, None, None]
        k2 = np.arange(q)[None, None, :, None, None]
        y_ = np.arange(T)[None, None, None, :, None]
        m_ = np.arange(q)[None, None, None, None, :]
        ia, ib = a_[:, None, None, None, None], b_[:, None, None, None, None]

        def t4(i, j):                                           # [pair, x, k, y, m]: T4[i, x, j, y, k, m]
            return np.take(T4, (((((i * T + x_) * T + j) * T + y_) * q + k2) * q + m_).ravel(), axis=1)

        Ak = (t4(ia, ib) + t4(ib, ia)).reshape(R, n_s, p, p) * half[:, None, None]
        AiAk = (self.Ainv @ Ak.transpose(0, 2, 1, 3).reshape(R, p, n_s * p)).reshape(R, p, n_s, p)
        AiAk = AiAk.transpose(0, 2, 1, 3)                       # A^-1 A_ab
        info = info + AiAk.reshape(R, n_s, p * p) @ np.swapaxes(AiAk, 2, 3).reshape(R, n_s, p * p).transpose(0, 2, 1)
        D = self.J[:, :, a_, b_].transpose(0, 2, 1)             # (R, n_sigma, m)
        self.info = 0.5 * np.swapaxes(D, 1, 2) @ info @ D       # expected information of l_R in theta
        self.Ak = Ak                                            # X' V^-1 S_ab V^-1 X
        self.D = D
        return self


def reml_deviance(Sigma, Y, u) -> np.ndarray:
    """-2 l_R (R,) at covariance ``Sigma`` (R, T, T) for outcomes ``Y`` (R, S, T) and covariates ``u`` (R, S, q)."""
    st = Patterns(Y, u)
    theta = theta_of(Sigma, "unstructured")
    return Evaluation(theta, st, "unstructured", gradient=False).dev


# ---------------------------------------------------------------------------
# fitting
# ---------------------------------------------------------------------------
def complete_data_reml(st: Patterns):
    """Replicates (R,) in which every subject is seen at every visit, and their REML Sigma (k, T, T).

    With complete data every visit has the same regressors u, so GLS is least squares visit by visit
    (Zellner 1962) and the REML estimate of an unstructured Sigma is the residual cross-product matrix
    over N - q (the multivariate linear model's unbiased estimate; Anderson 2003, ch. 8). Replicates
    whose estimate is not positive definite are left out (fitted iteratively).
    """
    full = np.flatnonzero(st.masks.all(axis=1))
    closed = np.zeros(st.R, bool)
    if full.size == 0:
        return closed, np.zeros((0, st.T, st.T))
    k = int(full[0])
    others = np.delete(np.arange(st.P), k)
    N = st.n[:, k]
    closed = (st.n[:, others] == 0).all(axis=1) & (N > st.q + st.T)
    r = np.flatnonzero(closed)
    M, U, C = st.M[r, k], st.U[r, k], st.C[r, k]
    with np.errstate(all="ignore"):
        B = np.linalg.solve(U, np.swapaxes(M, 1, 2))                          # (k, q, T): U^-1 M'
        E = C - M @ B
        E = 0.5 * (E + np.swapaxes(E, 1, 2))
        sigma = E / (N[r] - st.q)[:, None, None]
        ev = np.linalg.eigvalsh(sigma)
    pd = np.isfinite(ev).all(axis=1) & (ev[:, 0] > 1e-10 * np.maximum(ev[:, -1], 1e-300))
    closed[r[~pd]] = False
    return closed, sigma[pd]


def fisher_scoring(theta, st: Patterns, kind: str, keep: bool = False):
    """Batched Fisher scoring with step halving; returns theta (R, m), a converged flag (R,) and a broken flag (R,).

    The expected information changes slowly, so it is recomputed every :data:`REFRESH` iterations
    (chord steps in between), and for a replicate whose last step had to be shortened. A step is
    taken only if it lowers the criterion (else halved, up to 30 times). The criterion at an accepted
    full step is kept for the next iteration (not evaluated twice). With ``keep``, also returns the
    evaluation (with the gradient) at the returned theta of the replicates not broken, in order:
    the same numbers as a fresh :class:`Evaluation` there.
    """
    theta = np.array(theta, float)
    R, m = theta.shape
    done = np.zeros(R, bool)
    broken = np.zeros(R, bool)
    stale = np.ones(R, bool)                 # the stored information must be recomputed
    info = np.zeros((R, m, m))
    active = np.arange(R)
    cached = None                            # (evaluation, its rows, their positions in active)
    final = []                               # (evaluation, its rows, replicates) at the replicates' final theta
    for it in range(MAX_ITER):
        if active.size == 0:
            break
        if it < 2 or it % REFRESH == 0:
            stale[active] = True
        sub = st.take(active)
        th = theta[active]
        need = stale[active]
        ev, at, grad, ok = _score_and_information(th, sub, kind, need, info, active, cached)
        dev_all = np.full(active.size, np.nan)
        dev_all[at >= 0] = ev.dev
        stale[active[need & ok]] = False
        broken[active[~ok]] = True
        with np.errstate(all="ignore"):
            step = np.linalg.solve(info[active][ok], -0.5 * grad[ok][..., None])[..., 0]
        act, th, dev0, at = active[ok], th[ok], dev_all[ok], at[ok]
        finite = np.all(np.isfinite(step), axis=1)
        broken[act[~finite]] = True
        small = finite & (np.abs(step).max(axis=1) < STEP_TOL)
        done[act[small]] = True
        final.append((ev, at[small], act[small]))
        move = finite & ~small
        idx, th, step, dev0, at = act[move], th[move], step[move], dev0[move], at[move]
        t = np.ones(idx.size)
        accepted = np.zeros(idx.size, bool)
        sub = st.take(idx)
        full = None
        for half in range(30):
            cand = th + t[:, None] * step
            with np.errstate(all="ignore"):
                try:
                    ev_c = Evaluation(cand, sub, kind, gradient=False)
                    dev = ev_c.dev
                except np.linalg.LinAlgError:
                    ev_c = None
                    dev = np.array([_dev_or_inf(cand[[i]], sub.take([i]), kind) for i in range(idx.size)])
            good = np.isfinite(dev) & (dev <= dev0 + 1e-12 * np.abs(dev0)) & ~accepted
            theta[idx[good]] = cand[good]
            if half == 0 and ev_c is not None:
                full = (ev_c, good)
            if half > 0:
                stale[idx[good]] = True      # a shortened step: fresh information next time
            accepted |= good
            if accepted.all():
                break
            t = np.where(accepted, t, 0.5 * t)
        # no decrease along the scoring direction at any step: at the optimum up to rounding
        done[idx[~accepted]] = True
        final.append((ev, at[~accepted], idx[~accepted]))
        active = idx[accepted]
        cached = None if full is None else (full[0], np.flatnonzero(full[1]), np.flatnonzero(full[1][accepted]))
    if not keep:
        return theta, done & ~broken, broken
    rows = np.flatnonzero(~broken)
    pos = np.full(R, -1)
    pos[rows] = np.arange(rows.size)
    parts = []
    for e, sel, r in final:
        mine = pos[r] >= 0
        if mine.any():
            parts.append((e, sel[mine], pos[r][mine]))
    left = np.ones(rows.size, bool)
    for _, _, p in parts:
        left[p] = False
    if left.any():                           # still moving at MAX_ITER: evaluate afresh
        lr = rows[left]
        with np.errstate(all="ignore"):
            parts.append((Evaluation(theta[lr], st.take(lr), kind), np.arange(lr.size), np.flatnonzero(left)))
    with np.errstate(all="ignore"):
        ev_final = Evaluation.merge(parts, st.take(rows)).add_gradient()
    return theta, done & ~broken, broken, ev_final


def _score_and_information(th, sub, kind, need, info, active, cached=None):
    """Criterion and gradient at ``th``; the information of the replicates ``need`` stored into ``info``.

    ``cached``: (evaluation, its rows, their positions) of replicates whose criterion at ``th`` is known.
    Returns the evaluation (with the gradient) of the replicates that could be evaluated, the position
    of each replicate in it (n,) (-1: not evaluated), the gradient (n, m) and which replicates could be
    evaluated (n,).
    """
    n = th.shape[0]
    ok = np.ones(n, bool)
    grad = np.full(th.shape, np.nan)
    parts = []
    fresh = np.ones(n, bool)
    if cached is not None:
        parts.append(cached)
        fresh[cached[2]] = False
    rest = np.flatnonzero(fresh)
    with np.errstate(all="ignore"):
        if rest.size:
            try:
                parts.append((Evaluation(th[rest], sub.take(rest), kind, gradient=False), np.arange(rest.size), rest))
            except np.linalg.LinAlgError:        # some replicate broke: one by one
                for i in rest:
                    try:
                        parts.append((Evaluation(th[[i]], sub.take([i]), kind, gradient=False), np.array([0]),
                                      np.array([i])))
                    except np.linalg.LinAlgError:
                        ok[i] = False
        good = np.flatnonzero(ok)
        at = np.full(n, -1)
        at[good] = np.arange(good.size)
        ev = Evaluation.merge([(e, s, at[p]) for e, s, p in parts], sub.take(good)).add_gradient()
        grad[good] = ev.grad
        rows = np.flatnonzero(need[good])
        if rows.size:
            info[active[good[rows]]] = ev.take(rows).add_information().info
    ok[good] &= np.isfinite(ev.dev) & np.all(np.isfinite(ev.grad), axis=1)
    with np.errstate(all="ignore"):
        ok &= np.all(np.isfinite(info[active]), axis=(1, 2))
    return ev, at, grad, ok


def _dev_or_inf(theta, st, kind):
    try:
        return float(Evaluation(theta, st, kind, gradient=False).dev[0])
    except np.linalg.LinAlgError:
        return math.inf


def _at_optimum(theta, st, kind, ev=None):
    """Evaluation with the information at theta, the Newton decrement (R,) and the singular flag (R,).

    ``ev``: the evaluation at theta if already made (its information is added).
    """
    with np.errstate(all="ignore"):
        ev = Evaluation(theta, st, kind, information=True) if ev is None else ev.add_information()
        s = -0.5 * ev.grad
        try:
            dec = np.einsum("ri,ri->r", s, np.linalg.solve(ev.info, s[..., None])[..., 0])
        except np.linalg.LinAlgError:
            dec = np.full(st.R, np.inf)
        sd = np.sqrt(np.diagonal(ev.Sigma, axis1=1, axis2=2))
        corr = ev.Sigma / sd[:, :, None] / sd[:, None, :]
        emin = np.linalg.eigvalsh(corr)[:, 0]
    singular = ~(emin > SINGULAR_TOL)
    return ev, dec, singular


def contrast_vector(T: int, q: int, contrast: str) -> np.ndarray:
    """L (T q,): the final-visit treatment difference, or its average over the T visits."""
    L = np.zeros((T, q))
    if contrast == "final":
        L[-1, 1] = 1.0
    else:
        L[:, 1] = 1.0 / T
    return L.reshape(-1)


def inference(ev: Evaluation, st: Patterns, L, df_method: str):
    """Estimate, variance and df of L'beta (scaled units) from an evaluation with the information."""
    est = ev.B.reshape(st.R, -1) @ L
    AiL = ev.Ainv @ L
    var = AiL @ L
    if df_method == "between_within":
        df = st.n_subjects - st.q
    else:
        g = np.einsum("ri,rkij,rj->rk", AiL, ev.Ak, AiL)      # d var / d sigma_ab
        g = (np.swapaxes(ev.D, 1, 2) @ g[..., None])[..., 0]   # d var / d theta_k
        with np.errstate(all="ignore"):
            try:
                Ig = np.linalg.solve(ev.info, g[..., None])[..., 0]
            except np.linalg.LinAlgError:
                Ig = np.full(g.shape, np.nan)
            df = 2.0 * var**2 / np.einsum("rk,rk->r", g, Ig)
    return est, var, df


# ---------------------------------------------------------------------------
# the analysis
# ---------------------------------------------------------------------------
class MMRM(Analysis):
    """Mixed model for repeated measures (REML; unstructured covariance by default), arm 1 vs 0.

    H0: no treatment difference at the final visit (``contrast = "final"``)
    or averaged over the visits (``"average"``).

    Parameters
    ----------
    covariance : {"unstructured", "toeplitz", "ar1", "cs"}
        Residual covariance over the visits (see the module notes).
    contrast : {"final", "average"}
    df_method : {"satterthwaite", "between_within"}
    baseline : bool
        Adjust for the ``baseline`` column by visit; the first visit (the
        baseline measurement, as ``repeated_measures`` with ``baseline = true``
        draws it) is then not an outcome. Default False: every visit is an
        outcome, no covariate.
    alternative : {"two-sided", "greater", "less"}
        "greater": treatment above control.
    ci_level : float in (0, 1)

    Notes
    -----
    The data are a long table with ``y`` (NaN = missing), ``arm`` (0/1),
    ``visit`` and ``subject`` (and ``baseline`` with ``baseline = true``).
    The batch path takes the ``longitudinal`` layout without padding, with
    arm, visit and subject shared by the replicates (as ``repeated_measures``
    draws them); anything else is fitted replicate by replicate.

    Examples
    --------
    With complete data and an unstructured covariance, the final-visit contrast is the pooled
    two-sample t-test at that visit (same estimate, t and df):

    >>> import numpy as np
    >>> from scipy import stats
    >>> import simpower as sp
    >>> from simpower.analyses.mmrm import MMRM
    >>> data = sp.RepeatedMeasures(n=20, visits=3, rho=0.5, effect=0.8).draw_batch(np.random.default_rng(1), 1).replicate(0)
    >>> res = MMRM()(data)
    >>> last = data["visit"] == 2
    >>> t = stats.ttest_ind(data["y"][last & (data["arm"] == 1)], data["y"][last & (data["arm"] == 0)])
    >>> bool(np.isclose(res.statistic, t.statistic, rtol=1e-6)), round(res.df, 9)
    (True, 38.0)
    """

    name = "mmrm"
    null_hypothesis = "no treatment difference at the final visit (or averaged over visits)"
    params = {"covariance": Choice(COVARIANCES), "contrast": Choice(CONTRASTS), "df_method": Choice(DF_METHODS),
              "baseline": Bool(), "alternative": ALTERNATIVE, "ci_level": CI_LEVEL}
    defaults = {"covariance": "unstructured", "contrast": "final", "df_method": "satterthwaite",
                "baseline": False, "alternative": "two-sided", "ci_level": 0.95}
    layouts = ("longitudinal",)

    @property
    def estimand_label(self):
        """None (the process's final-visit difference) for the final contrast; else the visit average."""
        return None if self.contrast == "final" else "treatment difference averaged over visits"

    # -- shared steps --------------------------------------------------------
    def _cube(self, index, sub_arm, y, baseline_col):
        Y = _gather(y, index)
        b = None
        if self.baseline:
            b = subject_baseline(_gather(baseline_col, index))
            Y = Y[:, :, 1:]
            if Y.shape[2] < 1:
                raise ValueError("mmrm: `baseline = true` needs visits after the first")
        if Y.shape[2] < 2 and self.covariance != "unstructured":
            raise ValueError(f"mmrm: covariance = {self.covariance!r} needs at least two visits")
        return standardise(Y, sub_arm, b)

    def _fields(self, est, se, df):
        with np.errstate(all="ignore"):
            t = est / se
            p = p_from_t(t, df, self.alternative)
            from scipy import stats

            crit = stats.t.ppf(0.5 + self.ci_level / 2, df)
        return {"pvalue": p, "estimate": est, "se": se, "ci_low": est - crit * se, "ci_high": est + crit * se,
                "statistic": t, "df": df}

    # -- per replicate: scipy's BFGS on the same criterion ---------------------
    def __call__(self, data) -> TestResult:
        from scipy import optimize

        for col in ("y", "arm", "visit", "subject") + (("baseline",) if self.baseline else ()):
            if col not in data:
                raise ValueError(f"mmrm needs a {col!r} column")
        index, sub_arm, _ = design_index(data["arm"], data["visit"], data["subject"])
        Y, u, scale = self._cube(index, sub_arm, np.asarray(data["y"], float),
                                 data["baseline"] if self.baseline else None)
        st = Patterns(Y, u)
        bad, reasons = design_problems(st, self.covariance)
        if bad[0]:
            raise ValueError(reasons[0])
        kind = self.covariance
        theta0 = theta_of(start_sigma(st), kind)
        T = st.T

        def f(th):
            try:
                with np.errstate(all="ignore"):
                    ev = Evaluation(th[None, :], st, kind)
            except np.linalg.LinAlgError:
                return math.inf, np.zeros_like(th)
            if not np.isfinite(ev.dev[0]):
                return math.inf, np.zeros_like(th)
            return float(ev.dev[0]), ev.grad[0]

        x = theta0[0]
        for _restart in range(3):                  # BFGS restarted (fresh Hessian) if it stopped short
            x = optimize.minimize(f, x, jac=True, method="BFGS", options={"gtol": 1e-7, "maxiter": 2000}).x
            theta = x[None, :]
            ev, dec, singular = _at_optimum(theta, st, kind)
            if np.isfinite(dec[0]) and dec[0] <= DECREMENT_TOL:
                break
        if not np.isfinite(dec[0]) or dec[0] > DECREMENT_TOL:
            warnings.warn(NOT_CONVERGED, ConvergenceWarning, stacklevel=2)
        elif singular[0]:
            warnings.warn(SINGULAR, ConvergenceWarning, stacklevel=2)
        L = contrast_vector(T, st.q, self.contrast)
        est, var, df = inference(ev, st, L, self.df_method)
        out = self._fields(scale * est, scale * np.sqrt(var), df)
        return TestResult(**{k: float(v[0]) for k, v in out.items()})

    # -- batch: Fisher scoring for all replicates at once ------------------------
    def _supports(self, layout):
        if layout.present is not None or layout.subject is None:
            return False
        if not all(c in layout.shared for c in ("arm", "visit", "subject")):
            return False
        if self.baseline and "baseline" not in layout:
            return False
        try:
            design_index(layout.shared["arm"], layout.shared["visit"], layout.shared["subject"])
        except ValueError:
            return False
        return True

    def batch(self, batch):
        layout = self.batch_layout(batch)
        index, sub_arm, _ = design_index(layout.shared["arm"], layout.shared["visit"], layout.shared["subject"])
        Y, u, scale = self._cube(index, sub_arm, layout.y, layout.column("baseline") if self.baseline else None)
        return fit_batch(Y, u, scale, self)


def fit_batch(Y, u, scale, analysis: MMRM) -> BatchResult:
    """The batch path on a standardised cube: fields of every replicate, trouble flagged per replicate."""
    kind = analysis.covariance
    st = Patterns(Y, u)
    R, T, q = st.R, st.T, st.q
    bad, reasons = design_problems(st, kind)
    est = np.full(R, np.nan)
    var = np.full(R, np.nan)
    df = np.full(R, np.nan)
    flag_conv = np.zeros(R, bool)
    flag_sing = np.zeros(R, bool)
    fit = np.flatnonzero(~bad)
    if fit.size:
        sub = st.take(fit)
        closed, sigma_c = complete_data_reml(sub) if kind == "unstructured" else (np.zeros(sub.R, bool), None)
        groups = []                          # (rows of sub, theta, broken, evaluation at theta or None)
        if closed.any():
            c = np.flatnonzero(closed)
            groups.append((c, theta_of(sigma_c, kind), np.zeros(c.size, bool), None))
        rest = np.flatnonzero(~closed)
        if rest.size:
            sub_r = sub.take(rest)
            theta0 = theta_of(start_sigma(sub_r), kind)
            theta, _, broken, ev = fisher_scoring(theta0, sub_r, kind, keep=True)
            groups.append((rest, theta, broken, ev))
        L = contrast_vector(T, q, analysis.contrast)
        for at, theta, broken, ev in groups:
            ok = ~broken
            if ok.any():
                sub_ok = ev.st if ev is not None else sub.take(at[ok])
                ev, dec, singular = _at_optimum(theta[ok], sub_ok, kind, ev)
                e, v, d = inference(ev, sub_ok, L, analysis.df_method)
                rows = fit[at[ok]]
                est[rows], var[rows], df[rows] = e, v, d
                not_conv = ~np.isfinite(dec) | (dec > DECREMENT_TOL)   # the per-replicate path's criterion
                flag_conv[rows] = not_conv
                flag_sing[rows] = singular & ~not_conv
            flag_conv[fit[at[broken]]] = True
    out = analysis._fields(scale * est, scale * np.sqrt(var), df)
    res = BatchResult(**{k: out[k] for k in ("pvalue", "estimate", "se", "ci_low", "ci_high")})
    if bad.any():
        res.mark("error:ValueError", bad, f"ValueError: {reasons[int(np.argmax(bad))]}")
    if flag_conv.any():
        res.mark("warning:ConvergenceWarning", flag_conv, NOT_CONVERGED)
    if flag_sing.any():
        res.mark("warning:ConvergenceWarning", flag_sing, SINGULAR)
    return res
