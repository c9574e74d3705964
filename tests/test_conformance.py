"""Every registered process and analysis passes the public conformance kit (simpower.testing).

The kit checks the contract written in DEVELOPERS.md ("Contracts"): spec round
trip, seeds honoured, long tables, batch path equal to the per-replicate path,
missing outcomes handled, p-values in [0, 1]. The batch-versus-per-replicate
comparisons are checks against an independent computation in the sense that
the per-replicate paths are the scipy/statsmodels calls the other test files
check against their sources; the tolerance (rtol 1e-7) is floating-point
agreement, not Monte Carlo error (common practice: two exact formulas of one
statistic agree to rounding).

Each analysis is paired with a built-in process of the layout it analyses
(:data:`PAIRS`); an analysis with no compatible built-in process would be listed
in :data:`NO_PROCESS` with the reason. The kit itself is tested on broken
components at the end of this file, so a kit that let everything through
would fail here.
"""

from __future__ import annotations

import random

import numpy as np
import pytest

import simpower as sp
from simpower import registry
from simpower.constraints import Int, Real
from simpower.registry import build
from simpower.testing import check_analysis, check_component, check_process

# -- one small configuration per registered process (more where a variant has its own code path) --
PROCESSES = {
    "binary_two_arm": {"n": 30, "p0": 0.3, "odds_ratio": 2.0},
    "binary_two_arm/missing": {"n": 30, "p0": 0.3, "risk_ratio": 1.5, "missing": {"type": "mcar", "rate": 0.2}},
    "cluster_trial": {"clusters": 4, "cluster_size": 5, "icc": 0.05, "effect": 0.5},
    "cluster_trial/variable": {"clusters": 4, "cluster_size": 6, "cluster_size_cv": 0.5, "icc": 0.05,
                               "effect": 0.5},
    "crossover": {"n": 6, "ratio": 1.5, "effect": 0.5, "period_effect": 0.2, "carryover": 0.1},
    "crossover/log": {"n": 6, "scale": "log", "cv_within": 0.25, "effect": 0.95, "dropout": 0.2},
    "crossover/missing": {"n": 6, "effect": 0.5, "dropout": 0.2, "missing": {"type": "mar", "on": "period",
                                                                          "rate": 0.2}},
    "count_two_arm": {"n": 15, "rate0": 2.0, "rate_ratio": 1.5, "dispersion": 0.5},
    "multi_arm": {"effects": [0.0, 0.3, 0.6], "n": 8},
    "normal_one_sample": {"n": 10, "effect": 0.4},
    "normal_paired": {"n": 10, "effect": 0.4},
    "normal_two_arm": {"n": 10, "effect": 0.5},
    "pilot_resample": {"n": 10, "values": [3.0, 5.5, 2.0, 8.0, 4.5, 6.0], "arm_values": [0, 0, 0, 1, 1, 1],
                       "effect": 1.0, "spread": "inflate"},
    "pilot_resample/missing": {"n": 10, "values": [0.0, 1.0, 1.0, 0.0, 0.0], "effect": 2.0,
                               "effect_type": "odds_ratio", "missing": {"type": "mcar", "rate": 0.2}},
    "pilot_units": {"clusters": 3, "table": {"y": [3.0, 5.5, 2.0, 8.0, 4.5, 6.0, 7.0, 1.5], "unit": [1, 1, 2, 2, 2, 3, 3, 4],
                                             "arm": [0, 0, 1, 1, 1, 0, 0, 1]}, "effect": 1.0, "spread": "inflate",
                    "missing": {"type": "mcar", "rate": 0.2}},
    "pilot_units/visits": {"n": 4, "table": {"y": [3.0, 5.5, 2.0, 8.0, 4.5, 6.0, 7.0], "unit": ["a", "a", "b", "b", "c",
                                                                                               "c", "d"],
                                             "visit": [0, 1, 0, 1, 0, 1, 1]}, "effect": 1.0, "effect_from": 1},
    "ordinal_two_arm": {"n": 20, "p0": [0.2, 0.3, 0.3, 0.2], "odds_ratio": 1.8},
    "ordinal_two_arm/p1": {"n": 20, "p0": [0.3, 0.4, 0.3], "p1": [0.2, 0.2, 0.6],
                           "missing": {"type": "mcar", "rate": 0.2}},
    "repeated_measures": {"n": 8, "visits": 3, "rho": 0.5, "effect": 0.5},
    "repeated_measures/dropout": {"n": 8, "visits": 3, "rho": 0.5, "effect": 0.5, "dropout_rate": 0.2},
    "stepped_wedge": {"steps": 3, "m": 3, "icc": 0.1, "effect": 0.5},
    "stepped_wedge/cohort": {"sequences": [[0, 1, 1], [0, 0, 1], [0, "-", 1]], "cluster_size_cv": 0.4, "clusters_per_sequence": 2, "m": 3, "icc": 0.1,
                             "structure": "exponential", "cac": 0.5, "sampling": "cohort", "individual_autocorr": 0.3,
                             "outcome": "binary", "p0": 0.3, "effect": 0.5, "missing": {"type": "mcar", "rate": 0.2}},
    "survival_two_arm": {"n": 15, "median": 1.0, "hazard_ratio": 0.6, "follow_up": 2.0},
    "trial": {"design": {"type": "arms", "n": 10, "n1": 14}, "effect": 0.5},
    "trial/clusters": {"design": {"type": "clusters", "clusters": 4, "cluster_size": 6, "cluster_size_cv": 0.4,
                                  "icc": 0.05}, "outcome": {"type": "lognormal", "median": 1.0, "cv": 0.5},
                       "effect": 0.3, "missing": {"type": "mcar", "rate": 0.2}},
    "trial/binary": {"design": {"type": "clusters", "clusters": 4, "cluster_size": 6, "cluster_size_cv": 0.4,
                                "icc": 0.05}, "outcome": {"type": "binary", "p0": 0.3, "risk_ratio": 1.5,
                                                          "effect_scale": "marginal", "icc_scale": "proportion"},
                     "missing": {"type": "mcar", "rate": 0.2}},
    "trial/count": {"design": {"type": "clusters", "clusters": 4, "cluster_size": 5, "icc": 0.1},
                    "outcome": {"type": "count", "rate0": 2.0, "rate_ratio": 1.5, "dispersion": 2.0,
                                "exposure_cv": 0.3}},
    "trial/gaussian": {"design": {"type": "clusters", "clusters": 4, "cluster_size": 6, "cluster_size_cv": 0.4,
                                  "icc": 0.05, "randomise": "individual"},
                       "outcome": {"type": "gaussian", "mean0": 1.0, "sd": 2.0, "effect": 0.5, "slope_sd": 0.3},
                       "missing": {"type": "mcar", "rate": 0.2}},
    "trial/baseline": {"design": {"type": "arms", "n": 10, "baseline_corr": 0.4},
                       "outcome": {"type": "gamma", "mean": 2.0, "cv": 0.5}, "effect": 0.3,
                       "missing": {"type": "mar", "on": "baseline", "rate": 0.2}},
    "trial/time_to_event": {"design": {"type": "clusters", "clusters": 4, "cluster_size": 6, "cluster_size_cv": 0.4,
                                       "icc": 0.1, "randomise": "individual"},
                            "outcome": {"type": "time_to_event", "median": 1.0, "hazard_ratio": 0.6, "shape": 1.5,
                                        "accrual": 1.0, "follow_up": 2.0, "dropout_rate": 0.1}},
    "trial/time_to_event_arms": {"design": {"type": "arms", "n": 15}, "outcome": {
        "type": "time_to_event", "hazard0": 0.5, "hazard_ratio": 0.6, "follow_up": 2.0, "time_resolution": 0.1}},
    "trial/ordinal": {"design": {"type": "clusters", "clusters": 4, "cluster_size": 6, "cluster_size_cv": 0.4,
                                 "icc": 0.1}, "outcome": {"type": "ordinal", "p0": [0.2, 0.3, 0.3, 0.2],
                                                          "odds_ratio": 1.8},
                      "missing": {"type": "mcar", "rate": 0.2}},
    "trial/ordinal_p1": {"design": {"type": "clusters", "clusters": 4, "cluster_size": 5, "icc": 0.1},
                         "outcome": {"type": "ordinal", "p0": [0.3, 0.4, 0.3], "p1": [0.2, 0.2, 0.6]}},
    "trial/visits": {"design": {"type": "visits", "n": 6, "visits": 3, "correlation": "ar1", "rho": 0.4},
                     "outcome": {"type": "lognormal", "median": 1.0, "cv": 0.5}, "effect": 0.3,
                     "missing": {"type": "dropout", "rate": 0.2, "mar_slope": 1.0,
                                 "intermittent": {"type": "mcar", "rate": 0.1}}},
    "two_arm": {"n": 10, "effect": 0.5, "baseline_corr": 0.5},
    "two_arm/lognormal": {"n": 10, "outcome": {"type": "lognormal", "median": 1.0, "cv": 0.5}, "effect": 1.3,
                          "effect_type": "ratio", "missing": {"type": "mcar", "rate": 0.2}},
}

