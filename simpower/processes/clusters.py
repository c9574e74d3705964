"""Two-arm cluster trials: random cluster intercepts, equal or variable cluster sizes.

An individual outcome is

    y = u_c + arm * (effect + b_c) + e,
    u_c ~ N(0, icc * sd^2),  e ~ N(0, (1 - icc) * sd^2),  b_c ~ N(0, slope_sd^2),

so ``sd`` is the total SD of a control outcome and ``icc`` the correlation of
two outcomes in the same cluster (Donner & Klar 2000, ch. 2). Clusters are
randomised to arms (``randomise = "cluster"``) or individuals are randomised
within each cluster (``randomise = "individual"``).

Variable cluster sizes are ``1 + X`` with the requested mean and coefficient
of variation (negative binomial or binomial X; see
:func:`~simpower.processes.cluster_sizes.size_law`); a batch of replicates with
variable sizes is padded to the largest replicate and the padding marked by
``present`` (see :class:`~simpower.processes.base.Batch`).
"""

from __future__ import annotations

import math

from .._validation import Choice, Int, Real
from ..components import Nested
from .cluster_sizes import (  # noqa: F401 - the cluster layer's helpers, importable from here as before
    _layout, _within_cluster_arms, draw_clusters, draw_sizes, size_law)
from .composed import Clusters
from .factories import TrialFactory
from .gaussian_outcome import GaussianOutcome

POSITIVE = Real(0.0, low_open=True)


class ClusterTrial(TrialFactory):
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

    A factory over ``trial``: ``design = clusters(clusters, cluster_size,
    cluster_size_cv, icc, randomise)``, ``outcome = gaussian(sd, effect,
    slope_sd)``, ``missing`` (see :attr:`trial`).
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

    unprefixed = ("design.", "outcome.")

    def layers(self):
        return {"design": Clusters(clusters=self.clusters, cluster_size=self.cluster_size,
                                   cluster_size_cv=self.cluster_size_cv, icc=self.icc, randomise=self.randomise),
                "outcome": GaussianOutcome(sd=self.sd, effect=self.effect, slope_sd=self.slope_sd),
                "missing": self.missing}

    # -- derived -----------------------------------------------------------
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
