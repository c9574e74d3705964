"""Two-arm cluster trials: random cluster intercepts, equal or variable cluster sizes.

An individual outcome is

    y = u_c + arm * (effect + b_c) + e,
    u_c ~ N(0, icc * sd^2),  e ~ N(0, (1 - icc) * sd^2),  b_c ~ N(0, slope_sd^2),

so ``sd`` is the total SD of a control outcome and ``icc`` the correlation of
two outcomes in the same cluster (Donner & Klar 2000, ch. 2). Clusters are
randomised to arms (``randomise = "cluster"``) or individuals are randomised
within each cluster (``randomise = "individual"``).

Variable cluster sizes are ``1 + X`` where X has mean ``cluster_size - 1`` and
variance ``(cluster_size_cv * cluster_size)^2``, so the sizes have exactly the
requested mean and coefficient of variation and at least one member:

* when that variance exceeds the mean of X, X is negative binomial (a Poisson
  count whose rate is gamma distributed);
* otherwise X is a binomial count, mixing two adjacent numbers of trials with
  the same mean so the variance is matched exactly.

A batch of replicates with variable sizes is padded to the largest replicate
and the padding marked by ``present`` (see :class:`~simpower.processes.base.Batch`).
"""

from __future__ import annotations

import math

import numpy as np

from .._validation import Choice, Int, Real
from ..components import Nested
from ..errors import ParameterError
from ..facts import ClusterFacts
from .base import Batch, Process, check_missing_columns
from .design import apply_missing

POSITIVE = Real(0.0, low_open=True)


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