TWO_ARM = ("normal_two_arm", {"n": 12, "effect": 0.5})
BINARY = ("binary_two_arm", {"n": 30, "p0": 0.3, "odds_ratio": 2.5})
CLUSTERS = ("cluster_trial", {"clusters": 4, "cluster_size": 5, "icc": 0.05, "effect": 0.5})
SURVIVAL = ("survival_two_arm", {"n": 15, "median": 1.0, "hazard_ratio": 0.6, "follow_up": 2.0})
COUNTS = ("count_two_arm", {"n": 15, "rate0": 2.0, "rate_ratio": 1.5, "dispersion": 0.5})
PAIRED = ("normal_paired", {"n": 10, "effect": 0.4})
CROSSOVER = ("crossover", {"n": 8, "ratio": 1.5, "effect": 0.5, "dropout": 0.25})
CROSSOVER_LOG = ("crossover", {"n": 8, "scale": "log", "cv": 0.3, "effect": 0.95, "dropout": 0.25})
ORDINAL = ("ordinal_two_arm", {"n": 25, "p0": [0.2, 0.3, 0.3, 0.2], "odds_ratio": 1.8})
STEPPED = ("stepped_wedge", {"steps": 3, "clusters_per_step": 2, "m": 4, "icc": 0.1, "structure": "nested", "cac": 0.8,
                             "effect": 0.5})

