"""The analytic cross-check in one table: (analysis, process facts) -> closed-form power.

A process states what it draws as typed facts (:mod:`simpower.facts`, returned
by :meth:`Process.facts`); an analysis is known here by its registered name.
:data:`TABLE` maps ``(analysis name, fact type)`` to a :class:`ClosedForm`: a
function ``(analysis, facts, alpha) -> power or None`` (None: this
configuration of the pair has no closed form in :mod:`simpower.analytic`), whether the
value is exact, and the source of the formula.

:func:`power` looks a pair up: the facts are tried in the order the process
gives them, and the first entry that returns a number wins; a process whose
facts no entry covers gets None, never a number meant for something else.
:meth:`Analysis.analytic_power` consults it (a subclass may still override
that method), and :meth:`Scenario.analytic_power` and the required-n search's
closed-form reference (:mod:`simpower.planning.search`) go through that method.

An analysis class inherits the entries of its base classes: the table is read
under the first name along the class's method resolution order that has any.

To give a new process a closed form, return facts from its ``facts()``; to give
a new analysis one, add an entry here (see DEVELOPERS.md).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

from . import analytic
from .analytic import stepped as stepped_forms
from .facts import (BinaryFacts, ClusterBinaryFacts, ClusterFacts, CrossoverFacts, MultiArmFacts, NormalFacts,
                    OrdinalFacts, RepeatedFacts, SteppedFacts, SurvivalFacts)

PowerFn = Callable[[Any, Any, float], "float | None"]


@dataclass(frozen=True)
class ClosedForm:
    """One entry: the closed form of ``analysis`` for processes stating ``facts``."""

    analysis: str
    facts: type
    power: PowerFn
    #: True, False, or a function of the analysis (e.g. exact only for the pooled-variance variant)
    exact: bool | Callable[[Any], bool]
    source: str

    def is_exact(self, analysis) -> bool:
        return bool(self.exact(analysis) if callable(self.exact) else self.exact)


# -- closed forms ---------------------------------------------------------------------
def _t_test(a, f: NormalFacts, alpha):
    if f.sd is None or f.design == "paired":
        return None
    return analytic.t_power(f.effect - a.null_mean, f.n, sd=f.sd, alpha=alpha, alternative=a.alternative,
                            design=f.design, ratio=f.ratio)


def _welch_t(a, f: NormalFacts, alpha):
    if f.design != "two-sample":
        return None
    return analytic.welch_power(f.effect - a.null_mean, f.n, sd0=f.sd0, sd1=f.sd1, ratio=f.ratio, alpha=alpha,
                                alternative=a.alternative)


def _paired_t(a, f: NormalFacts, alpha):
    if f.design != "paired":
        return None
    return analytic.t_power(f.effect - a.null_mean, f.n, sd=f.sd, alpha=alpha, alternative=a.alternative,
                            design="paired")


def _z_test(a, f: NormalFacts, alpha):
    """The test's assumed SDs must be the process's: a z-test with a wrong known SD has another power."""
    if f.design == "paired":
        return None
    if f.design == "one-sample":
        if not math.isclose(f.sd, a.sd):
            return None
        return analytic.z_power(f.effect - a.null_mean, f.n, sd=a.sd, alpha=alpha, alternative=a.alternative,
                                design="one-sample")
    sd1 = a.sd if a.sd1 is None else a.sd1
    if not (math.isclose(f.sd0, a.sd) and math.isclose(f.sd1, sd1)) or f.sd is None:
        return None
    return analytic.z_power(f.effect - a.null_mean, f.n, sd=a.sd, alpha=alpha, alternative=a.alternative,
                            design="two-sample", ratio=f.ratio)


def _tost(a, f: NormalFacts, alpha):
    if f.design not in ("one-sample", "two-sample"):
        return None
    low, high = a.bounds
    if f.design == "one-sample":
        return analytic.tost_power(f.effect, f.n, low=low, high=high, sd=f.sd, alpha=alpha, design="one-sample")
    if a.equal_var:
        if f.sd is None:
            return None
        return analytic.tost_power(f.effect, f.n, low=low, high=high, sd=f.sd, alpha=alpha, design="two-sample",
                                   ratio=f.ratio)
    return analytic.welch_tost_power(f.effect, f.n, low=low, high=high, sd0=f.sd0, sd1=f.sd1, ratio=f.ratio,
                                     alpha=alpha)


def _non_inferiority(a, f: NormalFacts, alpha):
    """The one-sided (pooled or Welch) t-test of H0: theta = -margin (or +margin), shifted by the margin."""
    if f.design not in ("one-sample", "two-sample"):
        return None
    value, alt = (-a.margin, "greater") if a.higher_is_better else (a.margin, "less")
    shift = f.effect - value
    if f.design == "one-sample":
        return analytic.t_power(shift, f.n, sd=f.sd, alpha=alpha, alternative=alt, design="one-sample")
    if a.equal_var:
        if f.sd is None:
            return None
        return analytic.t_power(shift, f.n, sd=f.sd, alpha=alpha, alternative=alt, design="two-sample",
                                ratio=f.ratio)
    return analytic.welch_power(shift, f.n, sd0=f.sd0, sd1=f.sd1, ratio=f.ratio, alpha=alpha, alternative=alt)


def _two_proportions(a, f: BinaryFacts, alpha):
    return analytic.prop2_power(f.p0, f.p1, f.n, ratio=f.ratio, alpha=alpha, alternative=a.alternative,
                                continuity=a.continuity)


def _logrank(a, f: SurvivalFacts, alpha):
    return analytic.schoenfeld_power(f.hazard_ratio, f.events, alpha=alpha, alternative=a.alternative,
                                     ratio=f.ratio)


def _cluster_means_t(a, f: ClusterFacts, alpha):
    """Equal clusters randomised whole, one SD: the cluster means are i.i.d. normal in each arm.

    Their variance is ``sigma_b^2 + sigma_w^2 / m``, so Student's t-test on them has
    noncentral-t power with df = 2k - 2 (Donner & Klar 2000, ch. 6); with equal sizes
    the size-weighted variant is the same test.
    """
    if not f.equal_sizes or f.randomise != "cluster" or f.slope_sd != 0 or f.sd1 != f.sd:
        return None
    m = int(f.cluster_size)
    between, within = f.sd * math.sqrt(f.icc), f.sd * math.sqrt(1.0 - f.icc)
    sd_means = math.sqrt(between**2 + within**2 / m)
    return analytic.t_power(f.effect, f.clusters, sd=sd_means, alpha=alpha, alternative=a.alternative,
                            design="two-sample")


def cluster_binary_power(f: ClusterBinaryFacts, alpha: float, alternative: str, cv: float) -> float:
    """Two-proportion power at the effective size k m / DE per arm, DE = 1 + ((1 + cv^2) m - 1) icc.

    The design effect of Eldridge, Ashby & Kerry (2006) for sizes with coefficient of variation ``cv``
    (Donner & Klar 2000 for equal sizes, cv = 0), with the ICC of the 0/1 outcomes; the two-proportion
    normal approximation with pooled SE under H0 (Fleiss, Levin & Paik 2003, ch. 4).
    """
    de = analytic.design_effect(f.cluster_size, f.icc, cv=cv)
    return analytic.prop2_power(f.p0, f.p1, f.clusters * f.cluster_size / de, alpha=alpha, alternative=alternative)


def _cluster_means_binary(a, f: ClusterBinaryFacts, alpha):
    """Size-weighted: Eldridge's design effect; equal weights: only for equal clusters (where both coincide)."""
    if f.randomise != "cluster" or (a.weights == "equal" and not f.equal_sizes):
        return None
    return cluster_binary_power(f, alpha, a.alternative, f.cluster_size_cv)


