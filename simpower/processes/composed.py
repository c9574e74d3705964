"""A composed process, ``trial``: a design times an outcome times a missingness mechanism.

The three layers are separate components, combined in one process::

    [process]
    type = "trial"
    effect = 0.25
    design = {type = "clusters", clusters = 12, cluster_size = 20, icc = 0.05}
    outcome = {type = "lognormal", median = 300, cv = 1.2}
    missing = {type = "mcar", rate = 0.1}

Designs (kind ``design``):

* ``arms``: two independent arms, sized as every two-arm process
  (:class:`~simpower.processes.design.TwoArms`: ``n`` with ``ratio`` or
  ``n1``; ``sizes``, ``allocation``). Outcomes are independent draws of
  ``outcome``: ``trial`` with ``arms`` draws exactly what ``two_arm`` draws
  with the same fields, replicate for replicate; ``baseline_corr`` adds
  ``two_arm``'s baseline covariate (a Gaussian copula with the outcome).
* ``clusters``: ``clusters`` per arm of mean size ``cluster_size`` (sizes
  vary with ``cluster_size_cv``, see :func:`~simpower.processes.clusters.size_law`),
  randomised by cluster or individually within clusters. Outcomes share a
  random cluster intercept on the normal-scores scale (the scale of the
  linear predictor of a Gaussian copula): ``z = sqrt(icc) u_c + sqrt(1 - icc) e``
  with u, e independent standard normal, and ``y = F^{-1}(Phi(z))`` for the
  outcome's distribution F. So every outcome keeps the distribution
  ``outcome`` says, and ``icc`` is the intracluster correlation of the normal
  scores; for a normal outcome it is the ICC of the outcomes themselves (as
  in ``cluster_trial``), for a skewed one the outcome-scale Pearson ICC is
  somewhat smaller.
* ``visits`` (:mod:`simpower.processes.visits`): two arms, every participant
  measured at the same visits, with exchangeable or AR(1) correlated normal
  scores turned into outcomes the same way; the effect builds over the visits
  (the design's ``effect_shape``), and the ``dropout`` missingness
  (:mod:`simpower.processes.dropout`) applies. ``repeated_measures`` is this
  design with a normal outcome.

The effect (``effect``, ``effect_type``, ``sd_ratio``) acts on the treatment
rows as in ``two_arm``; then the missingness step
(:func:`~simpower.processes.design.apply_missing`) runs once.

The outcome may instead be a layer with a linear predictor
(:mod:`simpower.processes.glm_outcomes`: ``binary``, logit link; ``count``,
log link), which carries its own effect (``outcome.odds_ratio``,
``outcome.rate_ratio``...). Under ``clusters`` the cluster intercept then acts
on the link scale, eta = beta0 + beta1 arm + sigma_b u_c, with sigma_b from the
design's ``icc`` on the layer's ``icc_scale``; under ``arms`` the layer draws
exactly what ``binary_two_arm`` / ``count_two_arm`` draw with the same fields.
The ``gaussian`` layer (:mod:`simpower.processes.gaussian_outcome`, identity
link) draws what ``normal_two_arm`` (arms) and ``cluster_trial`` (clusters)
draw. Those older names are factories over this process
(:mod:`simpower.processes.factories`).
Two more layers: ``time_to_event`` (:mod:`simpower.processes.event_outcomes`:
Weibull proportional hazards, a log-normal frailty on the log hazard under
``clusters``; under ``arms`` the draws of ``survival_two_arm``) and
``ordinal`` (:mod:`simpower.processes.ordinal_outcomes`: proportional odds, a
random intercept on the latent logit scale; under ``arms`` the draws of
``ordinal_two_arm``).
"""

from __future__ import annotations

import math

import numpy as np