# -- analysis configuration -> the process whose layout it analyses --------------------------------
PAIRS = [
    ({"type": "ancova"}, ("two_arm", {"n": 12, "effect": 0.5, "baseline_corr": 0.5})),
    ({"type": "bootstrap_ci", "n_resamples": 199}, TWO_ARM),
    ({"type": "chi_square"}, BINARY),
    ({"type": "cluster_means_t"}, CLUSTERS),
    ({"type": "cluster_means_t", "weights": "size"}, ("cluster_trial", {**CLUSTERS[1], "cluster_size_cv": 0.5})),
    ({"type": "cluster_means_t", "weights": "size"}, ("trial", {"design": {
        "type": "clusters", "clusters": 5, "cluster_size": 8, "cluster_size_cv": 0.5, "icc": 0.05},
        "outcome": {"type": "binary", "p0": 0.3, "odds_ratio": 2.0}})),
    ({"type": "cox"}, SURVIVAL),
    ({"type": "cox", "ties": "efron"}, ("survival_two_arm", {**SURVIVAL[1], "time_resolution": 0.25})),
    # cluster-robust Cox (statsmodels PHReg fit(groups=) per replicate): equal and unequal clusters (padding)
    ({"type": "cox", "cov_type": "cluster"}, ("trial", {"design": {"type": "clusters", "clusters": 4, "cluster_size": 5,
                                                                  "icc": 0.2},
                                                       "outcome": {"type": "time_to_event", "median": 1.0,
                                                                   "hazard_ratio": 0.6, "follow_up": 2.0}})),
    ({"type": "cox", "cov_type": "cluster", "ties": "efron", "test": "score", "small_sample": True},
     ("trial", {"design": {"type": "clusters", "clusters": 4, "cluster_size": 6, "cluster_size_cv": 0.5, "icc": 0.2},
                "outcome": {"type": "time_to_event", "median": 1.0, "hazard_ratio": 0.6, "follow_up": 2.0,
                            "time_resolution": 0.25}})),
    ({"type": "crossover_t"}, CROSSOVER),
    ({"type": "crossover_t", "scale": "log", "alternative": "less"}, CROSSOVER_LOG),
    ({"type": "crossover_tost", "margin": 0.5}, CROSSOVER),
    ({"type": "crossover_tost", "scale": "log"}, CROSSOVER_LOG),
    # iterative fit: statsmodels (tight gtol) and the batch REML agree to about 1e-8 (tests/test_crossover.py)
    ({"type": "crossover_mixed"}, CROSSOVER, {"rtol": 1e-6}),
    ({"type": "crossover_mixed", "scale": "log", "df": "between-within"}, CROSSOVER_LOG, {"rtol": 1e-6}),
    ({"type": "dichotomised", "cut": 2}, ORDINAL),
    ({"type": "final_visit_t"}, ("repeated_measures", {"n": 8, "visits": 3, "rho": 0.5, "effect": 0.5})),
    ({"type": "fisher_exact"}, BINARY),
    ({"type": "gee"}, CLUSTERS),
    ({"type": "gee", "cov_type": "kauermann_carroll", "distribution": "t"},
     ("cluster_trial", {**CLUSTERS[1], "cluster_size_cv": 0.5})),
    ({"type": "gee", "cov_type": "mancl_derouen", "cov_struct": "independence"},
     ("repeated_measures", {"n": 8, "visits": 3, "rho": 0.5, "effect": 0.5, "dropout_rate": 0.2})),
    ({"type": "log_t"}, ("two_arm", {"n": 10, "outcome": {"type": "lognormal", "median": 1.0, "cv": 0.5},
                                     "effect": 1.3, "effect_type": "ratio"})),
    ({"type": "logistic"}, BINARY),
    ({"type": "logrank"}, SURVIVAL),
    # time to event in clusters (frailty): the batch path on a clustered table
    ({"type": "logrank"}, ("trial", {"design": {"type": "clusters", "clusters": 4, "cluster_size": 5, "icc": 0.2},
                                     "outcome": {"type": "time_to_event", "median": 1.0, "hazard_ratio": 0.6,
                                                 "follow_up": 2.0}})),
    ({"type": "mann_whitney"}, TWO_ARM),
    ({"type": "mann_whitney", "estimand": "probability"}, ORDINAL),   # heavy ties
    ({"type": "mann_whitney"}, ("trial", {"design": {"type": "clusters", "clusters": 4, "cluster_size": 6,
                                                     "icc": 0.1},
                                          "outcome": {"type": "ordinal", "p0": [0.2, 0.3, 0.3, 0.2],
                                                      "odds_ratio": 1.8}})),
    # iterative REML on both paths (Fisher scoring vs scipy BFGS): estimates agree to about 1e-9
    ({"type": "mmrm"}, ("repeated_measures", {"n": 8, "visits": 3, "rho": 0.5, "effect": 0.5, "dropout_rate": 0.2}),
     {"rtol": 1e-6, "atol": 1e-9}),
    ({"type": "mmrm", "covariance": "toeplitz", "baseline": True}, ("repeated_measures", {"n": 8, "visits": 4,
     "rho": 0.5, "effect": 0.5, "dropout_rate": 0.2}), {"rtol": 1e-6, "atol": 1e-9}),
    ({"type": "mmrm", "baseline": True}, ("trial", {"design": {"type": "visits", "n": 8, "visits": 4, "rho": 0.5},
     "effect": 0.5, "missing": {"type": "dropout", "hazard": 0.15}}), {"rtol": 1e-6, "atol": 1e-9}),
    # statsmodels' default optimiser stops within about 1e-4 of the REML optimum the batch path finds
    # (tests/test_mixed.py checks both against statsmodels at that tolerance and at 1e-7 with gtol 1e-10)
    ({"type": "mixed_model"}, CLUSTERS, {"atol": 1e-4, "rtol": 0.0}),
    # the same with other data: replicates whose REML estimate is on the boundary (see KNOWN)
    ({"type": "mixed_model"}, CLUSTERS, {"atol": 1e-4, "rtol": 0.0, "seed": 2, "size": 8}),
    # repeated measures: the batch path for a design shared by the replicates (tests/test_mixed_repeated_batch.py)
    ({"type": "mixed_model", "formula": "y ~ C(arm) * C(visit, Treatment(2))", "groups": "subject"},
     ("repeated_measures", {"n": 8, "visits": 3, "rho": 0.5, "effect": 0.5, "dropout_rate": 0.2}),
     {"atol": 1e-4, "rtol": 0.0}),
    ({"type": "multiple", "tests": [{"type": "t_test"}], "comparisons": "each_vs_control"},
     ("multi_arm", {"effects": [0.0, 0.3, 0.6], "n": 8})),
    ({"type": "dunnett"}, ("multi_arm", {"effects": [0.0, 0.3, 0.6], "n": 8})),
    ({"type": "dunnett", "alternative": "greater"}, ("multi_arm", {"effects": [0.0, 0.3, 0.6], "n": [8, 5, 11]})),
    ({"type": "anova_f"}, ("multi_arm", {"effects": [0.0, 0.3, 0.6], "n": 8, "allocation": [2, 1, 1]})),
    ({"type": "dunnett"}, ("multi_arm", {"effects": [0.0, 0.3, 0.6], "n": 8, "missing": {"type": "mcar", "rate": 0.2}})),
    ({"type": "anova_f"}, ("multi_arm", {"effects": [0.0, 0.3, 0.6], "n": 8, "missing": {"type": "mcar", "rate": 0.2}})),
    # statsmodels' default NegativeBinomial fit (bfgs, gtol 1e-5 on the mean log-likelihood) leaves alpha, hence
    # the SE, off by up to ~4e-5 relative; the batch Newton agrees with statsmodels' Newton at tol 1e-14 to
    # 1e-9 (tests/test_negbin_batch.py). At a fixed dispersion both are IRLS and agree to rounding.
    ({"type": "negbin_glm"}, COUNTS, {"rtol": 2e-4}),
    ({"type": "negbin_glm", "dispersion": 2.0}, COUNTS),
    ({"type": "non_inferiority", "margin": 0.5}, TWO_ARM),
    ({"type": "ols"}, TWO_ARM),
    ({"type": "paired_t"}, PAIRED),
    ({"type": "permutation_test", "n_resamples": 199}, TWO_ARM),
    ({"type": "permutation_test", "n_resamples": 199, "statistic": "median", "alternative": "less"},
     ("two_arm", {"n": 10, "effect": 0.5, "missing": {"type": "mcar", "rate": 0.2}})),
    ({"type": "bootstrap_ci", "n_resamples": 199, "method": "percentile", "statistic": "median"},
     ("two_arm", {"n": 10, "effect": 0.5, "missing": {"type": "mcar", "rate": 0.2}})),
    ({"type": "poisson_glm"}, COUNTS),
    # the GLMM's two paths are two optimisers of one likelihood (tests/test_glmm.py: agreement to 1e-6)
    ({"type": "glmm"}, ("trial", {"design": {"type": "clusters", "clusters": 5, "cluster_size": 8,
                                             "cluster_size_cv": 0.4, "icc": 0.1},
                                  "outcome": {"type": "binary", "p0": 0.3, "odds_ratio": 2.0,
                                              "estimand": "conditional_log_odds_ratio"},
                                  "missing": {"type": "mcar", "rate": 0.1}}), {"rtol": 1e-6, "atol": 1e-7}),
    ({"type": "glmm", "family": "poisson"}, ("trial", {"design": {"type": "clusters", "clusters": 5,
                                                                  "cluster_size": 8, "icc": 0.05},
                                                       "outcome": {"type": "count", "rate0": 1.5,
                                                                   "rate_ratio": 1.4}}),
     {"rtol": 1e-6, "atol": 1e-7}),
    ({"type": "posterior_probability"}, TWO_ARM),
    ({"type": "posterior_probability", "sd": 1.0, "prior_sd": 0.5}, ("normal_two_arm", {
        "n": 12, "effect": 0.5, "missing": {"type": "mcar", "rate": 0.2}})),
    ({"type": "posterior_probability", "model": "beta_binomial", "eta": 0.9}, BINARY),
    # the per-replicate path is statsmodels OrderedModel (Newton with numerical derivatives): its SE comes
    # from a finite-difference Hessian, about 1e-5 relative (tests/test_ordinal.py checks both at that level)
    ({"type": "proportional_odds"}, ORDINAL, {"rtol": 2e-5, "atol": 1e-8}),
    # statsmodels' Powell optimiser stops within about 1e-6 (one variance ratio) or 1e-4 (two) of the REML
    # optimum the batch path finds (tests/test_stepped.py checks the optimum with statsmodels' own loglike)
    ({"type": "sw_mixed"}, STEPPED, {"rtol": 1e-5}),
    ({"type": "sw_mixed", "structure": "nested", "df": "clusters"}, STEPPED, {"atol": 1e-4, "rtol": 0.0}),
    ({"type": "sw_mixed", "alternative": "greater"},
     ("stepped_wedge", {"sequences": [[0, 1, 1], [0, 0, 1], [0, "-", 1]], "clusters_per_sequence": 2, "m": 4,
                        "cluster_size_cv": 0.5, "icc": 0.1, "effect": 0.5}), {"rtol": 1e-5}),
    ({"type": "t_test"}, TWO_ARM),
    ({"type": "t_test"}, ("normal_one_sample", {"n": 10, "effect": 0.4})),
    ({"type": "tost", "margin": 0.5}, TWO_ARM),
    ({"type": "two_proportions"}, BINARY),
    ({"type": "welch_t"}, TWO_ARM),
    ({"type": "group_sequential", "inner": {"type": "t_test", "alternative": "greater"}, "fractions": [0.5, 1.0],
      "futility": [0.0]}, TWO_ARM),
    ({"type": "wilcoxon_signed_rank"}, PAIRED),
    ({"type": "z_test"}, TWO_ARM),
]
#: the nested kinds: one configuration per registered outcome distribution and missingness mechanism
NESTED = {
    ("outcome", "contaminated_normal"): {"contamination": 0.1, "scale_factor": 3.0},
    ("outcome", "fleishman"): {"skewness": 1.0, "excess_kurtosis": 2.0},
    ("outcome", "gamma"): {"mean": 2.0, "cv": 0.5},
    ("outcome", "lognormal"): {"median": 1.0, "cv": 0.5},
    ("outcome", "normal"): {"mean": 1.0, "sd": 2.0},
    ("outcome", "scipy"): {"dist": "gamma", "args": [2.0], "kwds": {"scale": 3.0}},
    ("outcome", "skew_normal"): {"skewness": 0.5},
    ("outcome", "student_t"): {"df": 5.0},
    ("glm_outcome", "binary"): {"p0": 0.3, "odds_ratio": 2.0, "icc_scale": "proportion"},
    ("glm_outcome", "count"): {"rate0": 2.0, "rate_ratio": 0.8, "dispersion": 1.5},
    ("glm_outcome", "gaussian"): {"mean0": 1.0, "sd": 2.0, "effect": 0.5, "sd_ratio": 1.5},
    ("glm_outcome", "ordinal"): {"p0": [0.2, 0.5, 0.3], "odds_ratio": 2.0, "effect_scale": "marginal"},
    ("glm_outcome", "time_to_event"): {"median": 12.0, "hazard_ratio": 0.7, "shape": 1.2, "accrual": 6.0,
                                       "follow_up": 12.0, "dropout_fraction": 0.1, "dropout_time": 12.0},
    ("missingness", "dropout"): {"rate": 0.2},
    ("missingness", "mar"): {"rate": 0.2},
    ("missingness", "mcar"): {"rate": 0.2},
    ("missingness", "mnar"): {"rate": 0.2},
}