def _gee_binary(a, f: ClusterBinaryFacts, alpha):
    """The default mean model (y ~ arm) tested on `arm`: the risk difference, sized by the design effect."""
    if f.randomise != "cluster" or getattr(a, "formula", None) is not None or getattr(a, "term", "arm") != "arm":
        return None
    return cluster_binary_power(f, alpha, a.alternative, f.cluster_size_cv)


def _dunnett(a, f: MultiArmFacts, alpha):
    """Power to reject at least one comparison (the primary p-value of ``dunnett``)."""
    parts = dunnett_parts(a, f, alpha)
    return parts["any"]


def dunnett_parts(a, f: MultiArmFacts, alpha) -> dict:
    """Exact per-comparison, any- and all-rejection power of Dunnett's test (:func:`analytic.dunnett_power`)."""
    return analytic.dunnett_power(list(f.means[1:]), f.sizes[0], sd=f.sd, alpha=alpha,
                                  alternative=a.alternative, allocation=list(f.sizes))


def _anova_f(a, f: MultiArmFacts, alpha):
    cohen = analytic.cohen_f(list(f.means), list(f.sizes), f.sd)
    return analytic.anova_power(cohen, f.sizes[0], len(f.sizes), alpha, allocation=list(f.sizes))


def _posterior_normal(a, f: NormalFacts, alpha):
    """The normal rule with a known SD that is the process's (both arms): exact (``analytic.bayes``)."""
    if a.model != "normal" or a.sd is None or f.design != "two-sample" or f.sd is None or not math.isclose(f.sd, a.sd):
        return None
    return analytic.normal_rule_power(f.effect, f.n, round(f.n * f.ratio), sd=a.sd, threshold=a.threshold,
                                      eta=a.eta, prior_mean=a.prior_mean,
                                      prior_sd=math.inf if a.prior_sd is None else a.prior_sd, direction=a.direction)


