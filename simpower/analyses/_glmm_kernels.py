"""The GLMM's adaptive Gauss-Hermite log-likelihood, gradient and Hessian for many replicates, compiled.

:func:`aghq_cells` computes what :func:`simpower.analyses.glmm.loglik_cells` computes -- each
cluster's mode by safeguarded Newton, the quadrature around it, the gradient including the
movement of the nodes, and the observed information by Louis's identity (Laplace: the
approximation used for Newton steps) -- for every replicate and cluster of a cell table, one
cluster at a time with every node kept in registers. The numpy function forms arrays of
(nodes x replicates x clusters) for some forty element-wise passes; here there is one pass over
the nodes and no temporary arrays. Same formulas, same tolerances; only the order of the
floating-point operations differs, and the binary family's ``log(1 + e^eta)`` and variance are
taken as ``max(eta, 0) + log(1 + e^-|eta|)`` (absolute error a few 1e-16, like the numpy
path's) and ``e^-|eta| / (1 + e^-|eta|)^2`` (no cancellation where ``mu`` is near 1). A mode stops iterating as soon as it has converged, where the numpy
path iterates every cluster until all have. The two agree to rounding (tests: about 1e-12
relative), so the batch fit that uses this kernel reaches the same optimum.

Only the batch fit (:func:`simpower.analyses.glmm.fit_cells`) uses it; the per-replicate fit
keeps the numpy function, an implementation independent of this one that the batch path is
tested against. Compiled with numba (a dependency of simpower; ``cache=True`` keeps the machine
code beside this file); without numba, or with ``SIMPOWER_NO_NUMBA=1``, the batch fit uses the
numpy function (:func:`simpower.analyses.glmm.glmm_backend`).
"""

from __future__ import annotations

import math

import numpy as np

try:  # optional: the compiled kernel
    import numba
except ImportError:  # pragma: no cover - exercised where numba is not installed
    numba = None

#: True when the kernel below is compiled (numba importable)
HAVE_NUMBA = numba is not None

_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)


#: seconds the kernel's first call in a process may take before the user is told it is compiling
COMPILE_NOTICE_AFTER = 1.0
_called = []


class compile_notice:
    """Around the kernel's calls: if the first one in this process takes longer than
    :data:`COMPILE_NOTICE_AFTER` seconds (numba compiling it, before its cache exists), say so once
    on standard error."""

    def __enter__(self):
        self.timer = None
        if HAVE_NUMBA and not _called:
            import threading

            self.timer = threading.Timer(COMPILE_NOTICE_AFTER, self._say)
            self.timer.daemon = True
            self.timer.start()
        return self

    @staticmethod
    def _say():
        import sys

        sys.stderr.write("simpower: compiling the glmm kernel for this machine (first use only; 5-20 s; later "
                         "runs load it from numba's cache)...\n")
        sys.stderr.flush()

    def __exit__(self, *exc):
        if self.timer is not None:
            self.timer.cancel()
            _called.append(True)
        return False


def _jit(fn):
    """``numba.njit(cache=True)`` when numba is there, else the plain function."""
    return numba.njit(cache=True)(fn) if HAVE_NUMBA else fn