#: analyses with no compatible built-in process: name -> reason
NO_PROCESS: dict[str, str] = {}
#: known violations found by the kit, marked xfail(strict=True): id -> reason
KNOWN: dict[str, str] = {
    "mixed_model@cluster_trial/seed=2": (
        "mixed_model, unequal cluster sizes (here: missing outcomes) with the REML estimate on the boundary "
        "(cluster variance 0): the batch path reports the OLS standard error (fixed-effect block alone, as "
        "simpower/analyses/mixed.py documents) while statsmodels' per-replicate fit inverts the full Hessian "
        "including the variance parameter; SE 0.30131 vs 0.30239, p 0.01473 vs 0.01509 on replicate 0 "
        "(statsmodels agrees with itself to 1e-8 across nm, powell and bfgs gtol=1e-10)"),
}


def _pid(key: str) -> str:
    return key.split("/")[0]


def _aid(an: dict, proc: tuple, kw: dict | None = None) -> str:
    extra = ",".join(f"{k}={v}" for k, v in an.items() if k not in ("type", "tests", "n_resamples"))
    seed = f"/seed={kw['seed']}" if kw and "seed" in kw else ""
    return (f"{an['type']}[{extra}]@{proc[0]}" if extra else f"{an['type']}@{proc[0]}") + seed