from .._validation import Choice, Int, Real
from ..components import Component, Nested
from ..errors import ParameterError, UnknownNameError, nearest
from .. import registry
from ..facts import BinaryFacts, ClusterBinaryFacts, ClusterFacts, NormalFacts
from .base import Batch, Process, check_missing_columns
from .cluster_sizes import _within_cluster_arms, draw_clusters, size_law
from .design import ARM_DEFAULTS, ARM_PARAMS, TwoArms, apply_missing
from .effects import (CORR, EFFECT_TYPE, POSITIVE, _check_outcome_for, _describe_effect, _effect_values,
                      latent_correlation)
from .glm_outcomes import BinaryOutcome, GLMOutcome, Linear, proportion_icc
from .outcomes import Normal


class Design(Component):
    """Base class of designs: who is measured, in which arm and cluster, with which correlation.

    :meth:`draw` returns the layout of ``size`` replicates: ``z``, standard
    normal scores with the design's correlation (None: independent rows, the
    outcome draws them itself), ``arm`` (shared 1-D or per replicate 2-D),
    ``shared`` and ``per_rep`` design columns, ``present`` (padding mask or
    None) and ``info``.
    """

    kind = "design"
    #: the design's parameter the required-n search varies
    size_param: str = "n"
    #: design columns a MAR mechanism may use
    columns: frozenset[str] = frozenset({"arm"})

    #: whether participants are measured at several visits (``visit``, ``subject`` columns; see
    #: :mod:`simpower.processes.visits`): such a design takes no outcome layer and no ``sd_ratio``
    has_visits: bool = False

    def draw(self, rng: np.random.Generator, size: int, latent: bool = True, early=None) -> dict:
        """The layout of ``size`` replicates; ``latent = False``: no normal scores ``z`` (an outcome layer
        with a linear predictor draws its own), only the cluster effects ``u`` (standard normal, one
        per cluster) and ``cluster``. ``early(rng, size, width, design, cluster)``, given by an outcome
        layer that draws before the arms are assigned, is called after the cluster effects; its value
        is returned as ``"early"``. Optional entries: ``covariates`` (what a MAR mechanism may read),
        ``effect_weight`` (rows,): the share of ``effect`` each row gets (absent: all of it), and
        ``missing_rows`` (rows,): the rows a missingness mechanism sees (absent: all)."""
        raise NotImplementedError

    @property
    def final_weight(self) -> float | None:
        """The ``effect_weight`` of the rows the estimand refers to; None: every row gets the whole effect."""
        return None

    def effect_rows(self, x, weight, outcome, effect, effect_type):
        """The treated rows ``x`` with the effect scaled by each row's ``effect_weight`` (designs that give one)."""
        raise NotImplementedError

    def true_effect_at(self, weight, outcome, effect, effect_type) -> float:
        """The difference in mean outcome where the effect's weight is ``weight`` (designs with a ``final_weight``)."""
        raise NotImplementedError

    def outcome_columns(self, y: np.ndarray) -> dict[str, np.ndarray]:
        """Design columns computed from the complete outcomes (e.g. a baseline visit's value); none by default."""
        return {}

    def bind_missing(self, missing, trial):
        """The missingness step ``trial`` applies (a mechanism bound to this design's model, e.g. dropout)."""
        return missing

    def trial_facts(self, trial) -> tuple | None:
        """The analytic facts of ``trial`` with this design, or None to let ``trial`` state them."""
        return None