def _posterior_binary(a, f: BinaryFacts, alpha):
    """The beta-binomial rule: exact, by enumeration of the outcome tables (``analytic.bayes``)."""
    if a.model != "beta_binomial":
        return None
    return analytic.beta_binomial_rule_power(f.p0, f.p1, f.n, round(f.n * f.ratio), threshold=a.threshold,
                                             eta=a.eta, prior0=(a.prior_a0, a.prior_b0),
                                             prior1=(a.prior_a1, a.prior_b1), direction=a.direction)


def _crossover_t(a, f: CrossoverFacts, alpha):
    """Noncentral t on the period differences; a carryover shifts the estimate's mean by -carryover/2."""
    if a.scale != f.scale:
        return None
    return analytic.crossover_power(f.effect - f.carryover / 2, f.n_ab, sd_within=f.sd_within, alpha=alpha,
                                    alternative=a.alternative, ratio=f.n_ba / f.n_ab)


def _crossover_tost(a, f: CrossoverFacts, alpha):
    if a.scale != f.scale:
        return None
    shift = f.effect - f.carryover / 2
    if f.scale == "log":
        low, high = a.bounds
        return analytic.crossover_tost_power(math.exp(shift), f.n_ab, cv_within=math.sqrt(math.expm1(f.sd_within**2)),
                                             low=low, high=high, alpha=alpha, ratio=f.n_ba / f.n_ab)
    low, high = a.bounds
    return analytic.tost_power(shift, f.n_ab, low=low, high=high, sd=f.sd_within / math.sqrt(2.0), alpha=alpha,
                               design="two-sample", ratio=f.n_ba / f.n_ab)


def _proportional_odds(a, f: OrdinalFacts, alpha):
    """Whitehead (1993): the normal approximation to the test of log OR with its variance at OR = 1."""
    return analytic.whitehead_power(list(f.p0), f.odds_ratio, f.n, p1=list(f.p1), ratio=f.ratio, alpha=alpha,
                                    alternative=a.alternative)


def _dichotomised(a, f: OrdinalFacts, alpha):
    """The two-proportion test of the shares at or above the cut (categories coded 0..K-1)."""
    k = len(f.p0)
    if not (0 < a.cut <= k - 1):
        return None
    first = int(math.ceil(a.cut))
    return analytic.prop2_power(sum(f.p0[first:]), sum(f.p1[first:]), f.n, ratio=f.ratio, alpha=alpha,
                                alternative=a.alternative, continuity=a.continuity)


def _stepped_wedge(a, f: SteppedFacts, alpha):
    """GLS variance of theta with the true variance components, Wald (or t, clusters - 2) power.

    Only where the fitted model is the process's: a random cluster intercept for an exchangeable
    process, cluster + cluster-period effects for a nested (or exchangeable) one, and no
    persistent individual effects (cross-sectional, or a cohort with individual_autocorr 0).
    """
    if f.individual_autocorr != 0 or f.structure == "exponential":
        return None
    if a.structure == "exchangeable" and f.structure != "exchangeable":
        return None
    design = [row for row in f.sequences for _ in range(f.clusters_per_sequence)]
    x = [[math.nan if v is None else v for v in row] for row in design]
    var = stepped_forms.gls_variance(x, f.m, f.icc, f.cac, f.structure, "cross_sectional", 0.0, f.sd)
    df = None if a.df == "wald" else float(len(design) - 2)
    return stepped_forms.stepped_power(f.effect, var, alpha, a.alternative, df)