def _marks(ident: str):
    return [pytest.mark.xfail(strict=True, reason=KNOWN[ident])] if ident in KNOWN else []


def test_every_registered_component_is_covered():
    assert {_pid(k) for k in PROCESSES} == set(registry.names("process"))
    paired = {p[0]["type"] for p in PAIRS}
    assert paired.isdisjoint(NO_PROCESS)
    assert paired | set(NO_PROCESS) == set(registry.names("analysis"))
    for kind in ("outcome", "glm_outcome", "missingness"):
        assert {name for k, name in NESTED if k == kind} == set(registry.names(kind))


@pytest.mark.parametrize("key", [pytest.param(k, id=k, marks=_marks(k)) for k in PROCESSES])
def test_process_conformance(key):
    check_process(build("process", {"type": _pid(key), **PROCESSES[key]}))


@pytest.mark.parametrize("kind,name", [pytest.param(*k, id=f"{k[0]}:{k[1]}") for k in NESTED])
def test_nested_component_conformance(kind, name):
    check_component(build(kind, {"type": name, **NESTED[kind, name]}))


@pytest.mark.parametrize("an,proc,kw", [pytest.param(*p, *({},) * (3 - len(p)), id=_aid(*p), marks=_marks(_aid(*p)))
                                        for p in PAIRS])
