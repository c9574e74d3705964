"""Cluster sizes and the cluster layer of a design: sizes, cluster effects, rows, arms within clusters.

Variable cluster sizes are ``1 + X`` where X has mean ``cluster_size - 1`` and
variance ``(cluster_size_cv * cluster_size)^2``, so the sizes have exactly the
requested mean and coefficient of variation and at least one member:

* when that variance exceeds the mean of X, X is negative binomial (a Poisson
  count whose rate is gamma distributed);
* otherwise X is a binomial count, mixing two adjacent numbers of trials with
  the same mean so the variance is matched exactly.

A batch of replicates with variable sizes is padded to the largest replicate
and the padding marked by ``present`` (see :class:`~simpower.processes.base.Batch`).
Used by the ``clusters`` design of ``trial`` and by ``stepped_wedge``.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ParameterError


# -- cluster sizes ----------------------------------------------------------------
def size_law(mean: float, cv: float) -> tuple[str, tuple[float, ...]]:
    """The law of ``cluster size - 1`` for a mean size ``mean`` and coefficient of variation ``cv``.

    Returns
    -------
    (kind, args)
        ``("fixed", (m,))``; ``("negbin", (shape, scale))`` for X ~ Poisson(G),
        G ~ Gamma(shape, scale); ``("poisson", (mu,))``; or
        ``("binomial", (n_low, weight_low, mu))`` for X ~ Binomial(N, mu / N)
        with N = n_low with probability weight_low, else n_low + 1.

    Raises
    ------
    ParameterError
        If no integer law >= 1 has that mean and CV (``cv`` > 0 with mean 1, or
        a CV below the smallest one possible for a non-integer mean).
    """
    if cv == 0:
        return "fixed", (mean,)
    mu = mean - 1.0
    v = (cv * mean) ** 2
    if mu <= 0:
        raise ParameterError(
            f"`cluster_size_cv` must be 0 when cluster_size = {mean:g} (every cluster has at least "
            f"one member); got {cv:g}."
        )
    if math.isclose(v, mu, rel_tol=1e-12):
        return "poisson", (mu,)
    if v > mu:
        return "negbin", (mu * mu / (v - mu), (v - mu) / mu)
    n_star = mu * mu / (mu - v)  # Binomial(N, mu/N) has variance mu (1 - mu/N)
    n_low = math.floor(n_star)
    if n_low < mu:  # only reachable for a non-integer mean: N must be >= mu
        n_low = math.ceil(mu)
        v_min = mu * (1.0 - mu / n_low)
        cv_min = math.sqrt(v_min) / mean
        raise ParameterError(
            f"`cluster_size_cv` must be 0 or >= {cv_min:.4g} for a mean cluster size of {mean:g} "
            f"(sizes are whole numbers); got {cv:g}."
        )
    var_low = mu * (1.0 - mu / n_low)
    var_high = mu * (1.0 - mu / (n_low + 1))
    weight_low = (var_high - v) / (var_high - var_low)
    return "binomial", (float(n_low), min(max(weight_low, 0.0), 1.0), mu)


def draw_sizes(rng: np.random.Generator, mean: float, cv: float, shape) -> np.ndarray:
    """Cluster sizes (int64, >= 1) with mean ``mean`` and coefficient of variation ``cv``.

    See :func:`size_law` for the distribution.
    """
    kind, args = size_law(mean, cv)
    if kind == "fixed":
        return np.full(shape, int(round(args[0])), dtype=np.int64)
    if kind == "negbin":
        lam = rng.gamma(args[0], args[1], size=shape)
        x = rng.poisson(lam)
    elif kind == "poisson":
        x = rng.poisson(args[0], size=shape)
    else:
        n_low, weight_low, mu = args
        trials = np.where(rng.random(shape) < weight_low, n_low, n_low + 1.0)
        x = rng.binomial(trials.astype(np.int64), mu / trials)
    return 1 + x.astype(np.int64)


def _layout(sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Row -> cluster map of replicates with cluster sizes ``sizes`` (R, C), padded to the largest.

    Returns ``(cluster, present, start)``: cluster ids (R, N) with padding
    rows given the last cluster's id, the padding mask, and each cluster's
    first row (R, C).
    """
    reps, n_clusters = sizes.shape
    totals = sizes.sum(axis=1)
    width = int(totals.max())
    start = np.cumsum(sizes, axis=1) - sizes
    flat_cluster = np.repeat(np.tile(np.arange(n_clusters, dtype=np.int32), reps), sizes.ravel())
    flat_rep = np.repeat(np.arange(reps), totals)
    rep_start = np.cumsum(totals) - totals
    col = np.arange(flat_rep.size) - rep_start[flat_rep]
    cluster = np.full((reps, width), n_clusters - 1, dtype=np.int32)
    cluster[flat_rep, col] = flat_cluster
    present = np.arange(width)[None, :] < totals[:, None]
    return cluster, present, start


def draw_clusters(rng: np.random.Generator, n_clusters: int, mean: float, cv: float, size: int):
    """The cluster layer of a design: sizes, one standard normal per cluster, and the row layout.

    Draws, in this order, the cluster sizes (:func:`draw_sizes`) and the
    cluster effects ``u`` (standard normal, shape ``(size, n_clusters)``).
    Returns ``(sizes, u, cluster, present, start)``: with equal sizes
    ``cluster`` is shared (1-D) and ``present`` None, else both are per
    replicate (padded, see :func:`_layout`); ``start`` is each cluster's first row.
    """
    shape = (size, n_clusters)
    sizes = draw_sizes(rng, mean, cv, shape)
    u = rng.standard_normal(shape)
    if cv == 0:
        m = int(mean)
        cluster = np.repeat(np.arange(n_clusters, dtype=np.int32), m)
        return sizes, u, cluster, None, np.broadcast_to(np.arange(n_clusters) * m, shape)
    cluster, present, start = _layout(sizes)
    return sizes, u, cluster, present, start


def _within_cluster_arms(rng, sizes, cluster, present, start) -> np.ndarray:
    """Randomise half of each cluster to arm 1 (the odd member by a fair coin), rows as in ``cluster``."""
    reps, width = cluster.shape
    keys = rng.random((reps, width))
    coin = rng.random(sizes.shape) < 0.5
    n_treat = sizes // 2 + (sizes % 2) * coin
    order = np.argsort(np.where(present, cluster + keys, np.inf), axis=1, kind="stable")
    sorted_cluster = np.take_along_axis(cluster, order, axis=1)
    rank_sorted = np.arange(width)[None, :] - np.take_along_axis(start, sorted_cluster, axis=1)
    rank = np.empty_like(rank_sorted)
    np.put_along_axis(rank, order, rank_sorted, axis=1)
    arm = rank < np.take_along_axis(n_treat, cluster, axis=1)
    return (arm & present).astype(np.int8)
