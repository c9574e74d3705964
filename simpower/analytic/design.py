"""Sample-size bookkeeping: design effects, cluster counts, dropout, rounding up."""

from __future__ import annotations

import numpy as np

from . import _common as c
from .normal import z_n


def design_effect(cluster_size, icc, *, cv=0.0):
    """Variance inflation of a cluster design relative to individual randomisation.

    ``1 + ((cv**2 + 1) * m - 1) * icc`` for mean cluster size ``m`` and
    coefficient of variation ``cv`` of the cluster sizes (Eldridge, Ashby &
    Kerry 2006, Int J Epidemiol); ``cv = 0`` gives ``1 + (m - 1) * icc``
    (Donner & Klar 2000).

    Parameters
    ----------
    cluster_size : float or array_like
        Mean cluster size m >= 1.
    icc : float or array_like
        Intracluster correlation in [0, 1).
    cv : float or array_like
        Coefficient of variation of cluster sizes, >= 0.

    Returns
    -------
    float or ndarray

    Examples
    --------
    Clusters of 20 with ICC 0.05 almost double the sample size; unequal
    clusters (cv = 0.5) inflate it further:

    >>> from simpower.analytic import design_effect
    >>> round(design_effect(20, 0.05), 4), round(design_effect(20, 0.05, cv=0.5), 4)
    (1.95, 2.2)
    """
    scalar = c.is_scalar(cluster_size, icc, cv)
    m = c.real("cluster_size", cluster_size, 1.0)
    rho = c.real("icc", icc, 0.0, 1.0, high_open=True)
    v = c.real("cv", cv, 0.0)
    return c.finish(1.0 + ((v**2 + 1.0) * m - 1.0) * rho, scalar)


def inflate_for_dropout(n, rate):
    """Sample size to recruit so that ``n`` remain after losing a fraction ``rate``.

    Parameters
    ----------
    n : float or array_like
        Sample size needed at analysis (> 0).
    rate : float or array_like
        Expected dropout fraction in [0, 1).

    Returns
    -------
    float or ndarray
        ``n / (1 - rate)``; round up with :func:`ceil_n`.

    Examples
    --------
    64 analysable per arm with 20% dropout means recruiting 80 per arm:

    >>> from simpower.analytic import inflate_for_dropout
    >>> inflate_for_dropout(64, 0.2)
    80.0
    """
    scalar = c.is_scalar(n, rate)
    m = c.real("n", n, 0.0, low_open=True)
    q = c.real("rate", rate, 0.0, 1.0, high_open=True)
    return c.finish(m / (1.0 - q), scalar)


def clusters_per_arm(effect, power, cluster_size, icc, *, cv=0.0, sd=1.0, alpha=0.05,
                     alternative="two-sided", ratio=1.0):
    """Clusters needed in the control arm of a cluster-randomised two-arm trial.

    The normal-approximation formula of Donner & Klar (2000): the individually
    randomised z-test size (:func:`z_n`, two-sample) times the design effect
    (:func:`design_effect`, with ``cv`` as in Eldridge et al. 2006), divided by
    the mean cluster size. It ignores the small number of clusters (no t
    correction), so with few clusters it is optimistic; the simulation engine
    is the check on it.

    Parameters
    ----------
    effect : float or array_like
        Treatment minus control mean, in outcome units.
    power : float or array_like
        Target power in (alpha, 1).
    cluster_size, icc, cv
        As in :func:`design_effect`.
    sd : float or array_like
        Total SD of an individual outcome (between + within clusters).
    alpha, alternative
        As in :func:`z_n`.
    ratio : float or array_like
        Treatment clusters over control clusters.

    Returns
    -------
    float or ndarray
        Continuous number of control-arm clusters (the treatment arm needs
        ``ratio`` times it); round up with :func:`ceil_n`.

    Examples
    --------
    d = 0.3, clusters of 20, ICC 0.05, two-sided 5%, power 0.8: 174.4
    individuals per arm, times 1.95, over 20 gives 17.01, i.e. 18 clusters per arm:

    >>> from simpower.analytic import clusters_per_arm, ceil_n
    >>> k = clusters_per_arm(0.3, 0.8, 20, 0.05)
    >>> round(k, 2), ceil_n(k)
    (17.01, 18)
    """
    scalar = c.is_scalar(effect, power, cluster_size, icc, cv, sd, alpha, ratio)
    deff = design_effect(cluster_size, icc, cv=cv)
    n_ind = z_n(effect, power, sd=sd, alpha=alpha, alternative=alternative, design="two-sample", ratio=ratio)
    return c.finish(np.asarray(n_ind) * deff / np.asarray(cluster_size, dtype=float), scalar)


def ceil_n(x):
    """Round a continuous sample size up to an integer, ignoring floating noise.

    ``ceil(x - tol)`` with ``tol = 1e-9 * max(1, |x|)``, so 64.0000000001
    (a solver's 64) gives 64 while 63.5 gives 64 and 64.001 gives 65.

    Parameters
    ----------
    x : float or array_like
        Non-negative, finite.

    Returns
    -------
    int or ndarray of int

    Examples
    --------
    >>> from simpower.analytic import ceil_n
    >>> ceil_n(64.0000000001), ceil_n(393.41)
    (64, 394)
    """
    scalar = c.is_scalar(x)
    v = c.real("x", x, 0.0)
    out = np.ceil(v - 1e-9 * np.maximum(1.0, np.abs(v))).astype(np.int64)
    out = np.maximum(out, 0)
    return int(out) if scalar else out