def test_analysis_conformance(an, proc, kw):
    analysis = build("analysis", an)
    info = check_analysis(analysis, build("process", {"type": proc[0], **proc[1]}), **kw)
    assert info["failed"] < info["replicates"]
    if analysis.has_batch:  # the pairing reaches the batch path, so it was compared, not skipped
        assert info["batch_compared"], info


# -- the kit itself: each broken component is caught, with a message naming the broken promise ----

class _Arms(sp.Process):
    """A well-behaved two-arm process for the checks below (n per arm, shift `effect`)."""

    params = {"n": Int(low=2), "effect": Real()}
    defaults = {"effect": 0.0}

    def draw_batch(self, rng, size):
        y = rng.standard_normal((size, 2 * self.n))
        y[:, self.n:] += self.effect
        return sp.Batch(size, {"y": y}, {"arm": np.repeat([0, 1], self.n)})


@pytest.fixture
def arms_cls(monkeypatch):
    table = registry._REGISTRY.setdefault("process", {})
    monkeypatch.setitem(table, "kit_arms", _Arms)
    monkeypatch.setattr(_Arms, "name", "kit_arms")
    return _Arms


def test_the_kit_passes_a_well_behaved_user_process_and_function(arms_cls):
    check_process(arms_cls(n=5, effect=0.3))

    def drawn(rng, n=5):
        return {"y": rng.standard_normal(2 * n), "arm": np.repeat([0, 1], n)}

    check_process(drawn)
    check_analysis(lambda d: 0.5, arms_cls(n=5))


