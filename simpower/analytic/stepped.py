"""Stepped-wedge and other multi-period cluster designs: variance of the treatment effect and power.

A design is a *sequence matrix* ``X`` (clusters x periods): 1 where the cluster
is treated in that period, 0 where it is a control, NaN where the cell is not
measured (e.g. an implementation period). Outcomes follow the linear mixed model

    y_ikt = mu_t + theta X_kt + C_kt + S_ik + e_ikt,

with period fixed effects ``mu_t``, cluster-period random effects ``C_kt``
(variance ``icc * sd^2``), persistent individual effects ``S_ik`` (cohorts only,
variance ``individual_autocorr * (1 - icc) * sd^2``) and residuals ``e_ikt``, so
that ``sd`` is the total SD of an outcome, ``icc`` the correlation of two
different individuals' outcomes in the same cluster and period, and
``individual_autocorr`` the correlation of one individual's non-cluster parts
over time. The correlation of ``C_kt`` and ``C_ks`` (the cluster autocorrelation,
``cac``) is

* ``"exchangeable"``: 1 (a random cluster intercept; Hussey & Hughes 2007);
* ``"nested"``: ``cac`` for every s != t (cluster plus cluster-period random
  effects; Hooper, Teerenstra, de Hoop & Eldridge 2016, Stat Med 35:4718;
  Girling & Hemming 2016, Stat Med 35:2149);
* ``"exponential"``: ``cac ** |t - s|`` (discrete-time decay; Kasza, Hemming,
  Hooper, Matthews & Forbes 2019, Stat Methods Med Res 28:703).

With ``m`` individuals in each measured cell, the cell means are sufficient for
the fixed effects (the within-cell contrasts are independent of them and carry
no fixed effect), so :func:`gls_variance` works on the cell means: per cluster

    Cov(ybar_k) = sd^2 [icc R + (1 - icc) / m ((1 - pi) I + pi J)],

``R`` the correlation matrix of ``C_k``, ``pi`` the individual autocorrelation
(0 for cross-sectional sampling), and ``Var(theta_hat) = [(sum_k X_k' V_k^-1 X_k)^-1]_theta``.
Power of the Wald test: ``Phi(|theta| / se - z_{1 - alpha/2})`` (Hussey & Hughes
2007, eq. 9), or with ``df`` the noncentral t (both tails for two-sided).

Equation numbers of the cited papers are given from memory; the formulas themselves are
checked in tests/test_stepped.py (Hussey & Hughes against the GLS variance to 1e-10,
Woertman's design effect against Hussey & Hughes exactly, the GLS on cell means against
statsmodels GLS on individual rows).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from ..errors import ParameterError

STRUCTURES = ("exchangeable", "nested", "exponential")
SAMPLINGS = ("cross_sectional", "cohort")


# -- designs ------------------------------------------------------------------------------------
def standard_design(steps: int, clusters_per_step: int = 1, baseline_periods: int = 1,
                    periods_per_step: int = 1) -> np.ndarray:
    """The standard stepped wedge: ``steps`` groups of clusters cross over one step apart.

    ``baseline_periods`` control periods for every cluster, then each step adds
    ``periods_per_step`` periods after which one more group is treated; so there
    are ``baseline_periods + steps * periods_per_step`` periods and group g
    (1..steps) is treated from period ``baseline_periods + (g - 1) * periods_per_step`` on
    (Woertman et al. 2013's b, k, t). Rows: ``clusters_per_step`` clusters per group.
    """
    for name, v, low in (("steps", steps, 1), ("clusters_per_step", clusters_per_step, 1),
                         ("baseline_periods", baseline_periods, 0), ("periods_per_step", periods_per_step, 1)):
        if int(v) != v or v < low:
            raise ParameterError(f"`{name}` must be a whole number >= {low}; got {v!r}.")
    periods = baseline_periods + steps * periods_per_step
    start = baseline_periods + periods_per_step * np.arange(steps)
    seq = (np.arange(periods)[None, :] >= start[:, None]).astype(float)
    return np.repeat(seq, clusters_per_step, axis=0)


def as_design(design) -> np.ndarray:
    """A sequence matrix as a float array (clusters, periods): 0/1, NaN where not measured.

    Accepts nested lists with None or "-" (or "." ) for a cell not measured.
    """
    rows = [[np.nan if (v is None or (isinstance(v, str) and v.strip() in ("-", ".", ""))) else v for v in row]
            for row in design] if not isinstance(design, np.ndarray) else design
    try:
        x = np.array(rows, dtype=float)
    except (TypeError, ValueError):
        raise ParameterError("`sequences` must be a list of equal-length rows of 0, 1 or '-' (not measured); "
                             f"got {design!r}.") from None
    if x.ndim != 2 or x.shape[0] < 1 or x.shape[1] < 1:
        raise ParameterError("`sequences` must be a list of equal-length rows of 0, 1 or '-' (not measured); "
                             f"got {design!r}.")
    ok = np.isnan(x) | (x == 0) | (x == 1)
    if not ok.all():
        raise ParameterError(f"`sequences` cells must be 0, 1 or '-' (not measured); got {x[~ok][0]:g}.")
    return x


# -- variances ------------------------------------------------------------------------------------
def _check(icc, cac, structure, sampling, individual_autocorr, sd):
    if structure not in STRUCTURES:
        raise ParameterError(f"`structure` must be one of {', '.join(STRUCTURES)}; got {structure!r}.")
    if sampling not in SAMPLINGS:
        raise ParameterError(f"`sampling` must be one of {', '.join(SAMPLINGS)}; got {sampling!r}.")
    if not 0 <= icc < 1:
        raise ParameterError(f"`icc` must be in [0, 1); got {icc!r}.")
    if not 0 <= cac <= 1:
        raise ParameterError(f"`cac` must be in [0, 1]; got {cac!r}.")
    if not 0 <= individual_autocorr < 1:
        raise ParameterError(f"`individual_autocorr` must be in [0, 1); got {individual_autocorr!r}.")
    if not sd > 0:
        raise ParameterError(f"`sd` must be > 0; got {sd!r}.")


def cluster_correlation(periods: int, cac: float = 1.0, structure: str = "exchangeable") -> np.ndarray:
    """Correlation matrix (periods x periods) of one cluster's cluster-period effects ``C_kt``."""
    lag = np.abs(np.subtract.outer(np.arange(periods), np.arange(periods)))
    if structure == "exchangeable":
        return np.ones((periods, periods))
    if structure == "nested":
        return np.where(lag == 0, 1.0, cac)
    return np.power(float(cac), lag)


def cell_mean_covariance(periods: int, m, icc: float, cac: float = 1.0, structure: str = "exchangeable",
                         sampling: str = "cross_sectional", individual_autocorr: float = 0.0,
                         sd: float = 1.0) -> np.ndarray:
    """Covariance (periods x periods) of one cluster's cell means with ``m`` individuals per cell.

    ``m`` may be a vector over periods (cross-sectional sampling only; a cohort
    has the same ``m`` members in every period).
    """
    _check(icc, cac, structure, sampling, individual_autocorr, sd)
    m = np.broadcast_to(np.asarray(m, float), (periods,))
    s2 = sd * sd
    cov = icc * s2 * cluster_correlation(periods, cac, structure)
    if sampling == "cross_sectional":
        return cov + np.diag((1.0 - icc) * s2 / m)
    if np.ptp(m) != 0:
        raise ParameterError("`m` must be the same in every period of a cohort (its members are followed up).")
    pi = individual_autocorr
    return cov + (1.0 - icc) * s2 / m[0] * ((1.0 - pi) * np.eye(periods) + pi * np.ones((periods, periods)))


def gls_information(design, m, icc: float, cac: float = 1.0, structure: str = "exchangeable",
                    sampling: str = "cross_sectional", individual_autocorr: float = 0.0,
                    sd: float = 1.0) -> np.ndarray:
    """``X' V^-1 X`` of the period effects and theta (last), summed over clusters."""
    x = as_design(design)
    n_clusters, periods = x.shape
    mm = np.broadcast_to(np.asarray(m, float), x.shape)
    if np.any(mm[np.isfinite(x)] <= 0):
        raise ParameterError("`m` must be > 0 in every measured cell.")
    info = np.zeros((periods + 1, periods + 1))
    for k in range(n_clusters):
        seen = np.isfinite(x[k])
        t = np.flatnonzero(seen)
        if t.size == 0:
            continue
        full = cell_mean_covariance(periods, np.where(seen, mm[k], mm[k, t[0]]), icc, cac, structure, sampling,
                                    individual_autocorr, sd)
        v = full[np.ix_(t, t)]
        design_k = np.zeros((t.size, periods + 1))
        design_k[np.arange(t.size), t] = 1.0
        design_k[:, -1] = x[k, t]
        info += design_k.T @ np.linalg.solve(v, design_k)
    return info


def gls_variance(design, m, icc: float, cac: float = 1.0, structure: str = "exchangeable",
                 sampling: str = "cross_sectional", individual_autocorr: float = 0.0, sd: float = 1.0) -> float:
    """GLS variance of the treatment effect, ``[(X' V^-1 X)^-1]_theta``, for any sequence matrix.

    Parameters
    ----------
    design : sequence matrix (clusters x periods) of 0/1, NaN/None/"-" where a cell is not measured
    m : number or array like ``design``
        Individuals measured per cell (a cohort: per cluster, the same in every period).
    icc, cac, structure, sampling, individual_autocorr, sd
        As in the module notes. ``cac`` is ignored for ``"exchangeable"``.

    Raises
    ------
    ParameterError
        When theta is not estimable (e.g. no cluster is ever compared before and after).
    """
    info = gls_information(design, m, icc, cac, structure, sampling, individual_autocorr, sd)
    keep = np.flatnonzero(np.diag(info) > 0)  # periods nobody is measured in drop out
    sub = info[np.ix_(keep, keep)]
    if np.linalg.matrix_rank(sub) < keep.size:
        raise ParameterError("`sequences`: the treatment effect is not estimable in this design (it is "
                             "confounded with the period effects); add control and treated cells in the same periods.")
    return float(np.linalg.inv(sub)[-1, -1])


def hussey_hughes_variance(design, m: int, icc: float, sd: float = 1.0) -> float:
    """Hussey & Hughes (2007, eq. 8) variance of theta for a complete cross-sectional design.

    ``Var = I s2 (s2 + T tau2) / ((I U - W) s2 + (U^2 + I T U - T W - I V) tau2)`` with
    ``s2 = (1 - icc) sd^2 / m`` (a cell mean's residual variance), ``tau2 = icc sd^2``
    (the random cluster intercept), I clusters, T periods, ``U = sum X``,
    ``W = sum_t (sum_k X_kt)^2``, ``V = sum_k (sum_t X_kt)^2``.
    """
    x = as_design(design)
    if np.isnan(x).any():
        raise ParameterError("hussey_hughes_variance needs every cell measured; use gls_variance for "
                             "incomplete designs.")
    _check(icc, 1.0, "exchangeable", "cross_sectional", 0.0, sd)
    n_clusters, periods = x.shape
    s2 = (1.0 - icc) * sd * sd / m
    tau2 = icc * sd * sd
    u = x.sum()
    w = (x.sum(axis=0) ** 2).sum()
    v = (x.sum(axis=1) ** 2).sum()
    num = n_clusters * s2 * (s2 + periods * tau2)
    den = (n_clusters * u - w) * s2 + (u * u + n_clusters * periods * u - periods * w - n_clusters * v) * tau2
    if den <= 0:
        raise ParameterError("`sequences`: the treatment effect is not estimable in this design.")
    return float(num / den)


def stepped_power(effect: float, variance: float, alpha: float = 0.05, alternative: str = "two-sided",
                  df: float | None = None) -> float:
    """Power of the Wald test of theta = 0 with ``Var(theta_hat) = variance``.

    ``df=None``: normal reference, ``Phi(|theta|/se - z_{1-alpha/2})`` plus the far tail
    (Hussey & Hughes 2007, eq. 9, which omits the far tail); else a t reference with
    ``df`` degrees of freedom and the statistic noncentral t with noncentrality
    ``theta / se`` (both tails for two-sided).
    """
    if not 0 < alpha < 1:
        raise ParameterError(f"`alpha` must be in (0, 1); got {alpha!r}.")
    if alternative not in ("two-sided", "greater", "less"):
        raise ParameterError(f"`alternative` must be two-sided, greater or less; got {alternative!r}.")
    delta = effect / math.sqrt(variance)
    if df is None:
        if alternative == "two-sided":
            z = stats.norm.ppf(1 - alpha / 2)
            return float(stats.norm.cdf(delta - z) + stats.norm.cdf(-delta - z))
        z = stats.norm.ppf(1 - alpha)
        return float(stats.norm.cdf(delta - z) if alternative == "greater" else stats.norm.cdf(-delta - z))
    if not df > 0:
        raise ParameterError(f"`df` must be > 0; got {df!r}.")
    if alternative == "two-sided":
        c = stats.t.ppf(1 - alpha / 2, df)
        return float(stats.nct.sf(c, df, delta) + stats.nct.cdf(-c, df, delta))
    c = stats.t.ppf(1 - alpha, df)
    return float(stats.nct.sf(c, df, delta) if alternative == "greater" else stats.nct.cdf(-c, df, delta))


def woertman_design_effect(steps: int, baseline_periods: int, periods_per_step: int, m: int, icc: float) -> float:
    """Woertman et al. (2013, J Clin Epidemiol 66:752, eq. 1) design effect of the standard stepped wedge.

    ``DE = (1 + icc (k t m + b m - 1)) / (1 + icc (k t m / 2 + b m - 1)) * 3 (1 - icc) / (2 t (k - 1/k))``
    with k steps, b baseline periods, t periods per step, m individuals per cell.
    Exact relation to Hussey & Hughes (2007) for the standard design with I clusters
    (any number per step) and total SD ``sd``:
    ``DE = I m Var_HH / (4 sd^2)``, i.e. ``N_sw = I m = DE * N_u`` where
    ``N_u = 4 sd^2 / Var_HH`` is the total size of an individually randomised
    two-arm trial with the same variance (so ``N_sw / m`` clusters).
    """
    k, b, t = steps, baseline_periods, periods_per_step
    return float((1 + icc * (k * t * m + b * m - 1)) / (1 + icc * (0.5 * k * t * m + b * m - 1))
                 * 3 * (1 - icc) / (2 * t * (k - 1 / k)))
