"""Noncentral t CDF that never returns NaN.

:func:`scipy.special.nctdtr` (scipy 1.17, Boost) returns NaN in parts of the
far tails, e.g. ``nctdtr(3, 8, -3.18)``: exactly the "wrong-side" rejection
tail of a two-sided t-test with a large effect. Those entries are filled here:

* ``x <= 0 < nc``: ``P(T <= x) <= Phi(-nc)`` (T <= x <= 0 needs Z + nc < 0), so
  when that bound is below 1e-17 the value is taken as 0;
* mirrored for ``x >= 0 > nc`` (value taken as 1);
* otherwise by numerical integration over the chi-square variable,
  ``P(T <= x) = E[Phi(x * sqrt(V / df) - nc)]`` with ``V ~ chi2(df)``.
"""

from __future__ import annotations

import numpy as np
from scipy import integrate, special

_NEGLIGIBLE = 1e-17


def _by_quadrature(df: float, nc: float, x: float) -> float:
    """P(T <= x) for T ~ t'(df, nc), integrating over u = log(V)."""
    half = df / 2.0
    log_norm = half * np.log(2.0) + special.gammaln(half)

    def integrand(u):
        v = np.exp(u)
        return np.exp(half * u - v / 2.0 - log_norm) * special.ndtr(x * np.sqrt(v / df) - nc)

    centre = np.log(df)
    lo = centre - 80.0 / df - 12.0 * np.sqrt(2.0 / df)
    hi = np.log(df + 12.0 * np.sqrt(2.0 * df) + 60.0)
    val, _ = integrate.quad(integrand, lo, hi, points=[centre], epsabs=1e-15, epsrel=1e-12, limit=200)
    return float(min(max(val, 0.0), 1.0))


def nct_cdf(df, nc, x):
    """P(T <= x) for a noncentral t with ``df`` degrees of freedom and noncentrality ``nc``.

    Broadcasts like :func:`scipy.special.nctdtr`, whose values it returns
    wherever they are finite.
    """
    out = np.asarray(special.nctdtr(df, nc, x), dtype=float)
    bad = np.isnan(out)
    if not np.any(bad):
        return out
    shape = out.shape
    d, m, t = (np.broadcast_to(np.asarray(a, float), shape).reshape(-1) for a in (df, nc, x))
    out = out.reshape(-1)  # a copy-free view of our own array
    for idx in np.flatnonzero(bad):
        dfi, nci, xi = float(d[idx]), float(m[idx]), float(t[idx])
        if xi <= 0 < nci and special.ndtr(-nci) < _NEGLIGIBLE:
            out[idx] = 0.0
        elif xi >= 0 > nci and special.ndtr(nci) < _NEGLIGIBLE:
            out[idx] = 1.0
        else:
            out[idx] = _by_quadrature(dfi, nci, xi)
    return out.reshape(shape)