@_jit
def aghq_cells(theta, n, s, ca, m, z, logw, binomial, v0, use_v0, want, mode_steps,
               ll, grad, v, hess):  # pragma: no cover - compiled; checked against the numpy function
    """Fill ``ll`` (R,), ``grad`` (R, 3), ``v`` (R, G) and ``hess`` (R, 3, 3) for a cell table.

    ``theta`` (R, 3); ``n``, ``s``, ``ca`` (R, G, C) float: observed count, outcome total and arm
    of each cell; ``m`` (R, G): the weight of each cluster's terms (0: left out); ``z``, ``logw``: :func:`simpower.analyses.glmm.gauss_hermite`; ``binomial``:
    True for the logit link, False for the log link; ``v0`` (R, G): starting modes, used when
    ``use_v0``; ``want``: 0 the log-likelihood only, 1 also the gradient, 2 also the Hessian
    (Louis's identity with two or more nodes, the Laplace approximation with one).
    """
    R, G, C = n.shape
    Q = z.size
    a = np.empty(Q)
    vq = np.empty(Q)
    pP = np.empty(Q)
    pP1 = np.empty(Q)
    pA = np.empty(Q)
    pB = np.empty(Q)
    base = np.empty(C)
    for r in range(R):
        b0, b1, sg = theta[r, 0], theta[r, 1], theta[r, 2]
        llr = 0.0
        g0 = g1 = g2 = 0.0
        h00 = h01 = h02 = h11 = h12 = h22 = 0.0
        for g in range(G):
            S = 0.0
            N = 0.0
            for c in range(C):
                S += s[r, g, c]
                N += n[r, g, c]
                base[c] = b0 + b1 * ca[r, g, c]
            mg = m[r, g]
            if N <= 0.0 or mg == 0.0:
                v[r, g] = 0.0                             # a cluster without data adds nothing
                continue
            # -- the mode of the log integrand: safeguarded Newton (see glmm._mode) --------------
            ea = sg * S
            if binomial:
                eb = sg * (S - N)
            elif sg >= 0:
                eb = -np.inf
            else:
                eb = np.inf
            lo = min(ea, eb)
            hi = max(ea, eb)
            x = v0[r, g] if use_v0 else 0.0
            x = min(max(x, lo), hi)
            if not np.isfinite(x):
                x = ea
            for _ in range(mode_steps):
                f = 0.0
                d = 0.0
                for c in range(C):
                    nc = n[r, g, c]
                    if nc == 0.0:
                        continue
                    eta = base[c] + sg * x
                    if binomial:
                        t = math.exp(-abs(eta))
                        u = 1.0 / (1.0 + t)
                        mu = u if eta >= 0.0 else t * u
                        w = t * u * u
                    else:
                        mu = math.exp(eta)
                        w = mu
                    f += s[r, g, c] - nc * mu
                    d += nc * w
                f = sg * f - x
                d = 1.0 + sg * sg * d
                if f > 0:
                    lo = x
                elif f < 0:
                    hi = x
                new = x + f / d
                mid = 0.5 * (lo + hi)
                slack = 1e-9 * (1.0 + abs(x))
                if new > lo - slack and new < hi + slack:
                    new = min(max(new, lo), hi)
                elif np.isfinite(mid):
                    new = mid
                done = abs(new - x) <= 1e-13 * (1.0 + abs(x))
                x = new
                if done or not np.isfinite(x):
                    break
            v[r, g] = x
            # -- curvature at the mode and the node movement's ingredients -----------------------
            r0 = 0.0
            wsum = 0.0
            w1 = 0.0
            wp = 0.0
            wp1 = 0.0
            for c in range(C):
                nc = n[r, g, c]
                if nc == 0.0:
                    continue
                eta = base[c] + sg * x
                if binomial:
                    t = math.exp(-abs(eta))
                    u = 1.0 / (1.0 + t)
                    mu = u if eta >= 0.0 else t * u
                    nw = nc * (t * u * u)
                    w3 = nw * (1.0 - 2.0 * mu)
                else:
                    mu = math.exp(eta)
                    nw = nc * mu
                    w3 = nw
                r0 += s[r, g, c] - nc * mu
                wsum += nw
                w1 += nw * ca[r, g, c]
                wp += w3
                wp1 += w3 * ca[r, g, c]
            h = 1.0 + sg * sg * wsum
            sc = math.sqrt(2.0 / h)
            # -- the nodes ---------------------------------------------------------------------
            top = -np.inf
            for k in range(Q):
                xv = x + sc * z[k]
                sv = sg * xv
                ak = 0.0
                P = 0.0
                P1 = 0.0
                A = 0.0
                B = 0.0
                for c in range(C):
                    nc = n[r, g, c]
                    if nc == 0.0:
                        continue
                    eta = base[c] + sv
                    if binomial:
                        t = math.exp(-abs(eta))
                        u = 1.0 / (1.0 + t)
                        mu = u if eta >= 0.0 else t * u
                        psi = max(eta, 0.0) + math.log(1.0 + t)    # log1p: 3 times slower, same absolute error
                        w = t * u * u
                    else:
                        mu = math.exp(eta)
                        psi = mu
                        w = mu
                    sc_ = s[r, g, c]
                    ak += sc_ * eta - nc * psi
                    res = sc_ - nc * mu
                    cc = ca[r, g, c]
                    P += res
                    P1 += cc * res
                    A += nc * w
                    B += cc * nc * w
                ak += logw[k] - 0.5 * xv * xv - _HALF_LOG_2PI
                a[k] = ak
                vq[k] = xv
                pP[k] = P
                pP1[k] = P1
                pA[k] = A
                pB[k] = B
                if ak > top:
                    top = ak
            tot = 0.0
            for k in range(Q):
                a[k] = math.exp(a[k] - top)
                tot += a[k]
            llr += mg * (math.log(sc) + math.log(tot) + top)
            if want == 0:
                continue
            m0 = m1 = m2 = e_gv = e_gvz = 0.0
            inv = 1.0 / tot
            for k in range(Q):
                p = a[k] * inv
                a[k] = p
                P = pP[k]
                m0 += p * P
                m1 += p * pP1[k]
                m2 += p * vq[k] * P
                gv = sg * P - vq[k]
                e_gv += p * gv
                e_gvz += p * gv * z[k]
            dgv0 = -sg * wsum
            dgv1 = -sg * w1
            dgv2 = r0 - sg * x * wsum
            dv0 = dgv0 / h
            dv1 = dgv1 / h
            dv2 = dgv2 / h
            s2 = sg * sg
            g3 = -(s2 * sg) * wp
            fac = -0.5 * (sc / h)
            ds0 = fac * -(-s2 * wp + g3 * dv0)
            ds1 = fac * -(-s2 * wp1 + g3 * dv1)
            ds2 = fac * -(-2.0 * sg * wsum - s2 * x * wp + g3 * dv2)
            cz = 1.0 / sc + e_gvz
            g0 += mg * (m0 + e_gv * dv0 + cz * ds0)
            g1 += mg * (m1 + e_gv * dv1 + cz * ds1)
            g2 += mg * (m2 + e_gv * dv2 + cz * ds2)
            if want < 2:
                continue
            if Q == 1:                                    # Laplace: g_tt + g_tv g_tv' / h at the mode
                h00 += mg * (-wsum + dgv0 * dv0)
                h01 += mg * (-w1 + dgv0 * dv1)
                h02 += mg * (-x * wsum + dgv0 * dv2)
                h11 += mg * (-w1 + dgv1 * dv1)
                h12 += mg * (-x * w1 + dgv1 * dv2)
                h22 += mg * (-x * x * wsum + dgv2 * dv2)
                continue
            e00 = e01 = e02 = e11 = e12 = e22 = 0.0       # Louis: E[g_tt + g_t g_t'] - E[g_t] E[g_t]'
            for k in range(Q):
                p = a[k]
                P = pP[k]
                P1 = pP1[k]
                xv = vq[k]
                q0 = P * P - pA[k]
                q1 = P * P1 - pB[k]
                e00 += p * q0
                e01 += p * q1
                e02 += p * xv * q0
                e11 += p * (P1 * P1 - pB[k])
                e12 += p * xv * q1
                e22 += p * xv * xv * q0
            h00 += mg * (e00 - m0 * m0)
            h01 += mg * (e01 - m0 * m1)
            h02 += mg * (e02 - m0 * m2)
            h11 += mg * (e11 - m1 * m1)
            h12 += mg * (e12 - m1 * m2)
            h22 += mg * (e22 - m2 * m2)
        ll[r] = llr
        if want >= 1:
            grad[r, 0] = g0
            grad[r, 1] = g1
            grad[r, 2] = g2
        if want >= 2:
            hess[r, 0, 0] = h00
            hess[r, 0, 1] = hess[r, 1, 0] = h01
            hess[r, 0, 2] = hess[r, 2, 0] = h02
            hess[r, 1, 1] = h11
            hess[r, 1, 2] = hess[r, 2, 1] = h12
            hess[r, 2, 2] = h22
