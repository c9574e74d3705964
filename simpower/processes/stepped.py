"""Stepped-wedge (and other multi-period) cluster-randomised trials.

Clusters follow *sequences*: rows of a sequence matrix over periods, 1 =
treated, 0 = control, "-" = not measured (e.g. an implementation period).
The standard stepped wedge (``steps``) has one sequence per step. Each of the
``clusters_per_sequence`` clusters of a sequence has ``m`` individuals measured
in each measured period: new individuals every period (``sampling =
"cross_sectional"``) or the same cohort followed up (``"cohort"``).

The linear predictor of individual i of cluster k in period t is

    eta_ikt = b0 + period_t + effect * treat_kt + C_kt + S_ik,

with ``C_kt`` the cluster-period effects, normal with variance ``icc * s^2``
and correlation over periods by ``structure`` (exchangeable: 1; nested:
``cac``; exponential: ``cac ** |t - s|``), and ``S_ik`` a persistent individual
effect (cohorts) with variance ``individual_autocorr * (1 - icc) * s^2``.
``s^2`` is the total variance on the linear-predictor scale:

* ``outcome = "normal"``: ``y = eta + e``, ``b0 = mean``, ``s = sd``, the
  residual ``e`` with variance ``(1 - individual_autocorr)(1 - icc) sd^2``; so
  ``sd`` is an outcome's total SD and ``icc`` the correlation of two
  individuals in the same cluster-period (Hooper et al. 2016);
* ``"binary"``: ``y ~ Bernoulli(expit(eta))``, ``b0 = logit(p0)``; ``icc`` on the
  latent logistic scale, ``s^2 = (pi^2 / 3) / (1 - icc)`` (Snijders & Bosker 2012, sec. 17.3);
* ``"count"``: ``y ~ Poisson(exp(eta))``, ``b0 = log(rate0)``; ``icc`` on the log
  scale with the distribution-specific variance ``log(1 + 1 / rate0)``, so
  ``s^2 = log(1 + 1/rate0) / (1 - icc)`` (Nakagawa, Johnson & Schielzeth 2017, J R Soc Interface).

``effect`` is on the linear-predictor scale: a mean difference, a log odds
ratio, a log rate ratio.
"""

from __future__ import annotations

import math

import numpy as np

from .._validation import Anything, Choice, Int, Real
from ..analytic.stepped import as_design, gls_variance, standard_design
from ..components import Nested
from ..errors import ParameterError
from ..facts import SteppedFacts
from .base import Batch, Process, check_missing_columns
from .clusters import _layout, draw_sizes, size_law
from .design import Vocabulary, apply_missing

NOT_MEASURED = "-"


class _Sequences(Anything):
    """A sequence matrix: rows of 0, 1 or "-" (null/None also mean not measured)."""

    def __init__(self):
        object.__setattr__(self, "optional", True)

    def describe(self) -> str:
        return "a list of equal-length rows of 0, 1 or '-' (not measured)"

    def clean(self, name, value):
        if value is None:
            return None
        if isinstance(value, (str, bytes)) or not all(isinstance(r, (list, tuple)) for r in value):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
        x = as_design(value)
        return tuple(tuple(NOT_MEASURED if np.isnan(v) else int(v) for v in row) for row in x)


class _PeriodEffects(Anything):
    """A number (a linear trend: period t adds t times it) or one number per period."""

    def __init__(self):
        object.__setattr__(self, "optional", False)

    def describe(self) -> str:
        return "a number (change per period) or a list of one number per period"

    def clean(self, name, value):
        if isinstance(value, bool):
            raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")
        if isinstance(value, (int, float)):
            if not math.isfinite(value):
                raise ParameterError(f"`{name}` must be finite; got {value!r}.")
            return float(value)
        if isinstance(value, (list, tuple)) and value and all(
                isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in value):
            return tuple(float(v) for v in value)
        raise ParameterError(f"`{name}` must be {self.describe()}; got {value!r}.")