class Arms(TwoArms, Design):
    """Two independent arms: ``n`` (control), with ``ratio`` or ``n1`` (see :class:`TwoArms`).

    ``baseline_corr`` (in (-1, 1), optional) adds a ``baseline`` column: a
    pre-randomisation measurement with the control-arm outcome's distribution
    whose Pearson correlation with the outcome is ``baseline_corr`` in each arm,
    joined to it by a Gaussian copula (as ``two_arm``; an outcome distribution
    only, not a layer).
    """

    name = "arms"
    params = {**ARM_PARAMS, "baseline_corr": CORR}
    defaults = {**ARM_DEFAULTS, "baseline_corr": None}

    def _check(self):
        self._check_arms()

    @property
    def columns(self) -> frozenset[str]:  # type: ignore[override]
        return frozenset({"arm", "baseline"} if self.baseline_corr is not None else {"arm"})

    def draw(self, rng, size, latent=True, early=None):
        arm = self.arm_labels()
        lay = {"z": None, "width": self.total, "arm": arm, "shared": {"arm": arm}, "per_rep": {},
               "present": None, "info": self.arm_info()}
        if early is not None:
            lay["early"] = early(rng, size, self.total, self, None)
        return lay

    def describe(self):
        return f"{self.arms_text()}, participants independent"


class Clusters(Design):
    """Two arms of clusters, with a random cluster intercept on the normal-scores scale.

    Parameters
    ----------
    clusters : int >= 2
        Clusters per arm (with ``randomise = "individual"``: 2 * clusters
        clusters in all, each split between the arms).
    cluster_size : float >= 1
        Mean cluster size; a whole number when ``cluster_size_cv`` is 0.
    cluster_size_cv : float >= 0
        Coefficient of variation of the cluster sizes (0: equal clusters).
    icc : float in [0, 1)
        Intracluster correlation of the outcomes' normal scores.
    randomise : {"cluster", "individual"}
    """

    name = "clusters"
    size_param = "clusters"
    columns = frozenset({"arm", "cluster"})
    params = {"clusters": Int(low=2), "cluster_size": Real(1.0), "cluster_size_cv": Real(0.0),
              "icc": Real(0.0, 1.0, high_open=True), "randomise": Choice(("cluster", "individual"))}
    defaults = {"cluster_size_cv": 0.0, "randomise": "cluster"}

    def _check(self):
        if self.cluster_size_cv == 0 and not float(self.cluster_size).is_integer():
            raise ParameterError(f"`cluster_size` must be a whole number when cluster_size_cv = 0 (equal "
                                 f"clusters); got {self.cluster_size:g}.")
        size_law(self.cluster_size, self.cluster_size_cv)  # raises for an unreachable CV

    def draw(self, rng, size, latent=True, early=None):
        n_clusters = 2 * self.clusters
        sizes, u, cluster, present, start = draw_clusters(rng, n_clusters, self.cluster_size, self.cluster_size_cv,
                                                          size)
        width = cluster.shape[-1]
        u_rows = u[:, cluster] if cluster.ndim == 1 else np.take_along_axis(u, cluster, axis=1)
        if latent:
            z = math.sqrt(1.0 - self.icc) * rng.standard_normal((size, width))
            z += math.sqrt(self.icc) * u_rows
        else:
            z = None
        drawn_early = None if early is None else early(rng, size, width, self, cluster)
        if self.randomise == "cluster":
            arm = (cluster >= self.clusters).astype(np.int8)
        else:
            full_cluster = np.broadcast_to(cluster, (size, width))
            full_present = np.ones((size, width), bool) if present is None else present
            arm = _within_cluster_arms(rng, sizes, full_cluster, full_present, np.asarray(start))
        shared = {"subject": np.arange(width, dtype=np.int64)}
        per_rep = {}
        (shared if arm.ndim == 1 else per_rep)["arm"] = arm
        (shared if cluster.ndim == 1 else per_rep)["cluster"] = cluster
        if present is not None:
            per_rep["present"] = present
        info = {"clusters_per_arm": self.clusters, "n_clusters": n_clusters, "randomise": self.randomise,
                "equal_sizes": self.cluster_size_cv == 0}
        lay = {"z": z, "width": width, "arm": arm, "shared": shared, "per_rep": per_rep, "present": present,
               "info": info, "covariates": {"arm": arm, "cluster": cluster}, "u_rows": u_rows}
        if early is not None:
            lay["early"] = drawn_early
        return lay

    def describe(self, scale: str = "of the normal scores"):
        sizes = (f"{int(self.cluster_size)} members each" if self.cluster_size_cv == 0 else
                 f"a mean of {self.cluster_size:g} members (CV {self.cluster_size_cv:g})")
        design = (f"two arms of {self.clusters} clusters of {sizes}, randomised by cluster"
                  if self.randomise == "cluster" else
                  f"{2 * self.clusters} clusters of {sizes}, individuals randomised 1:1 within each cluster")
        return f"{design}; intracluster correlation {self.icc:g} {scale} (a random cluster intercept)"