def test_the_kit_catches_an_unrebuildable_spec():
    class Local(_Arms):  # neither registered nor importable by name
        pass

    with pytest.raises(AssertionError, match=r"rebuilding from spec\(\) raised"):
        check_process(Local(n=5))


def test_the_kit_catches_global_random_state(arms_cls, monkeypatch):
    def draw_batch(self, rng, size):
        y = np.random.standard_normal((size, 2 * self.n))
        return sp.Batch(size, {"y": y}, {"arm": np.repeat([0, 1], self.n)})

    monkeypatch.setattr(arms_cls, "draw_batch", draw_batch)
    with pytest.raises(AssertionError, match="global random state") as info:
        check_process(arms_cls(n=5))
    assert "the same seed gave different data" in str(info.value)


def test_the_kit_catches_a_seed_that_is_ignored(arms_cls, monkeypatch):
    def draw_batch(self, rng, size):
        y = np.random.default_rng(1).standard_normal((size, 2 * self.n))
        return sp.Batch(size, {"y": y}, {"arm": np.repeat([0, 1], self.n)})

    monkeypatch.setattr(arms_cls, "draw_batch", draw_batch)
    with pytest.raises(AssertionError, match="a different seed gave the same data"):
        check_process(arms_cls(n=5))


def test_the_kit_catches_batch_and_per_replicate_layouts_that_differ(arms_cls, monkeypatch):
    def call(self, rng):
        y = rng.standard_normal(2 * self.n)
        return {"y": y, "arm": np.repeat([0, 1], self.n), "visit": np.zeros(2 * self.n, int)}

    monkeypatch.setattr(arms_cls, "__call__", call)
    with pytest.raises(AssertionError, match=r"replicate\(0\) has columns \['arm', 'y'\], a per-replicate draw "
                                             r"\['arm', 'visit', 'y'\]"):
        check_process(arms_cls(n=5))


def test_the_kit_catches_undeclared_missing_outcomes(arms_cls, monkeypatch):
    def draw_batch(self, rng, size):
        y = rng.standard_normal((size, 2 * self.n))
        y[:, 0] = np.nan
        return sp.Batch(size, {"y": y}, {"arm": np.repeat([0, 1], self.n)})

    monkeypatch.setattr(arms_cls, "draw_batch", draw_batch)
    with pytest.raises(AssertionError, match=r"NaN outcomes but the batch does not say info\['missing'\]"):
        check_process(arms_cls(n=5))