class SteppedWedge(Vocabulary, Process):
    """Stepped-wedge cluster-randomised trial with period effects and correlated cluster-period effects.

    Parameters
    ----------
    sequences : list of rows of 0, 1 or "-", optional
        The sequence matrix (sequences x periods); give it or ``steps``.
    steps : int >= 1, optional
        Standard stepped wedge with this many steps (one sequence per step).
    baseline_periods : int >= 0, default 1
        With ``steps``: control periods before the first step.
    periods_per_step : int >= 1, default 1
        With ``steps``: periods between steps (and after the last).
    clusters_per_sequence : int >= 1, default 1
        Clusters following each sequence (alias ``clusters_per_step``). The
        required-size search varies it.
    m : int >= 1
        Individuals measured per cluster and measured period (the mean, with ``cluster_size_cv``).
    cluster_size_cv : float >= 0, default 0
        Coefficient of variation of the clusters' sizes: each cluster draws a size
        (1 + negative binomial or binomial with mean ``m``; see
        :func:`simpower.processes.clusters.size_law`) afresh in every replicate and
        measures that many individuals in each of its measured periods (a cohort of
        that size). 0: every cluster-period has ``m``.
    sampling : {"cross_sectional", "cohort"}
    individual_autocorr : float in [0, 1), default 0
        Cohorts: correlation of an individual's non-cluster parts over periods.
    structure : {"exchangeable", "nested", "exponential"}
    icc : float in [0, 1)
        Correlation of two individuals' outcomes in the same cluster-period.
    cac : float in [0, 1], default 1
        Cluster autocorrelation: correlation of a cluster's effects one period
        apart (``"nested"``: any two periods). Must be 1 with ``"exchangeable"``.
    period_effects : number or list, default 0
        Added to the linear predictor in period t: ``t * value`` (a linear
        trend), or ``value[t]`` (one number per period).
    outcome : {"normal", "binary", "count"}
    mean, sd : normal outcome's control mean in period 0 and total SD (defaults 0 and 1)
    p0 : binary outcome's control risk in period 0 at a zero random effect
    rate0 : count outcome's control rate in period 0 at a zero random effect
    effect : float
        Treatment effect on the linear-predictor scale (the estimand).
    missing : missingness, optional
        Applied after the outcomes; its ``mask`` gets ``cluster``, ``period``, ``treat``.

    Notes
    -----
    Long table: ``y``, ``cluster`` (0 .. clusters - 1, clusters of sequence j
    numbered ``j * clusters_per_sequence ...``), ``period``, ``treat`` (0/1),
    ``subject`` (an individual's id: unique per row when cross-sectional, the
    same over periods in a cohort); rows ordered by cluster, period, individual.
    """

    name = "stepped_wedge"
    size_param = "clusters_per_sequence"
    aliases = {"clusters_per_step": "clusters_per_sequence"}
    params = {
        "sequences": _Sequences(),
        "steps": Int(low=1, optional=True),
        "baseline_periods": Int(low=0),
        "periods_per_step": Int(low=1),
        "clusters_per_sequence": Int(low=1),
        "m": Int(low=1),
        "cluster_size_cv": Real(0.0),
        "sampling": Choice(("cross_sectional", "cohort")),
        "individual_autocorr": Real(0.0, 1.0, high_open=True),
        "structure": Choice(("exchangeable", "nested", "exponential")),
        "icc": Real(0.0, 1.0, high_open=True),
        "cac": Real(0.0, 1.0),
        "period_effects": _PeriodEffects(),
        "outcome": Choice(("normal", "binary", "count")),
        "mean": Real(),
        "sd": Real(0.0, low_open=True),
        "p0": Real(0.0, 1.0, low_open=True, high_open=True, optional=True),
        "rate0": Real(0.0, low_open=True, optional=True),
        "effect": Real(),
        "missing": Nested("missingness", optional=True),
    }
    defaults = {"sequences": None, "steps": None, "baseline_periods": 1, "periods_per_step": 1,
                "clusters_per_sequence": 1, "cluster_size_cv": 0.0, "sampling": "cross_sectional", "individual_autocorr": 0.0,
                "structure": "exchangeable", "cac": 1.0, "period_effects": 0.0, "outcome": "normal",
                "mean": 0.0, "sd": 1.0, "p0": None, "rate0": None, "effect": 0.0, "missing": None}

    def _check(self):
        if (self.sequences is None) == (self.steps is None):
            raise ParameterError("`sequences`, `steps`: give the sequence matrix or the number of steps, one of them.")
        if self.sequences is not None and (self.baseline_periods != 1 or self.periods_per_step != 1):
            raise ParameterError("`baseline_periods`, `periods_per_step` go with `steps`; with `sequences` the "
                                 "matrix says which periods are control, treated or not measured.")
        x = self.sequence_matrix
        if self.structure == "exchangeable" and self.cac != 1:
            raise ParameterError(f"`cac` must be 1 with structure = 'exchangeable' (one cluster effect over all "
                                 f"periods); use structure = 'nested' or 'exponential'; got {self.cac:g}.")
        if self.sampling == "cross_sectional" and self.individual_autocorr != 0:
            raise ParameterError("`individual_autocorr` must be 0 with sampling = 'cross_sectional' (new "
                                 "individuals every period); use sampling = 'cohort'.")
        if isinstance(self.period_effects, tuple) and len(self.period_effects) != x.shape[1]:
            raise ParameterError(f"`period_effects` must have one number per period ({x.shape[1]}); "
                                 f"got {len(self.period_effects)}.")
        need = {"normal": None, "binary": "p0", "count": "rate0"}[self.outcome]
        for field in ("p0", "rate0"):
            if field != need and self._p[field] is not None:
                raise ParameterError(f"`{field}` does not apply to outcome = {self.outcome!r}; remove it.")
        if need is not None and self._p[need] is None:
            raise ParameterError(f"`{need}` is needed with outcome = {self.outcome!r}.")
        if self.outcome != "normal" and (self.mean != 0 or self.sd != 1):
            raise ParameterError(f"`mean`, `sd` apply to outcome = 'normal' only; with {self.outcome!r} give "
                                 f"{need}.")
        measured = np.isfinite(x)
        if not (np.any((x == 1) & measured) and np.any(x == 0)):
            raise ParameterError("`sequences` must have both control (0) and treated (1) cells.")
        check_missing_columns(self.missing, {"cluster", "period", "treat"}, self.name)
        size_law(self.m, self.cluster_size_cv)  # raises for an unreachable CV
        gls_variance(x, 1, 0.5)  # raises when the design cannot separate the effect from the periods

    # -- the design ---------------------------------------------------------------
    @property
    def sequence_matrix(self) -> np.ndarray:
        """(sequences, periods) float: 0/1, NaN where not measured."""
        if self.sequences is not None:
            return as_design(self.sequences)
        return standard_design(self.steps, 1, self.baseline_periods, self.periods_per_step)

    @property
    def design_matrix(self) -> np.ndarray:
        """(clusters, periods): the sequence matrix with each row repeated ``clusters_per_sequence`` times."""
        return np.repeat(self.sequence_matrix, self.clusters_per_sequence, axis=0)

    @property
    def n_clusters(self) -> int:
        return self.sequence_matrix.shape[0] * self.clusters_per_sequence

    @property
    def periods(self) -> int:
        return self.sequence_matrix.shape[1]

    @property
    def period_values(self) -> np.ndarray:
        pe = self.period_effects
        if isinstance(pe, tuple):
            return np.asarray(pe, float)
        return pe * np.arange(self.periods, dtype=float)

    @property
    def total_var(self) -> float:
        """Total variance on the linear-predictor scale (see the module notes)."""
        if self.outcome == "normal":
            return self.sd ** 2
        base = math.pi ** 2 / 3 if self.outcome == "binary" else math.log1p(1.0 / self.rate0)
        return base / (1.0 - self.icc)

    @property
    def intercept(self) -> float:
        if self.outcome == "normal":
            return self.mean
        if self.outcome == "binary":
            return math.log(self.p0 / (1.0 - self.p0))
        return math.log(self.rate0)

    @property
    def estimand_label(self) -> str:
        return {"normal": "mean difference", "binary": "log odds ratio", "count": "log rate ratio"}[self.outcome]

    def _rows(self):
        """Shared columns: cluster, period, treat, member (index within the cluster's cohort/cell)."""
        x = self.design_matrix
        k, t = np.nonzero(np.isfinite(x))
        m = self.m
        cluster = np.repeat(k, m).astype(np.int32)
        period = np.repeat(t, m).astype(np.int32)
        treat = np.repeat(x[k, t], m).astype(np.int8)
        member = np.tile(np.arange(m), k.size)
        return cluster, period, treat, member

    # -- facts ----------------------------------------------------------------------
    def facts(self):
        """:class:`~simpower.facts.SteppedFacts` for a complete normal outcome; none otherwise."""
        if self.missing is not None or self.outcome != "normal" or self.cluster_size_cv > 0:
            return ()
        x = self.sequence_matrix
        seqs = tuple(tuple(None if np.isnan(v) else int(v) for v in row) for row in x)
        return (SteppedFacts(sequences=seqs, clusters_per_sequence=self.clusters_per_sequence, m=self.m,
                             icc=self.icc, cac=self.cac, structure=self.structure, sampling=self.sampling,
                             individual_autocorr=self.individual_autocorr, sd=self.sd, effect=self.effect),)

    # -- draws ----------------------------------------------------------------------
    def _cluster_period_effects(self, rng, size, n_clusters, periods):
        """C (size, clusters, periods), standard deviation 1 before scaling."""
        if self.structure == "exchangeable":
            return np.broadcast_to(rng.standard_normal((size, n_clusters, 1)), (size, n_clusters, periods))
        if self.structure == "nested":
            u = rng.standard_normal((size, n_clusters, 1))
            w = rng.standard_normal((size, n_clusters, periods))
            return math.sqrt(self.cac) * u + math.sqrt(1.0 - self.cac) * w
        w = rng.standard_normal((size, n_clusters, periods))
        c = np.empty_like(w)
        c[..., 0] = w[..., 0]
        r = self.cac
        for t in range(1, periods):  # stationary AR(1) over periods: corr r ** |t - s|
            c[..., t] = r * c[..., t - 1] + math.sqrt(1.0 - r * r) * w[..., t]
        return c

    def _variable_rows(self, rng, size):
        """Per-replicate rows of clusters with drawn sizes: cluster, period, member, present (R, W)."""
        x = self.design_matrix
        n_clusters, periods = x.shape
        sizes = draw_sizes(rng, self.m, self.cluster_size_cv, (size, n_clusters))
        cells = sizes[:, :, None] * np.isfinite(x)[None].astype(np.int64)        # (R, K, T)
        cell, present, start = _layout(cells.reshape(size, -1))
        cluster = (cell // periods).astype(np.int32)
        period = (cell % periods).astype(np.int32)
        member = np.arange(cell.shape[1])[None, :] - np.take_along_axis(start, cell, axis=1)
        return cluster, period, np.where(present, member, 0), present, int(sizes.max())

    def draw_batch(self, rng, size):
        x = self.design_matrix
        n_clusters, periods = x.shape
        if self.cluster_size_cv > 0:
            cluster, period, member, present, members = self._variable_rows(rng, size)
            treat = np.nan_to_num(x[cluster, period]).astype(np.int8)
        else:
            cluster, period, treat, member = self._rows()
            present, members = None, self.m
        width = cluster.shape[-1]
        s2 = self.total_var
        eta = np.empty((size, width))
        eta[:] = self.intercept + self.period_values[period] + self.effect * treat
        c = self._cluster_period_effects(rng, size, n_clusters, periods)
        if present is None:
            eta += math.sqrt(self.icc * s2) * c[:, cluster, period]
        else:
            cp = np.take_along_axis(np.ascontiguousarray(c).reshape(size, -1), cluster * periods + period, axis=1)
            eta += math.sqrt(self.icc * s2) * cp
        if self.sampling == "cohort" and self.individual_autocorr > 0:
            s = rng.standard_normal((size, n_clusters, members))
            scale = math.sqrt(self.individual_autocorr * (1.0 - self.icc) * s2)
            if present is None:
                eta += scale * s[:, cluster, member]
            else:
                eta += scale * np.take_along_axis(s.reshape(size, -1), cluster * members + member, axis=1)
        if self.outcome == "normal":
            resid = (1.0 - self.individual_autocorr) * (1.0 - self.icc) * s2
            eta += math.sqrt(resid) * rng.standard_normal((size, width))
            y = eta
        elif self.outcome == "binary":
            y = (rng.random((size, width)) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
        else:
            y = rng.poisson(np.exp(eta)).astype(float)
        if self.sampling == "cohort":
            subject = cluster.astype(np.int64) * members + member
        else:
            subject = np.broadcast_to(np.arange(width, dtype=np.int64), cluster.shape)
        design = {"cluster": cluster, "period": period, "treat": treat, "subject": subject}
        per_rep: dict[str, np.ndarray] = {}
        if present is None:
            shared = design
        else:
            shared = {}
            per_rep.update({k: np.ascontiguousarray(v) for k, v in design.items()})
            per_rep["present"] = present
            y[~present] = np.nan
        info = {"n_clusters": n_clusters, "periods": periods, "m": self.m, "sampling": self.sampling}
        apply_missing(self.missing, rng, y, {"cluster": cluster, "period": period, "treat": treat}, per_rep, info,
                      present=present)
        per_rep["y"] = y
        return Batch(size, per_rep, shared, info)

    # -- words ------------------------------------------------------------------------
    def true_effect(self):
        return float(self.effect)

    def describe(self):
        x = self.sequence_matrix
        if self.steps is not None:
            b, t = self.baseline_periods, self.periods_per_step
            design = (f"a standard stepped wedge of {self.steps} steps ({b} baseline period{'s' * (b != 1)}, "
                      f"{t} period{'s' * (t != 1)} per step)")
        else:
            rows = ["".join(NOT_MEASURED if np.isnan(v) else str(int(v)) for v in row) for row in x]
            design = f"sequences {' / '.join(rows)}"
        corr = {"exchangeable": "a random cluster intercept",
                "nested": f"cluster and cluster-period effects (cluster autocorrelation {self.cac:g})",
                "exponential": f"cluster-period effects decaying over periods (correlation {self.cac:g}^lag)"}
        sampling = ("new individuals every period" if self.sampling == "cross_sectional" else
                    f"a cohort followed up (individual autocorrelation {self.individual_autocorr:g})")
        if self.outcome == "normal":
            out = f"normal outcomes (mean {self.mean:g}, total SD {self.sd:g})"
        elif self.outcome == "binary":
            out = f"binary outcomes (control risk {self.p0:g} at a zero random effect, logit link)"
        else:
            out = f"counts (control rate {self.rate0:g} at a zero random effect, log link)"
        c = self.clusters_per_sequence
        sizes = (f"{self.m} individuals per cluster-period" if self.cluster_size_cv == 0 else
                 f"a mean of {self.m} individuals per cluster-period (cluster sizes with CV {self.cluster_size_cv:g})")
        text = (f"{design}, {c} cluster{'s' * (c != 1)} per sequence ({self.n_clusters} clusters, "
                f"{self.periods} periods); {sizes}, {sampling}; {out}; "
                f"ICC {self.icc:g} with {corr[self.structure]}; treatment effect {self.effect:g} "
                f"({self.estimand_label})")
        if self.missing is not None:
            text += f"; missing outcomes: {self.missing.describe()}"
        return text