class OutcomeOrLayer(Nested):
    """The ``outcome`` of ``trial``: an outcome distribution, or an outcome layer with a linear predictor
    (kind ``glm_outcome``: ``binary``, ``count``)."""

    def __init__(self):
        super().__init__("outcome")

    def describe(self) -> str:
        return ("an outcome (object or {type = ...} table), or an outcome layer (`binary`, `count`, `time_to_event`, "
                "`ordinal`)")

    def clean(self, name, value):
        if isinstance(value, GLMOutcome):
            return value
        if isinstance(value, dict):
            kind = value.get("type")
            layers, outcomes = registry.names(GLMOutcome.kind), registry.names("outcome")
            if kind in layers:
                return registry.build(GLMOutcome.kind, value, where=name)
            if isinstance(kind, str) and kind not in outcomes and not registry.is_reference(kind):
                raise UnknownNameError(f"`{name}.type`: unknown outcome {kind!r}.{nearest(kind, outcomes + layers)}")
        return super().clean(name, value)


class Trial(Process):
    """A design (``arms``, ``clusters``, ``visits``) times an outcome times an optional missingness.

    Parameters
    ----------
    design : design
        ``{type = "arms", ...}``, ``{type = "clusters", ...}`` or ``{type = "visits", ...}`` (see the module).
    outcome : outcome or outcome layer, default normal(0, 1)
        The control-arm distribution of a continuous outcome, or a layer
        with a linear predictor, which carries its own effect: ``binary``,
        ``count`` (:mod:`simpower.processes.glm_outcomes`), ``time_to_event``
        (:mod:`simpower.processes.event_outcomes`; censored, so ``missing``
        does not apply) or ``ordinal`` (:mod:`simpower.processes.ordinal_outcomes`).
    effect, effect_type, sd_ratio
        The treatment effect on a continuous outcome, as for ``two_arm``
        (left at their defaults with a layer).
    missing : missingness, optional
        Applied once after the outcomes; a MAR mechanism may use the design's
        columns (``arm``; ``cluster`` for clusters; ``baseline`` with
        ``design.baseline_corr``; ``exposure`` for counts; ``subject``,
        ``visit``, ``baseline`` for visits). ``dropout`` needs a design with
        visits.

    Notes
    -----
    ``true_effect()`` is the treatment minus control difference in mean
    outcome, as for ``two_arm``; with a layer, the layer's estimand (its
    ``estimand_label``). The required-n search varies the design's size
    (``design.n`` or ``design.clusters``).
    """

    name = "trial"
    params = {"design": Nested("design"), "outcome": OutcomeOrLayer(), "effect": Real(),
              "effect_type": EFFECT_TYPE, "sd_ratio": POSITIVE, "missing": Nested("missingness", optional=True)}
    defaults = {"outcome": Normal(), "effect": 0.0, "effect_type": "shift", "sd_ratio": 1.0, "missing": None}

    def __setstate__(self, state):
        super().__setstate__(state)
        self._check()

    def _check(self):
        columns = set(self.design.columns)
        latent = None
        if isinstance(self.outcome, GLMOutcome):
            if getattr(self.design, "baseline_corr", None) is not None:
                raise ParameterError(f"`design.baseline_corr` needs an outcome distribution (the baseline has the "
                                     f"outcome's distribution); a {self.outcome.name} outcome layer has none: "
                                     "remove it.")
            check_design = getattr(self.outcome, "check_design", None)
            if check_design is not None:
                check_design(self.design)
            for field, default in (("effect", 0.0), ("effect_type", "shift"), ("sd_ratio", 1.0)):
                if self._p[field] != default:
                    raise ParameterError(f"`{field}` does not apply to a {self.outcome.name} outcome, which carries "
                                         f"its effect (`outcome.{self.outcome.effect_param}`): remove `{field}`.")
            if self.missing is not None and not self.outcome.takes_missing:
                raise ParameterError(f"`missing` does not apply to a {self.outcome.name} outcome, which is censored "
                                     "instead (loss to follow-up: `outcome.dropout_rate`): remove `missing`.")
            if self.design.has_visits:
                raise ParameterError(f"`outcome`: a {self.outcome.name} layer is not available with the "
                                     f"{self.design.name} design; give a continuous outcome distribution.")
            sigma = self.outcome.sigma_for(self.design.icc) if isinstance(self.design, Clusters) else 0.0
            object.__setattr__(self, "_lin", self.outcome.solve(sigma))
            columns |= set(self.outcome.columns)
        else:
            if self.effect_type == "ratio" and not self.effect > 0:
                raise ParameterError(f"`effect` must be > 0 when `effect_type` = 'ratio'; got {self.effect:g}.")
            _check_outcome_for(self.outcome, self.effect_type, self.sd_ratio != 1)
            if not isinstance(self.design, Arms) and not hasattr(self.outcome, "from_normal"):
                raise ParameterError(f"`outcome` needs a quantile function (from_normal) for a {self.design.name} "
                                     f"design; {type(self.outcome).__name__} has none.")
            rho = getattr(self.design, "baseline_corr", None)
            if rho is not None:
                latent = latent_correlation(self.outcome, rho, field="design.baseline_corr")
        object.__setattr__(self, "_latent", latent)
        baseline_possible = isinstance(self.design, Arms) and not self.layered
        needs_baseline = "baseline" in getattr(self.missing, "requires", ()) and "baseline" not in columns
        hint = "; set `design.baseline_corr` to add a baseline column" if baseline_possible and needs_baseline else ""
        if self.design.has_visits and self.sd_ratio != 1:
            raise ParameterError(f"`sd_ratio` does not apply to the {self.design.name} design: remove it.")
        if getattr(self.missing, "needs_visits", False) and not self.design.has_visits:
            raise ParameterError(f"`missing`: {self.missing.name} needs a design with visits (`visits`); the "
                                 f"{self.design.name} design has none: use mcar, mar or mnar.")
        check_missing_columns(self.missing, columns, self.name, hint)
        object.__setattr__(self, "_missing_step", self.design.bind_missing(self.missing, self))

    @property
    def layered(self) -> bool:
        """Whether the outcome is a layer with a linear predictor (``binary``, ``count``)."""
        return isinstance(self.outcome, GLMOutcome)

    @property
    def linear(self) -> Linear | None:
        """The solved linear predictor of a layer (beta0, beta1, cluster SD, marginal means), else None."""
        return self._lin if self.layered else None

    @property
    def latent_corr(self) -> float | None:
        """Correlation of the normal scores of baseline and outcome (None without ``design.baseline_corr``)."""
        return self._latent

    @property
    def size_param(self) -> str:  # type: ignore[override]
        return f"design.{self.design.size_param}"

    @property
    def effect_param(self) -> str:  # type: ignore[override]
        return f"outcome.{self.outcome.effect_param}" if self.layered else "effect"

    @property
    def estimand_label(self) -> str:  # type: ignore[override]
        return self.outcome.label_for(self._lin) if self.layered else "mean difference"

    def null_value(self):
        if self.layered:
            return self.outcome.null_value()
        return 1.0 if self.effect_type == "ratio" else 0.0

    def true_effect(self):
        if self.layered:
            value = self.outcome.true_effect(self._lin)
            return None if value is None else float(value)
        weight = self.design.final_weight
        if weight is not None:
            return self.design.true_effect_at(weight, self.outcome, self.effect, self.effect_type)
        if self.effect_type == "shift":
            return float(self.effect)
        if self.effect_type == "d":
            return float(self.effect * self.outcome.sd)
        return float(self.outcome.mean * (self.effect - 1.0))

    def true_values(self) -> dict[str, float]:
        """A layer's true values on every scale (e.g. marginal and conditional log odds ratios), by estimand."""
        if not self.layered:
            return {"mean_difference": self.true_effect()}
        return self.outcome.true_values(self._lin)

    def draw_batch(self, rng, size):
        if self.layered:
            return self._draw_layer(rng, size)
        lay = self.design.draw(rng, size)
        baseline = None
        if self._latent is not None:  # arms with a baseline: scores correlated through the copula, as two_arm
            shape = (size, lay["width"])
            z_base = rng.standard_normal(shape)
            lay["z"] = self._latent * z_base + math.sqrt(1.0 - self._latent**2) * rng.standard_normal(shape)
        if lay["z"] is None:
            y = np.asarray(self.outcome.sample(rng, (size, lay["width"])), dtype=float)
        else:
            y = np.asarray(self.outcome.from_normal(lay["z"]), dtype=float)
        if self._latent is not None:
            baseline = np.asarray(self.outcome.from_normal(z_base), dtype=float)
        arm = lay["arm"]
        weight = lay.get("effect_weight")
        if weight is not None:  # an effect that differs by row (visits): shared arms, no sd_ratio
            treated = arm == 1
            y[:, treated] = self.design.effect_rows(y[:, treated], weight[treated], self.outcome, self.effect,
                                                    self.effect_type)
        elif arm.ndim == 1:
            treated = arm == 1
            y[:, treated] = _effect_values(y[:, treated], self.outcome, self.effect, self.effect_type, self.sd_ratio)
        else:
            treated = arm == 1
            y[treated] = _effect_values(y[treated], self.outcome, self.effect, self.effect_type, self.sd_ratio)
        per_rep = {"y": y, **lay["per_rep"]}
        covariates = dict(lay.get("covariates", {"arm": arm}))
        if baseline is not None:
            per_rep = {"baseline": baseline, **per_rep}
            covariates["baseline"] = baseline
        info = dict(lay["info"])
        extra = self.design.outcome_columns(y)
        if extra:
            per_rep.update(extra)
            covariates = {**covariates, **extra}
        step = self._missing_step
        rows = None if getattr(step, "whole_series", False) else lay.get("missing_rows")
        apply_missing(step, rng, y, covariates, per_rep, info, rows=rows, present=lay["present"])
        return Batch(size, per_rep, lay["shared"], info)

    def _draw_layer(self, rng, size):
        """A layer's outcomes from the linear predictor; with ``arms`` the draws of ``binary_two_arm`` /
        ``count_two_arm`` (same fields, same numbers)."""
        early = getattr(self.outcome, "early", None)  # a layer that draws before the arms are assigned
        lay = self.design.draw(rng, size, latent=False, **({"early": early} if early is not None else {}))
        lin = self._lin
        u_rows = lay.get("u_rows") if lin.sigma > 0 else None
        arm = lay["arm"]
        y, shared, per_rep, cov = self.outcome.draw(rng, lin, arm, u_rows, size, lay["width"],
                                                    **({"early": lay["early"]} if "early" in lay else {}))
        per_rep = {**per_rep, **({} if y is None else {"y": y}), **lay["per_rep"]}
        shared = {**lay["shared"], **shared}
        info = dict(lay["info"])
        covariates = {**lay.get("covariates", {"arm": arm}), **cov}
        apply_missing(self.missing, rng, y, covariates, per_rep, info, present=lay["present"])
        return Batch(size, per_rep, shared, info)

    def estimand_aliases(self):
        if self.layered:
            aliases = set(self.outcome.estimand_aliases(self._lin))
            if getattr(self.outcome, "shifts_only", False) and isinstance(self.design, Arms) and self.missing is None:
                aliases.add("location shift")  # an identity-link layer whose arms differ by a shift alone
            return aliases
        pure_shift = (isinstance(self.design, Arms) and self.effect_type in ("shift", "d") and self.sd_ratio == 1
                      and self.missing is None)
        return {"location shift"} if pure_shift else set()

    def proportion_icc(self) -> float | None:
        """A binary layer's ICC of the 0/1 outcomes in the control arm (the proportion scale), else None."""
        if not isinstance(self.outcome, BinaryOutcome):
            return None
        return proportion_icc(self._lin.sigma, self.outcome.p0)

    def facts(self):
        """Normal outcomes without missing data: :class:`NormalFacts` (arms) or :class:`ClusterFacts` (clusters);
        a binary layer without missing data: :class:`BinaryFacts` (arms) or :class:`ClusterBinaryFacts`."""
        d = self.design
        own = d.trial_facts(self)
        if own is not None:
            return own
        if self.missing is not None or self._latent is not None:
            return ()
        own = self.outcome.facts_for(self._lin, d) if self.layered else None
        if own is not None:
            return own
        if isinstance(self.outcome, BinaryOutcome):
            lin = self._lin
            if isinstance(d, Arms):
                return (BinaryFacts(p0=lin.mean0, p1=lin.mean1, n=d.n0, ratio=d.n1 / d.n0),)
            if isinstance(d, Clusters):
                return (ClusterBinaryFacts(p0=lin.mean0, p1=lin.mean1, clusters=d.clusters,
                                           cluster_size=d.cluster_size, cluster_size_cv=d.cluster_size_cv,
                                           icc=self.proportion_icc(), randomise=d.randomise),)
            return ()
        if not isinstance(self.outcome, Normal):
            return ()
        sd0 = self.outcome.sd
        if isinstance(d, Arms):
            return (NormalFacts("two-sample", effect=self.true_effect(), n=d.n0, sd0=sd0, sd1=sd0 * self.sd_ratio,
                                ratio=d.n1 / d.n0),)
        if isinstance(d, Clusters):
            return (ClusterFacts(clusters=d.clusters, cluster_size=d.cluster_size, cluster_size_cv=d.cluster_size_cv,
                                 icc=d.icc, effect=self.true_effect(), sd=sd0, sd1=sd0 * self.sd_ratio,
                                 randomise=d.randomise),)
        return ()

    def describe(self):
        if self.layered:
            lin = self._lin
            design = (self.design.describe(f"on the {self.outcome.icc_scale} scale")
                      if isinstance(self.design, Clusters) else self.design.describe())
            parts = [design, f"outcome: {self.outcome.describe(lin)}"]
            if self.missing is not None:
                parts.append(self.missing.describe())
            if self.true_effect() is not None:
                parts.append(f"estimand: {self.estimand_label} = {self.true_effect():.4g}")
            return "; ".join(parts)
        parts = [self.design.describe(), f"outcome {self.outcome.describe()}",
                 _describe_effect(self.effect, self.effect_type, self.outcome)]
        if self.sd_ratio != 1:
            parts.append(f"treatment-arm deviations around its mean scaled by {self.sd_ratio:g}")
        if self._latent is not None:
            parts.append(f"a baseline covariate with the outcome's distribution, correlation "
                         f"{self.design.baseline_corr:g} with the outcome (Gaussian copula, normal-scores correlation "
                         f"{self._latent:.3f})")
        if self.missing is not None:
            parts.append(self.missing.describe())
        parts.append(f"estimand: treatment minus control difference in mean outcome = {self.true_effect():.4g}")
        return "; ".join(parts)