class ClusterTrial(Process):
    """Two-arm trial with clustered normal outcomes (random cluster intercepts).

    Parameters
    ----------
    clusters : int >= 2
        Clusters per arm (cluster randomisation). With individual
        randomisation the trial has ``2 * clusters`` clusters in all, each
        split between the arms, so both designs have the same total size.
        The required-n search varies this parameter.
    cluster_size : float >= 1
        Mean cluster size; a whole number when ``cluster_size_cv`` is 0.
    cluster_size_cv : float >= 0
        Coefficient of variation (SD / mean) of the cluster sizes; 0 gives
        equal clusters. Sizes are 1 + negative binomial (or 1 + binomial for
        small CVs), drawn afresh in every replicate; see :func:`size_law`.
    icc : float in [0, 1)
        Intracluster correlation: between-cluster variance ``icc * sd^2``,
        within-cluster variance ``(1 - icc) * sd^2``.
    sd : float > 0
        Total SD of an individual (control) outcome.
    effect : float
        Treatment minus control mean difference (the estimand).
    randomise : {"cluster", "individual"}
        Whole clusters to arms (the first ``clusters`` cluster ids are the
        control arm), or individuals within each cluster (half of each cluster
        to each arm, the odd member by a fair coin).
    slope_sd : float >= 0
        SD of a cluster-specific deviation of the treatment effect (random
        treatment effect). Only with ``randomise = "individual"``: under
        cluster randomisation it cannot be told apart from extra
        between-cluster variance in the treatment arm. Treated outcomes then
        have total variance ``sd^2 + slope_sd^2``.
    missing : missingness, optional
        Applied after the complete outcomes are drawn; its ``mask`` gets
        covariates ``arm`` and ``cluster``. With variable sizes it is called
        once per replicate on that replicate's rows (no padding), so a
        calibrated mechanism sees only real participants.

    Notes
    -----
    Long table: ``y``, ``arm`` (0/1), ``cluster`` (0 .. 2 * clusters - 1,
    unique across arms), ``subject`` (row id within the replicate), and
    ``observed`` when ``missing`` is given; rows are ordered by cluster.
    """

    name = "cluster_trial"
    size_param = "clusters"
    params = {
        "clusters": Int(low=2),
        "cluster_size": Real(1.0),
        "cluster_size_cv": Real(0.0),
        "icc": Real(0.0, 1.0, high_open=True),
        "sd": POSITIVE,
        "effect": Real(),
        "randomise": Choice(("cluster", "individual")),
        "slope_sd": Real(0.0),
        "missing": Nested("missingness", optional=True),
    }
    defaults = {"cluster_size_cv": 0.0, "sd": 1.0, "effect": 0.0, "randomise": "cluster",
                "slope_sd": 0.0, "missing": None}

    def _check(self):
        check_missing_columns(self.missing, {"arm", "cluster"}, self.name)
        if self.cluster_size_cv == 0 and not float(self.cluster_size).is_integer():
            raise ParameterError(
                f"`cluster_size` must be a whole number when cluster_size_cv = 0 (equal clusters); "
                f"got {self.cluster_size:g}."
            )
        size_law(self.cluster_size, self.cluster_size_cv)  # raises for an unreachable CV
        if self.slope_sd > 0 and self.randomise != "individual":
            raise ParameterError(
                "`slope_sd` must be 0 with randomise = 'cluster' (a random treatment effect needs both "
                f"arms in a cluster; use randomise = 'individual'); got {self.slope_sd:g}."
            )

    # -- facts -------------------------------------------------------------
    @property
    def n_clusters(self) -> int:
        """Clusters in the whole trial."""
        return 2 * self.clusters

    @property
    def between_sd(self) -> float:
        return self.sd * math.sqrt(self.icc)

    @property
    def within_sd(self) -> float:
        return self.sd * math.sqrt(1.0 - self.icc)

    @property
    def equal_sizes(self) -> bool:
        return self.cluster_size_cv == 0

    def facts(self):
        """:class:`~simpower.facts.ClusterFacts`; none with missing outcomes."""
        if self.missing is not None:
            return ()
        return (ClusterFacts(clusters=self.clusters, cluster_size=self.cluster_size,
                             cluster_size_cv=self.cluster_size_cv, icc=self.icc, effect=self.effect, sd=self.sd,
                             sd1=self.sd, randomise=self.randomise, slope_sd=self.slope_sd),)

    # -- draws ---------------------------------------------------------------
    def draw_batch(self, rng, size):
        n_clusters = self.n_clusters
        shape = (size, n_clusters)
        sizes, u, cluster, present, start = draw_clusters(rng, n_clusters, self.cluster_size,
                                                          self.cluster_size_cv, size)
        width = cluster.shape[-1]
        e = rng.standard_normal((size, width))
        y = self.within_sd * e
        u *= self.between_sd
        y += u[:, cluster] if cluster.ndim == 1 else np.take_along_axis(u, cluster, axis=1)
        per_rep: dict[str, np.ndarray] = {}
        shared: dict[str, np.ndarray] = {"subject": np.arange(width, dtype=np.int64)}
        if self.randomise == "cluster":
            arm = (cluster >= self.clusters).astype(np.int8)
            y += self.effect * arm
        else:
            b = rng.standard_normal(shape) * self.slope_sd + self.effect
            full_cluster = np.broadcast_to(cluster, (size, width))
            full_present = np.ones((size, width), bool) if present is None else present
            arm = _within_cluster_arms(rng, sizes, full_cluster, full_present, np.asarray(start))
            y += arm * np.take_along_axis(b, full_cluster, axis=1)
        (shared if arm.ndim == 1 else per_rep)["arm"] = arm
        (shared if cluster.ndim == 1 else per_rep)["cluster"] = cluster
        if present is not None:
            per_rep["present"] = present
        info = {"clusters_per_arm": self.clusters, "n_clusters": n_clusters, "randomise": self.randomise,
                "equal_sizes": self.equal_sizes}
        # one call for equal clusters, else one per replicate on its rows (no padding)
        apply_missing(self.missing, rng, y, {"arm": arm, "cluster": cluster}, per_rep, info, present=present)
        per_rep["y"] = y
        return Batch(size, per_rep, shared, info)

    # -- words -----------------------------------------------------------
    def true_effect(self):
        return float(self.effect)

    def describe(self):
        if self.equal_sizes:
            sizes = f"{int(self.cluster_size)} members each"
        else:
            sizes = (f"a mean of {self.cluster_size:g} members (sizes 1 + negative binomial/binomial "
                     f"with CV {self.cluster_size_cv:g})")
        if self.randomise == "cluster":
            design = f"two arms of {self.clusters} clusters, randomised by cluster"
        else:
            design = (f"{self.n_clusters} clusters with individuals randomised 1:1 within each cluster")
        text = (f"{design}; clusters of {sizes}; normal outcomes with total SD {self.sd:g} and ICC "
                f"{self.icc:g} (random cluster intercepts); treatment minus control mean difference "
                f"{self.effect:g}")
        if self.slope_sd > 0:
            text += f", varying between clusters with SD {self.slope_sd:g}"
        if self.missing is not None:
            text += f"; missing outcomes: {self.missing.describe()}"
        return text