def _diff(data):
    y, arm = np.asarray(data["y"], float), np.asarray(data["arm"])
    return np.nanmean(y[arm == 1]) - np.nanmean(y[arm == 0])


class _Shifted(sp.Analysis):
    """A deliberately crude analysis: p = 1 / (1 + |difference|); batch path optional below."""

    def __call__(self, data):
        d = _diff(data)
        return {"pvalue": 1 / (1 + abs(d)), "estimate": d}

    def batch(self, batch):
        y, arm = batch["y"], batch["arm"]
        d = np.nanmean(y[:, arm == 1], axis=1) - np.nanmean(y[:, arm == 0], axis=1)
        return {"pvalue": 1 / (1 + abs(d)), "estimate": d}


def test_the_kit_passes_a_batch_path_that_agrees_and_catches_one_that_does_not(arms_cls, monkeypatch):
    proc = arms_cls(n=5, effect=0.5)
    table = registry._REGISTRY.setdefault("analysis", {})
    monkeypatch.setitem(table, "kit_shifted", _Shifted)
    monkeypatch.setattr(_Shifted, "name", "kit_shifted")
    info = check_analysis(_Shifted(), proc)
    assert info["batch_compared"] == 6
    monkeypatch.setattr(_Shifted, "batch", lambda self, b: {"pvalue": np.full(b.size, 0.5)})
    with pytest.raises(AssertionError) as e:
        check_analysis(_Shifted(), proc)
    msg = str(e.value)
    assert "replicate 0: `pvalue` is 0.5 on the batch path" in msg
    assert "batch() gives no `estimate` but the per-replicate path does" in msg


def test_the_kit_catches_a_finite_batch_pvalue_where_the_replicate_fails(arms_cls, monkeypatch):
    table = registry._REGISTRY.setdefault("analysis", {})
    monkeypatch.setitem(table, "kit_shifted", _Shifted)
    monkeypatch.setattr(_Shifted, "name", "kit_shifted")
    monkeypatch.setattr(_Shifted, "__call__", lambda self, d: (_ for _ in ()).throw(ValueError("no")) if
                        np.asarray(d["y"])[0] > 0 else {"pvalue": 1 / (1 + abs(_diff(d))), "estimate": _diff(d)})
    with pytest.raises(AssertionError, match=r"the per-replicate path raised ValueError but batch\(\) gives p = "):
        check_analysis(_Shifted(), arms_cls(n=5, effect=0.5))


def test_the_kit_catches_pvalues_outside_the_unit_interval_and_wrong_shapes():
    with pytest.raises(AssertionError, match=r"p-value 1\.5 is outside \[0, 1\]"):
        check_analysis(lambda d: 1.5)

    def shaped(data):  # an array p-value when the first outcome is missing
        y = np.asarray(data["y"], float)
        return {"pvalue": np.full(y.size, 0.5)} if np.isnan(y[0]) else 0.5

    with pytest.raises(AssertionError, match=r"replicate 0 with missing outcomes: the output is not a result "
                                             r"\(TypeError: the analysis returned `pvalue` of shape \(24,\)"):
        check_analysis(shaped)
    # the engine counts such a replicate as a failure with that message (not as a silent NaN)
    res = sp.run(sp.Scenario(sp.TwoArm(n=12, missing=sp.MCAR(rate=0.3)), analyses={"shaped": shaped}), reps=20,
                 seed=1, n_jobs=1, max_failure_rate=1.0)
    fails = res.summaries["shaped"]["failures"]
    assert set(fails) == {"error:TypeError"} and fails["error:TypeError"] > 0


def test_the_kit_catches_nondeterminism_and_an_ignored_seed():
    with pytest.raises(AssertionError, match="replicate 0: the analysis used numpy's or Python's global random"):
        check_analysis(lambda d: float(np.random.uniform()))
    rng = random.Random(0)
    with pytest.raises(AssertionError, match="the same data gave another result"):
        check_analysis(lambda d: rng.random())
    # an analysis with a `seed` parameter whose resamples do not depend on it
    with pytest.raises(AssertionError, match=r"a different `seed` gave the same results"):
        check_analysis(sp.PermutationTest(n_resamples=99).replace(seed=0).__class__(n_resamples=99),
                       sp.NormalTwoArm(n=4, effect=50.0))
