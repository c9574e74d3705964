"""Closed-form power, required sample size, minimal detectable effect, design effects.

The bottom layer of simpower: numpy and scipy only. Every function broadcasts
its numeric arguments, returns a Python float for scalar input and an ndarray
otherwise, and raises :class:`simpower.errors.ParameterError` on bad input.
Effects are raw differences with an ``sd`` argument (default 1, so effect =
Cohen's d); two-arm designs take ``n`` = control-arm size and ``ratio`` =
treatment / control size. ``alternative`` is "two-sided", "greater" (H1:
effect > 0) or "less". Two-sided power counts both rejection tails, and the
``*_n`` / ``*_effect`` functions invert the power functions exactly.

Group-sequential designs (boundaries from spending functions or the classical
Pocock / O'Brien-Fleming shapes, exit probabilities, inflation factors,
expected information) live in :mod:`.groupseq`.

See ``docs/analytic.md`` for formulas and sources.
"""

from .ancova import ancova_effect, ancova_n, ancova_power
from .arcsine import arcsine_effect, arcsine_n, arcsine_power, cohen_h
from .assurance import assurance_ceiling, normal_prior_assurance, two_sample_z_se
from .bayes import beta_binomial_rule_power, beta_difference_probability, calibrate_eta, normal_rule_power
from .binomial import binom_exact_effect, binom_exact_n, binom_exact_power, binom_exact_region
from .correlation import corr_effect, corr_n, corr_power
from .crossover import crossover_n, crossover_power, crossover_tost_n, crossover_tost_power
from .design import ceil_n, clusters_per_arm, design_effect, inflate_for_dropout
from .equivalence import tost_power, welch_tost_power
from .freedman import freedman_events, freedman_power
from .groupseq import (
    BetaSpending,
    Boundaries,
    Crossing,
    boundaries,
    classical,
    crossing_probabilities,
    drift_for_power,
    expected_information,
    inflation_factor,
    naive_alpha,
    spending,
)
from .mmrm import mmrm_inflation, mmrm_n, mmrm_power
from .multiarm import (anova_effect, anova_n, anova_power, box_probability, cohen_f, dunnett_critical,
                       dunnett_power, dunnett_pvalues, many_to_one_corr, many_to_one_lambdas)
from .noether import noether_effect, noether_n, noether_power, superiority_normal
from .normal import z_critical, z_effect, z_n, z_power
from .ordinal import po_shift, whitehead_factor, whitehead_n, whitehead_power
from .proportions import prop2_effect, prop2_n, prop2_power
from .rates import rate_ratio_effect, rate_ratio_n, rate_ratio_power
from .survival import schoenfeld_events, schoenfeld_power
from .ttest import t_effect, t_n, t_power
from .welch import welch_df, welch_effect, welch_n, welch_power

__all__ = [
    "ancova_effect", "ancova_n", "ancova_power",
    "arcsine_effect", "arcsine_n", "arcsine_power", "cohen_h",
    "assurance_ceiling", "normal_prior_assurance", "two_sample_z_se",
    "beta_binomial_rule_power", "beta_difference_probability", "calibrate_eta", "normal_rule_power",
    "binom_exact_effect", "binom_exact_n", "binom_exact_power", "binom_exact_region",
    "ceil_n", "clusters_per_arm", "design_effect", "inflate_for_dropout",
    "corr_effect", "corr_n", "corr_power",
    "crossover_n", "crossover_power", "crossover_tost_n", "crossover_tost_power",
    "freedman_events", "freedman_power",
    "BetaSpending", "Boundaries", "Crossing", "boundaries", "classical", "crossing_probabilities", "drift_for_power",
    "expected_information", "inflation_factor", "naive_alpha", "spending",
    "anova_effect", "anova_n", "anova_power", "box_probability", "cohen_f", "dunnett_critical", "dunnett_power",
    "dunnett_pvalues", "many_to_one_corr", "many_to_one_lambdas",
    "mmrm_inflation", "mmrm_n", "mmrm_power",
    "noether_effect", "noether_n", "noether_power", "superiority_normal",
    "po_shift", "whitehead_factor", "whitehead_n", "whitehead_power",
    "prop2_effect", "prop2_n", "prop2_power",
    "rate_ratio_effect", "rate_ratio_n", "rate_ratio_power",
    "schoenfeld_events", "schoenfeld_power",
    "t_effect", "t_n", "t_power", "tost_power",
    "welch_df", "welch_effect", "welch_n", "welch_power", "welch_tost_power",
    "z_critical", "z_effect", "z_n", "z_power",
]