#: MMRM covariance structures that contain the process's correlation structure
_MMRM_FITS = {"unstructured": ("exchangeable", "ar1"), "toeplitz": ("exchangeable", "ar1"),
              "cs": ("exchangeable",), "ar1": ("ar1",)}


def _mmrm(a, f: RepeatedFacts, alpha):
    """The final-visit contrast without covariates, under a covariance model that holds for the process."""
    if a.contrast != "final" or a.baseline or f.structure not in _MMRM_FITS[a.covariance]:
        return None
    return analytic.mmrm_power(f.effect, f.n, cov=f.cov, retention=f.retention, alpha=alpha,
                               alternative=a.alternative, ratio=f.ratio)


def _group_sequential(a, f: NormalFacts, alpha):
    """A z-test at group-sequential looks (z scale, the inner test's known SDs are the process's): the design's
    rejection probability under drift = theta / SE(final look) (Jennison & Turnbull 2000, ch. 19)."""
    inner = a.inner
    if getattr(inner, "name", None) != "z_test" or a.scale != "z" or f.design != "two-sample":
        return None
    sd1 = inner.sd if inner.sd1 is None else inner.sd1
    if f.sd0 is None or not (math.isclose(f.sd0, inner.sd) and math.isclose(f.sd1, sd1)):
        return None
    se = math.sqrt(inner.sd**2 / f.n + sd1**2 / (f.n * f.ratio))
    drift = (f.effect - inner.null_mean) / se
    if inner.alternative == "less":
        drift = -drift
    return analytic.crossing_probabilities(a.design(), drift).rejection


def _pooled(a) -> bool:
    return bool(a.equal_var)  # the Welch variant's closed form is an approximation


NONCENTRAL_T = "noncentral t (Cohen 1988, ch. 2)"
CLUSTER_BINARY = ("two-proportion normal approximation at n / design effect, DE = 1 + ((1 + cv^2) m - 1) ICC "
                  "(Eldridge, Ashby & Kerry 2006; Donner & Klar 2000 for equal sizes), ICC of the 0/1 outcomes")
