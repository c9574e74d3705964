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
from .facts import BinaryFacts, ClusterFacts, MultiArmFacts, NormalFacts, RepeatedFacts, SurvivalFacts

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


#: MMRM covariance structures that contain the process's correlation structure
_MMRM_FITS = {"unstructured": ("exchangeable", "ar1"), "toeplitz": ("exchangeable", "ar1"),
              "cs": ("exchangeable",), "ar1": ("ar1",)}


def _mmrm(a, f: RepeatedFacts, alpha):
    """The final-visit contrast without covariates, under a covariance model that holds for the process."""
    if a.contrast != "final" or a.baseline or f.structure not in _MMRM_FITS[a.covariance]:
        return None
    return analytic.mmrm_power(f.effect, f.n, cov=f.cov, retention=f.retention, alpha=alpha,
                               alternative=a.alternative, ratio=f.ratio)


def _pooled(a) -> bool:
    return bool(a.equal_var)  # the Welch variant's closed form is an approximation


NONCENTRAL_T = "noncentral t (Cohen 1988, ch. 2)"
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
    ClosedForm("dunnett", MultiArmFacts, _dunnett, True,
               "many-to-one multivariate noncentral t (Dunnett 1955; Dunnett & Tamhane 1991)"),
    ClosedForm("anova_f", MultiArmFacts, _anova_f, True, "noncentral F with Cohen's f (Cohen 1988, ch. 8)"),
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


def is_exact(analysis) -> bool:
    """Whether the analysis's closed forms are exact (True also when it has none, the default)."""
    return all(e.is_exact(analysis) for e in entries(analysis).values())