_ENTRIES = (
    ClosedForm("t_test", NormalFacts, _t_test, True, NONCENTRAL_T),
    ClosedForm("welch_t", NormalFacts, _welch_t, False,
               "noncentral t with Welch-Satterthwaite df (Satterthwaite 1946; Welch 1947)"),
    ClosedForm("paired_t", NormalFacts, _paired_t, True, NONCENTRAL_T),
    ClosedForm("z_test", NormalFacts, _z_test, True, "normal distribution of the z statistic (common practice)"),
    ClosedForm("tost", NormalFacts, _tost, _pooled,
               "TOST power integral (Schuirmann 1987; Phillips 1990); Welch-Satterthwaite df if not pooled"),
    ClosedForm("non_inferiority", NormalFacts, _non_inferiority, _pooled,
               NONCENTRAL_T + "; Welch-Satterthwaite df if not pooled"),
    ClosedForm("two_proportions", BinaryFacts, _two_proportions, False,
               "normal approximation, pooled SE under H0 (Fleiss, Levin & Paik 2003, ch. 4)"),
    ClosedForm("logrank", SurvivalFacts, _logrank, False,
               "Schoenfeld (1981) approximation at the expected number of events"),
    ClosedForm("cluster_means_t", ClusterFacts, _cluster_means_t, True,
               "noncentral t on cluster means (Donner & Klar 2000, ch. 6)"),
    ClosedForm("cluster_means_t", ClusterBinaryFacts, _cluster_means_binary, False, CLUSTER_BINARY),
    ClosedForm("gee", ClusterBinaryFacts, _gee_binary, False, CLUSTER_BINARY),
    ClosedForm("dunnett", MultiArmFacts, _dunnett, True,
               "many-to-one multivariate noncentral t (Dunnett 1955; Dunnett & Tamhane 1991)"),
    ClosedForm("anova_f", MultiArmFacts, _anova_f, True, "noncentral F with Cohen's f (Cohen 1988, ch. 8)"),
    ClosedForm("posterior_probability", NormalFacts, _posterior_normal, True,
               "conjugate normal update, rule d > c (Spiegelhalter, Abrams & Myles 2004, ch. 3)"),
    ClosedForm("posterior_probability", BinaryFacts, _posterior_binary, True,
               "beta-binomial rule, exact sum over the outcome tables"),
    ClosedForm("crossover_t", CrossoverFacts, _crossover_t, True,
               "noncentral t on the period differences (Senn 2002, ch. 3; Jones & Kenward 2003, ch. 2)"),
    ClosedForm("crossover_tost", CrossoverFacts, _crossover_tost, True,
               "TOST power integral on the period differences (Schuirmann 1987; Phillips 1990)"),
    ClosedForm("proportional_odds", OrdinalFacts, _proportional_odds, False,
               "Whitehead (1993), large-sample score variance at OR = 1 with the arms' mean category shares"),
    ClosedForm("dichotomised", OrdinalFacts, _dichotomised, False,
               "normal approximation, pooled SE under H0 (Fleiss, Levin & Paik 2003, ch. 4), on the shares >= cut"),
    # not exact: the variance components are estimated (power with known components, the normal or
    # t(clusters - 2) reference; the Wald test's level and power differ with few clusters)
    ClosedForm("sw_mixed", SteppedFacts, _stepped_wedge, False,
               "GLS variance with known variance components (Hussey & Hughes 2007; Hooper et al. 2016)"),
    # not exact: look k analyses round(t_k n) per arm, so the information fractions differ slightly from the
    # planned ones unless every t_k n is whole
    ClosedForm("group_sequential", NormalFacts, _group_sequential, False,
               "exit probabilities by recursive integration at the planned fractions (Armitage, McPherson & Rowe "
               "1969; Jennison & Turnbull 2000, ch. 19)"),
    ClosedForm("mmrm", RepeatedFacts, _mmrm, False,
               "normal approximation with the MMRM variance inflation under monotone dropout (Lu, Luo & Chen 2008)"),
)

#: (analysis name, fact type) -> closed form
TABLE: dict[tuple[str, type], ClosedForm] = {(e.analysis, e.facts): e for e in _ENTRIES}


# -- look-ups -------------------------------------------------------------------------
def entries(analysis) -> dict[type, ClosedForm]:
    """The entries of ``analysis``: fact type -> closed form (empty when the table has none).

    Read under the first name along the class's MRO that has entries, so a subclass of a
    built-in analysis inherits its closed forms.
    """
    for cls in type(analysis).__mro__:
        name = cls.__dict__.get("name")
        if not isinstance(name, str):
            continue
        found = {facts: e for (a, facts), e in TABLE.items() if a == name}
        if found:
            return found
    return {}


def _entry_for(table: dict[type, ClosedForm], fact) -> ClosedForm | None:
    for t in type(fact).__mro__:
        if t in table:
            return table[t]
    return None


def power(analysis, process, alpha: float) -> float | None:
    """Closed-form power of ``analysis`` for ``process`` at level ``alpha``, or None if no entry covers them."""
    table = entries(analysis)
    if not table:
        return None
    for fact in process.facts():
        entry = _entry_for(table, fact)
        if entry is None:
            continue
        value = entry.power(analysis, fact, alpha)
        if value is not None:
            return float(value)
    return None


def covering(analysis, process) -> ClosedForm | None:
    """The entry whose closed form :func:`power` uses for ``process`` (None when no entry covers them)."""
    table = entries(analysis)
    if not table:
        return None
    for fact in process.facts():
        entry = _entry_for(table, fact)
        if entry is not None and entry.power(analysis, fact, 0.05) is not None:
            return entry
    return None


def is_exact(analysis, process=None) -> bool:
    """Whether the analysis's closed forms are exact (True also when it has none, the default).

    With ``process``: whether the closed form it gets for that process is exact (an analysis may have
    an exact entry for one kind of facts and an approximation for another, e.g. the cluster-means t).
    """
    if process is not None:
        entry = covering(analysis, process)
        return True if entry is None else entry.is_exact(analysis)
    return all(e.is_exact(analysis) for e in entries(analysis).values())
