"""The typed batch contract: layouts, the batch result, and batch path == per-replicate path.

* Every layout (simpower/batch.py) is checked against the replicate tables the same batch
  gives (``Batch.replicate``), computed here independently with numpy.
* Every built-in analysis with a batch path is run on batches of suitable built-in processes,
  with and without missing values where the process draws them: the batch path is taken
  exactly where the analysis declares it (the layouts it names, plus its extra conditions),
  and where it is taken its values agree with the per-replicate path to 1e-9 relative, and the
  replicates it marks as failed (``trouble``) carry the cause the per-replicate path would get
  (an exception, a warning, a non-finite p-value), as the engine records them.
* Reference numbers: scipy.stats (ttest_ind, ttest_rel, ttest_1samp, mannwhitneyu, wilcoxon,
  chi2_contingency, fisher_exact, norm, t) on a few replicates, named beside each check.
"""

from __future__ import annotations

import gc
import math
import warnings
import weakref

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower.analyses.base import IGNORED_WARNINGS, Analysis, BatchResult, as_batch_result
from simpower.analyses.numeric import normal_ppf, p_from_t, p_from_z, t_cdf, t_ppf, t_sf, two_sample_se_df
from simpower.batch import LAYOUTS, Batch
from simpower.engine.chunk import chunk_seed, run_chunk
from simpower.registry import build, load_builtins, lookup, names

FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high")
REPS = 30

PROCESSES = {
    "one_sample": lambda: sp.NormalOneSample(n=12, effect=0.3),
    "paired": lambda: sp.NormalPaired(n=10, effect=0.4),
    "two_arm": lambda: sp.TwoArm(n=10, ratio=1.5, effect=0.5),
    "two_arm_missing": lambda: sp.TwoArm(n=10, effect=0.5, missing=sp.MCAR(rate=0.2)),
    "two_arm_mar": lambda: sp.TwoArm(n=10, effect=0.5, baseline_corr=0.5, missing=sp.MAR(rate=0.3)),
    "two_arm_mnar": lambda: sp.TwoArm(n=10, ratio=1.5, effect=0.5, missing=sp.MNAR(rate=0.2)),
    # 3 per arm, half missing: some replicates keep fewer than two values in an arm (no statistic)
    "two_arm_sparse": lambda: sp.TwoArm(n=3, effect=0.5, missing=sp.MCAR(rate=0.5)),
    "one_sample_missing": lambda: sp.NormalOneSample(n=12, effect=0.3, missing=sp.MCAR(rate=0.2)),
    "one_sample_sparse": lambda: sp.NormalOneSample(n=3, effect=0.3, missing=sp.MCAR(rate=0.5)),
    "paired_missing": lambda: sp.NormalPaired(n=10, effect=0.4, missing=sp.MCAR(rate=0.2)),
    "lognormal_missing": lambda: sp.TwoArm(n=10, effect=1.3, effect_type="ratio",
                                           outcome=sp.Lognormal(median=1.0, sigma=0.5), missing=sp.MCAR(rate=0.2)),
    "two_arm_baseline": lambda: sp.TwoArm(n=10, effect=0.5, baseline_corr=0.5),
    "lognormal": lambda: sp.TwoArm(n=10, effect=1.3, effect_type="ratio", outcome=sp.Lognormal(median=1.0, sigma=0.5)),
    "three_arms_missing": lambda: sp.MultiArm(effects=[0, 0.3, 0.6], n=8, missing=sp.MCAR(rate=0.2)),
    "three_arms": lambda: sp.MultiArm(effects=[0, 0.3, 0.6], n=8),
    "binary_small": lambda: sp.BinaryTwoArm(n=8, p0=0.2, odds_ratio=2.0),
    "binary_missing": lambda: sp.BinaryTwoArm(n=15, p0=0.3, odds_ratio=2.0, missing=sp.MCAR(rate=0.2)),
    "counts_small": lambda: sp.CountTwoArm(n=4, rate0=0.3, rate_ratio=1.5),
    "clusters": lambda: sp.ClusterTrial(clusters=5, cluster_size=4, icc=0.1, effect=0.5),
    "clusters_variable": lambda: sp.ClusterTrial(clusters=5, cluster_size=4, cluster_size_cv=0.5, icc=0.1, effect=0.5),
    "clusters_variable_missing": lambda: sp.ClusterTrial(clusters=5, cluster_size=4, cluster_size_cv=0.5, icc=0.1,
                                                         effect=0.5, missing=sp.MCAR(rate=0.2)),
    "clusters_individual": lambda: sp.ClusterTrial(clusters=5, cluster_size=4, cluster_size_cv=0.4, icc=0.1,
                                                   effect=0.5, randomise="individual"),
    "repeated": lambda: sp.RepeatedMeasures(n=8, visits=3, rho=0.5, effect=0.5),
    "clusters_mnar": lambda: sp.ClusterTrial(clusters=5, cluster_size=4, icc=0.1, effect=0.5, missing=sp.MNAR(rate=0.2)),
    "repeated_dropout_mcar": lambda: sp.RepeatedMeasures(n=8, visits=3, rho=0.5, effect=0.5, dropout_rate=0.2,
                                                         missing=sp.MCAR(rate=0.1)),
    "repeated_dropout": lambda: sp.RepeatedMeasures(n=8, visits=3, rho=0.5, effect=0.5, dropout_rate=0.3),
    # trial with the visits design: a skewed outcome, MAR dropout and intermittent MCAR
    "visits_dropout": lambda: build("process", {
        "type": "trial", "design": {"type": "visits", "n": 8, "visits": 4, "correlation": "ar1", "rho": 0.5},
        "outcome": {"type": "gamma", "mean": 2.0, "cv": 0.6}, "effect": 0.5,
        "missing": {"type": "dropout", "rate": 0.3, "mar_slope": 1.0, "intermittent": {"type": "mcar", "rate": 0.1}}}),
    "survival": lambda: sp.SurvivalTwoArm(n=12, median=1.0, hazard_ratio=0.6, follow_up=2.0),
    # event times in clusters of unequal sizes (padding, arms and clusters per replicate), tied times
    "survival_clusters": lambda: build("process", {
        "type": "trial", "design": {"type": "clusters", "clusters": 4, "cluster_size": 5, "cluster_size_cv": 0.5,
                                    "icc": 0.2},
        "outcome": {"type": "time_to_event", "median": 1.0, "hazard_ratio": 0.6, "follow_up": 2.0,
                    "time_resolution": 0.25}}),
    "ordinal_missing": lambda: build("process", {"type": "ordinal_two_arm", "n": 15, "p0": [0.2, 0.3, 0.3, 0.2],
                                                 "odds_ratio": 2.0, "missing": {"type": "mcar", "rate": 0.2}}),
}

_BATCHES: dict[str, Batch] = {}


def batch_of(process: str) -> Batch:
    """A fresh batch of ``REPS`` replicates (fixed seed; a new object, so no layout is cached)."""
    if process not in _BATCHES:
        _BATCHES[process] = PROCESSES[process]().draw_batch(np.random.default_rng(20261202), REPS)
    b = _BATCHES[process]
    return Batch(b.size, b.per_rep, b.shared, b.info)


# -- the layouts ------------------------------------------------------------------------------
@pytest.mark.parametrize("process, kinds", [
    ("one_sample", {"table", "one_sample"}),
    ("paired", {"table", "two_arm", "paired"}),
    ("two_arm", {"table", "two_arm"}),
    ("two_arm_missing", {"table", "two_arm"}),
    ("three_arms", {"table"}),                   # three arms: no two-arm view
    ("binary_small", {"table", "two_arm"}),
    ("clusters", {"table", "two_arm", "clustered"}),
    ("clusters_variable_missing", {"table", "two_arm", "clustered"}),
    ("repeated_dropout", {"table", "two_arm", "longitudinal"}),
    ("visits_dropout", {"table", "two_arm", "longitudinal"}),
    ("survival", {"survival"}),                  # no outcome y: time and event
])
def test_which_layouts_a_batch_has(process, kinds):
    assert set(batch_of(process).layouts()) == kinds


def test_unknown_layout_is_refused_by_name():
    with pytest.raises(ValueError, match="unknown batch layout 'two_arms'"):
        batch_of("two_arm").layout("two_arms")


@pytest.mark.parametrize("process", ["two_arm", "two_arm_missing", "binary_missing", "clusters_variable_missing"])
def test_two_arm_layout_matches_the_replicate_tables(process):
    b = batch_of(process)
    lay = b.layout("two_arm")
    assert lay.missing == ("missing" in process)
    assert lay.complete == (process == "two_arm")
    for i in range(b.size):
        table = b.replicate(i)
        y, arm = np.asarray(table["y"], float), np.asarray(table["arm"])
        assert lay.n0[i] == np.count_nonzero(np.isfinite(y) & (arm == 0))
        assert lay.n1[i] == np.count_nonzero(np.isfinite(y) & (arm == 1))
        assert lay.observed[i].sum() == np.isfinite(y).sum()
    if lay.split is not None:
        y0, y1 = lay.arms()
        table = b.replicate(3)
        np.testing.assert_array_equal(y0[3], np.asarray(table["y"])[np.asarray(table["arm"]) == 0])
        np.testing.assert_array_equal(y1[3], np.asarray(table["y"])[np.asarray(table["arm"]) == 1])
    else:
        assert lay.arms() is None


def test_padding_and_observed_masks_of_variable_clusters():
    b = batch_of("clusters_variable_missing")
    lay = b.layout("clustered")
    assert lay.present is not None and not lay.present.all()   # variable sizes are padded
    np.testing.assert_array_equal(lay.observed, np.isfinite(lay.y) & lay.present)
    for i in range(b.size):
        table = b.replicate(i)
        assert lay.present[i].sum() == len(table["y"])
        assert lay.observed[i].sum() == np.isfinite(table["y"]).sum()


@pytest.mark.parametrize("process, randomised", [("clusters_variable_missing", True), ("clusters_individual", False)])
def test_clustered_layout_per_cluster_arrays_match_the_replicate_tables(process, randomised):
    b = batch_of(process)
    lay = b.layout("clustered")
    codes, g = lay.codes
    for i in range(b.size):
        table = b.replicate(i)
        cl, y, arm = np.asarray(table["cluster"]), np.asarray(table["y"], float), np.asarray(table["arm"])
        for c in range(g):
            rows = cl == c
            assert lay.members[i, c] == rows.sum()
            assert lay.sizes[i, c] == np.count_nonzero(rows & np.isfinite(y))
            if rows.any():
                assert lay.cluster_arm[i, c] == pytest.approx(arm[rows].mean(), rel=1e-12)
            else:
                assert math.isnan(lay.cluster_arm[i, c])
        single = all(len(set(arm[cl == c].tolist())) <= 1 for c in np.unique(cl))
        assert lay.cluster_randomised[i] == single
    assert lay.cluster_randomised.all() == randomised


def test_paired_layout_aligns_the_pairs():
    b = batch_of("paired")
    lay = b.layout("paired")
    for i in range(b.size):
        table = b.replicate(i)
        arm, pair, y = (np.asarray(table[k]) for k in ("arm", "pair", "y"))
        by_pair = {p: (y[(arm == 0) & (pair == p)][0], y[(arm == 1) & (pair == p)][0]) for p in np.unique(pair)}
        for j, p in enumerate(lay.pair):
            assert (lay.y0[i, j], lay.y1[i, j]) == by_pair[p]
    assert lay.pair_observed.all()


def test_longitudinal_and_survival_layouts():
    rep = batch_of("repeated_dropout").layout("longitudinal")
    assert rep.n_visits == 3 and rep.subject is not None and rep.missing
    # dropout: an outcome once missing stays missing at the later visits of that subject
    for i in range(rep.size):
        for s in np.unique(rep.subject):
            seen = rep.observed[i][rep.subject == s]
            assert np.all(np.diff(seen.astype(int)) <= 0)
    surv = batch_of("survival").layout("survival")
    assert surv.time is surv.y and set(np.unique(surv.event).tolist()) <= {0, 1} and surv.labels == (0, 1)


def test_a_batch_with_layouts_is_freed_without_the_cycle_collector():
    # the layout cache must form no reference cycle, or every chunk's arrays would wait for the
    # cycle collector and memory would grow with the replicates (test_engine_memory.py)
    b = batch_of("clusters_variable_missing")
    for kind in b.layouts():
        layout = b.layout(kind)
        layout.observed  # noqa: B018 - fill the cached masks too
    ref = weakref.ref(b)
    gc.disable()
    try:
        del b, layout
        assert ref() is None
    finally:
        gc.enable()


def test_layouts_are_views_computed_once():
    b = batch_of("two_arm")
    lay = b.layout("two_arm")
    assert b.layout("two_arm") is lay
    assert np.shares_memory(lay.y, b.per_rep["y"]) and np.shares_memory(lay.arms()[0], b.per_rep["y"])


# -- analyses: declared layouts and batch == per-replicate ---------------------------------------
def _per_replicate(analysis, batch):
    """Fields and the engine's cause per replicate ('' = clean) from the per-replicate path."""
    out = {f: np.full(batch.size, np.nan) for f in FIELDS}
    cause = np.zeros(batch.size, object)
    cause[:] = ""
    for i in range(batch.size):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                r = analysis(batch.replicate(i))
            except Exception as exc:
                cause[i] = f"error:{type(exc).__name__}"
                continue
        for f in FIELDS:
            out[f][i] = getattr(r, f)
        if not math.isfinite(r.pvalue):
            cause[i] = "nonfinite_pvalue"
            continue
        cause[i] = next((f"warning:{w.category.__name__}" for w in caught
                         if not issubclass(w.category, IGNORED_WARNINGS)), "")
    return out, cause


def _batch_causes(res: BatchResult, size: int):
    """The cause the engine records per replicate from a batch result (first trouble cause, then non-finite p)."""
    cause = np.zeros(size, object)
    cause[:] = ""
    for name, mask in res.trouble.items():
        cause[np.asarray(mask, bool) & (cause == "")] = name
    cause[~np.isfinite(np.asarray(res.pvalue, float)) & (cause == "")] = "nonfinite_pvalue"
    return cause


# (analysis spec, process, whether the batch path is taken)
CASES = [
    ({"type": "t_test"}, "one_sample", True),
    ({"type": "t_test"}, "two_arm", True),
    ({"type": "t_test"}, "paired", True),                 # paired data are also two-arm data
    # missing outcomes (and padding): complete cases under the observed mask
    ({"type": "t_test"}, "two_arm_missing", True),
    ({"type": "t_test", "alternative": "less"}, "two_arm_mnar", True),
    ({"type": "t_test"}, "two_arm_sparse", True),         # too few values: those replicates per replicate
    ({"type": "t_test"}, "one_sample_missing", True),
    ({"type": "t_test"}, "one_sample_sparse", True),
    ({"type": "t_test"}, "paired_missing", True),         # two-arm view of pairs: all observed values
    ({"type": "t_test"}, "clusters_variable_missing", True),
    ({"type": "welch_t"}, "two_arm_missing", True),
    ({"type": "welch_t", "alternative": "less"}, "two_arm_mar", True),
    ({"type": "welch_t"}, "two_arm_sparse", True),
    ({"type": "paired_t"}, "paired_missing", True),       # complete pairs
    ({"type": "z_test", "sd1": 1.5}, "two_arm_missing", True),
    ({"type": "z_test"}, "two_arm_sparse", True),
    ({"type": "z_test", "alternative": "less"}, "one_sample_missing", True),
    ({"type": "tost", "margin": 0.5}, "two_arm_mnar", True),
    ({"type": "tost", "margin": 0.5, "equal_var": True}, "one_sample_sparse", True),
    ({"type": "non_inferiority", "margin": 0.3, "higher_is_better": False}, "two_arm_sparse", True),
    ({"type": "log_t"}, "lognormal_missing", True),
    ({"type": "log_t", "equal_var": True}, "paired_missing", True),  # negatives: error rows; complete pairs
    ({"type": "log_t"}, "one_sample_sparse", True),
    ({"type": "permutation_test", "n_resamples": 99}, "two_arm_sparse", True),  # exact / <2 values: per replicate
    ({"type": "permutation_test", "n_resamples": 99, "statistic": "median"}, "two_arm_missing", True),
    ({"type": "permutation_test", "n_resamples": 99}, "paired", False),       # pairs: sign flips, per replicate
    ({"type": "bootstrap_ci", "n_resamples": 99}, "two_arm_sparse", True),
    ({"type": "bootstrap_ci", "n_resamples": 99, "method": "basic"}, "two_arm_missing", True),
    ({"type": "welch_t", "alternative": "greater"}, "two_arm", True),
    ({"type": "welch_t"}, "one_sample", False),
    ({"type": "paired_t", "alternative": "less"}, "paired", True),
    ({"type": "paired_t"}, "two_arm", False),
    ({"type": "z_test", "sd1": 1.5, "alternative": "greater"}, "two_arm", True),
    ({"type": "z_test"}, "one_sample", True),
    ({"type": "tost", "margin": 0.5}, "two_arm", True),
    ({"type": "tost", "margin": 0.5, "equal_var": True}, "one_sample", True),
    ({"type": "non_inferiority", "margin": 0.3}, "two_arm", True),
    ({"type": "non_inferiority", "margin": 0.3}, "two_arm_missing", True),
    ({"type": "mann_whitney", "continuity": True}, "two_arm", True),
    ({"type": "mann_whitney", "estimand": "shift", "alternative": "less"}, "two_arm", True),
    ({"type": "mann_whitney"}, "two_arm_missing", True),  # complete cases, grouped by observed counts
    ({"type": "mann_whitney", "estimand": "probability", "continuity": False}, "two_arm_missing", True),
    ({"type": "mann_whitney", "estimand": "none", "alternative": "greater"}, "two_arm_mnar", True),
    ({"type": "mann_whitney", "null_value": 0.2}, "two_arm_sparse", True),
    ({"type": "mann_whitney", "estimand": "probability"}, "clusters_variable_missing", True),
    ({"type": "mann_whitney"}, "binary_missing", True),  # heavy ties
    ({"type": "wilcoxon_signed_rank"}, "one_sample_missing", True),
    ({"type": "wilcoxon_signed_rank", "continuity": True, "alternative": "less"}, "paired_missing", True),
    ({"type": "wilcoxon_signed_rank", "null_value": 0.1}, "one_sample_sparse", True),
    ({"type": "wilcoxon_signed_rank"}, "one_sample", True),
    ({"type": "wilcoxon_signed_rank", "continuity": True, "alternative": "greater"}, "paired", True),
    ({"type": "wilcoxon_signed_rank"}, "two_arm", False),
    ({"type": "log_t"}, "lognormal", True),
    ({"type": "log_t", "equal_var": True, "alternative": "greater"}, "paired", True),  # negatives: error rows
    ({"type": "log_t"}, "one_sample", True),
    ({"type": "two_proportions", "continuity": True}, "binary_small", True),
    ({"type": "two_proportions", "alternative": "less"}, "binary_missing", True),
    ({"type": "chi_square"}, "binary_missing", True),
    ({"type": "fisher_exact"}, "binary_small", True),
    ({"type": "fisher_exact", "alternative": "greater"}, "binary_missing", True),
    ({"type": "logistic"}, "binary_small", True),         # zero cells: per-replicate fits and their warnings
    ({"type": "logistic"}, "binary_missing", True),
    ({"type": "two_proportions"}, "two_arm", False),      # not 0/1 outcomes
    ({"type": "dichotomised", "cut": 2}, "ordinal_missing", True),   # two_proportions on y >= cut
    ({"type": "mann_whitney", "estimand": "probability"}, "ordinal_missing", True),  # heavy ties
    ({"type": "dichotomised", "cut": 1}, "two_arm", True),    # any outcome: the share at or above the cut
    ({"type": "poisson_glm"}, "counts_small", True),      # arms without events: fit trouble
    ({"type": "poisson_glm", "scale": "pearson"}, "counts_small", True),
    ({"type": "cluster_means_t"}, "clusters", True),
    ({"type": "cluster_means_t", "weights": "size"}, "clusters_variable_missing", True),
    ({"type": "cluster_means_t"}, "clusters_individual", True),  # mixed clusters: error rows
    ({"type": "final_visit_t"}, "repeated", True),
    ({"type": "final_visit_t", "welch": True}, "repeated_dropout", True),
    ({"type": "final_visit_t"}, "repeated_dropout_mcar", True),  # dropout, then intermittent MCAR
    ({"type": "final_visit_t"}, "visits_dropout", True),
    ({"type": "mann_whitney"}, "visits_dropout", True),
    ({"type": "cluster_means_t"}, "clusters_mnar", True),
    ({"type": "t_test"}, "clusters_mnar", True),
    ({"type": "ols", "cov_type": "cluster"}, "clusters_mnar", True),
    ({"type": "mann_whitney"}, "repeated_dropout", True),        # the two-arm view of the long table
    ({"type": "logrank"}, "survival", True),
    # cluster-robust Cox (Lin-Wei sandwich; statsmodels PHReg fit(groups=) per replicate)
    ({"type": "cox", "cov_type": "cluster"}, "survival_clusters", True),
    ({"type": "cox", "cov_type": "cluster", "ties": "efron", "test": "score", "small_sample": True},
     "survival_clusters", True),
    ({"type": "cox"}, "survival_clusters", False),     # the model-based batch path needs arms shared by the replicates
    ({"type": "logrank", "alternative": "greater"}, "survival", True),
    ({"type": "ols"}, "two_arm", True),
    ({"type": "ancova", "cov_type": "HC3"}, "two_arm_baseline", True),
    # missing outcomes: X'WX with W the observed mask (complete cases, as statsmodels after dropna)
    ({"type": "ols"}, "two_arm_missing", True),
    ({"type": "ancova", "cov_type": "HC3"}, "two_arm_mar", True),
    ({"type": "ancova", "alternative": "greater"}, "two_arm_mar", True),
    ({"type": "ols", "cov_type": "HC1", "use_t": False}, "two_arm_mnar", True),
    ({"type": "ols", "cov_type": "HC2"}, "two_arm_sparse", True),  # too few rows: per replicate
    ({"type": "ols", "cov_type": "HC0"}, "three_arms_missing", True),
    ({"type": "ols", "term": "C(arm)[T.2]"}, "three_arms_missing", True),
    ({"type": "ols", "cov_type": "cluster"}, "clusters_variable_missing", True),
    ({"type": "ols", "cov_type": "cluster", "use_t": False}, "clusters_variable_missing", True),
    ({"type": "ols", "cov_type": "cluster"}, "clusters", True),   # complete data too (shared cluster ids)
    ({"type": "ols", "cov_type": "cluster", "use_t": False}, "clusters_variable", True),  # padding, no missing
    ({"type": "ols"}, "clusters_variable_missing", True),
    ({"type": "ols"}, "three_arms", True),                # any complete table with the formula's columns
    ({"type": "dunnett"}, "three_arms", True),            # arms in sorted blocks of the table layout
    ({"type": "dunnett", "alternative": "less"}, "three_arms", True),
    ({"type": "dunnett"}, "two_arm", True),               # one comparison with control
    ({"type": "dunnett"}, "two_arm_missing", True),       # missing values: complete cases in the batch
    ({"type": "anova_f"}, "three_arms", True),
    ({"type": "anova_f"}, "one_sample", False),           # no arms
    ({"type": "multiple", "tests": [{"type": "t_test"}, {"type": "welch_t"}]}, "two_arm", True),
    ({"type": "multiple", "tests": [{"type": "logistic"}, {"type": "fisher_exact"}]}, "binary_small", True),
    ({"type": "multiple", "tests": [{"type": "t_test"}, {"type": "welch_t"}, {"type": "tost", "margin": 0.5}]},
     "two_arm_missing", True),                          # its tests batch with missing outcomes: so does it
    ({"type": "multiple", "tests": [{"type": "t_test"}, {"type": "z_test"}], "method": "bonferroni"},
     "two_arm_sparse", True),
    ({"type": "multiple", "tests": [{"type": "welch_t"}], "comparisons": "each_vs_control"}, "three_arms_missing",
     True),
    # interim looks on slices of each replicate (tests/test_groupseq_sim.py checks them against the recursion)
    ({"type": "group_sequential", "inner": {"type": "t_test", "alternative": "greater"}, "futility": [0.0, 0.0]},
     "two_arm", True),
    ({"type": "group_sequential", "inner": {"type": "welch_t"}, "fractions": [0.5, 1.0], "scale": "p",
      "alpha": 0.05}, "two_arm_missing", True),
    ({"type": "group_sequential", "inner": {"type": "t_test", "alternative": "greater"},
      "futility": {"rule": "predictive", "threshold": 0.2}}, "two_arm", True),
    # looks at event counts: later entrants masked as padding rows of the inner log-rank's batch
    ({"type": "group_sequential", "inner": {"type": "logrank", "alternative": "less"}, "fractions": [0.5, 1.0]},
     "survival", True),
]

#: cases whose batch result marks some replicates as failed
WITH_TROUBLE = {("permutation_test", "two_arm_sparse"), ("bootstrap_ci", "two_arm_sparse"),  # < 2 values: scipy raises
                ("logistic", "binary_small"), ("logistic", "binary_missing"), ("poisson_glm", "counts_small"), ("log_t", "paired"),
                ("log_t", "one_sample"), ("cluster_means_t", "clusters_individual"), ("multiple", "binary_small"),
                # sparse replicates handed to the per-replicate path: an empty arm raises ZeroDivisionError
                # there (Student's and the z-test's SE); Welch's and the one-sample paths give NaN instead
                ("t_test", "two_arm_sparse"), ("z_test", "two_arm_sparse"),
                ("log_t", "one_sample_sparse"), ("log_t", "paired_missing"), ("multiple", "two_arm_sparse"),
                # an empty sample: the per-replicate Hodges-Lehmann estimate raises ValueError
                ("mann_whitney", "two_arm_sparse"), ("wilcoxon_signed_rank", "one_sample_sparse"),
                # an arm without observed outcomes: statsmodels has no arm coefficient (ValueError)
                ("ols", "two_arm_sparse")}


def test_sparse_batches_have_replicates_without_a_statistic():
    # the sparse cases above exercise the hand-over to the per-replicate path: some replicates
    # keep fewer than two observed values in an arm (or none at all)
    two = batch_of("two_arm_sparse").layout("two_arm")
    assert np.any(np.minimum(two.n0, two.n1) < 2) and np.any(np.minimum(two.n0, two.n1) == 0)
    assert np.any(np.minimum(two.n0, two.n1) >= 2)
    one = batch_of("one_sample_sparse").layout("one_sample")
    assert np.any(one.observed.sum(axis=1) < 2)


def _case_id(case):
    spec, process, _ = case
    extra = ",".join(f"{k}={v}" for k, v in spec.items() if k not in ("type", "tests"))
    return f"{spec['type']}[{extra}]-{process}"


@pytest.mark.parametrize("spec, process, takes_batch", CASES, ids=[_case_id(c) for c in CASES])
def test_batch_path_equals_per_replicate_path(spec, process, takes_batch):
    analysis = build("analysis", spec)
    batch = batch_of(process)
    assert analysis.supports_batch(batch) == takes_batch
    if not takes_batch:
        return
    if analysis.layouts:  # what it accepts has a layout it declares
        assert any(batch.layout(k) is not None for k in analysis.layouts)
        if type(analysis).supports_batch is Analysis.supports_batch:
            assert analysis.find_layout(batch).kind in analysis.layouts
    res = analysis.batch(batch)
    assert isinstance(res, BatchResult)
    # the cases that exercise trouble do (per-replicate fits, errors by replicate)
    assert bool(res.trouble) == ((spec["type"], process) in WITH_TROUBLE)
    ref, ref_cause = _per_replicate(analysis, batch)
    np.testing.assert_array_equal(_batch_causes(res, batch.size), ref_cause)
    for f in FIELDS:
        got = res.get(f)
        if got is None:  # the analysis has no such field: the per-replicate path gives NaN too
            assert np.all(np.isnan(ref[f])), f
            continue
        np.testing.assert_allclose(np.broadcast_to(got, (batch.size,)), ref[f], rtol=1e-9, atol=1e-12,
                                   equal_nan=True, err_msg=f)
    if res.pvalues is not None:
        ok = np.array([not c.startswith("error:") for c in ref_cause])  # no p-values where it raises
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            per = np.array([analysis(batch.replicate(i)).pvalues for i in np.flatnonzero(ok)])
        np.testing.assert_allclose(res.pvalues[ok], per, rtol=1e-9, atol=1e-12, equal_nan=True)


def test_proportional_odds_declares_its_layout():
    # its batch Newton-Raphson is compared with statsmodels OrderedModel in test_ordinal.py, at that optimiser's
    # accuracy (its SE comes from a finite-difference Hessian); here only the declaration
    po = build("analysis", {"type": "proportional_odds"})
    assert po.layouts == ("two_arm",) and po.supports_batch(batch_of("ordinal_missing"))
    assert not po.supports_batch(batch_of("two_arm"))   # continuous outcomes: replicate by replicate


def test_mixed_model_declares_its_layout():
    # its batch REML fit is compared with statsmodels' optimiser in test_mixed.py (with that
    # optimiser's tolerance); here only the declaration
    mm = sp.MixedModel()
    assert mm.supports_batch(batch_of("clusters")) and mm.supports_batch(batch_of("clusters_variable_missing"))
    assert mm.layouts == ("clustered", "longitudinal")
    assert not mm.supports_batch(batch_of("two_arm"))  # no clusters: no clustered layout


def test_every_builtin_batch_analysis_declares_known_layouts():
    load_builtins()
    with_batch = [lookup("analysis", n) for n in names("analysis")]
    with_batch = [c for c in with_batch if issubclass(c, Analysis) and c.batch is not Analysis.batch]
    assert len(with_batch) >= 15
    for cls in with_batch:
        if cls.name in ("multiple", "group_sequential"):  # take the layouts of their component tests
            continue
        assert cls.layouts and set(cls.layouts) <= set(LAYOUTS), cls.name


# -- references: scipy.stats on a few replicates ---------------------------------------------------
def test_two_sample_batches_against_scipy():
    b = batch_of("two_arm")
    for cls, equal_var in ((sp.TTest, True), (sp.WelchT, False)):
        res = cls(alternative="greater").batch(b)
        for i in (0, 7, 19):
            t = b.replicate(i)
            y0, y1 = t["y"][t["arm"] == 0], t["y"][t["arm"] == 1]
            # scipy.stats.ttest_ind (Student: pooled; Welch 1947 with Satterthwaite df)
            r = stats.ttest_ind(y1, y0, equal_var=equal_var, alternative="greater")
            assert res.pvalue[i] == pytest.approx(r.pvalue, rel=1e-9)
            assert res.estimate[i] / res.se[i] == pytest.approx(r.statistic, rel=1e-9)
            # the reported interval is two-sided whatever the alternative
            lo, hi = stats.ttest_ind(y1, y0, equal_var=equal_var).confidence_interval(0.95)
            assert (res.ci_low[i], res.ci_high[i]) == pytest.approx((lo, hi), rel=1e-9)
    p = batch_of("paired")
    res = sp.PairedT().batch(p)
    for i in (1, 2):
        t = p.replicate(i)
        # scipy.stats.ttest_rel on pairs aligned by id
        o0, o1 = np.argsort(t["pair"][t["arm"] == 0]), np.argsort(t["pair"][t["arm"] == 1])
        r = stats.ttest_rel(t["y"][t["arm"] == 1][o1], t["y"][t["arm"] == 0][o0])
        assert res.pvalue[i] == pytest.approx(r.pvalue, rel=1e-9)


def test_rank_and_table_batches_against_scipy():
    b = batch_of("two_arm")
    mw = sp.MannWhitney(continuity=True).batch(b)
    one = batch_of("one_sample")
    wsr = sp.WilcoxonSignedRank().batch(one)
    binb = batch_of("binary_missing")
    chi = sp.ChiSquare().batch(binb)
    fisher = sp.FisherExact().batch(binb)
    for i in (0, 11):
        t = b.replicate(i)
        # scipy.stats.mannwhitneyu, normal approximation with continuity correction
        r = stats.mannwhitneyu(t["y"][t["arm"] == 1], t["y"][t["arm"] == 0], method="asymptotic",
                               use_continuity=True)
        assert mw.pvalue[i] == pytest.approx(r.pvalue, rel=1e-9)
        # scipy.stats.wilcoxon, normal approximation
        assert wsr.pvalue[i] == pytest.approx(stats.wilcoxon(one.replicate(i)["y"], method="asymptotic").pvalue,
                                              rel=1e-9)
        t = binb.replicate(i)
        ok = np.isfinite(t["y"])
        y, arm = t["y"][ok], t["arm"][ok]
        table = [[int(y[arm == 1].sum()), int((arm == 1).sum() - y[arm == 1].sum())],
                 [int(y[arm == 0].sum()), int((arm == 0).sum() - y[arm == 0].sum())]]
        # scipy.stats.chi2_contingency (Yates-corrected) and scipy.stats.fisher_exact
        assert chi.pvalue[i] == pytest.approx(stats.chi2_contingency(table, correction=True).pvalue, rel=1e-9)
        assert fisher.pvalue[i] == pytest.approx(stats.fisher_exact(table).pvalue, rel=1e-9)


def test_numeric_helpers_against_scipy():
    rng = np.random.default_rng(5)
    z = np.concatenate([rng.normal(0, 3, 2000), [0.0, -0.0, 40.0, -40.0, np.inf, -np.inf, np.nan, 1e-300]])
    # the same numbers as scipy.stats.norm.sf / cdf, bit for bit (both evaluate special.ndtr)
    np.testing.assert_array_equal(p_from_z(z, "two-sided"), 2.0 * stats.norm.sf(np.abs(z)))
    np.testing.assert_array_equal(p_from_z(z, "greater"), stats.norm.sf(z))
    np.testing.assert_array_equal(p_from_z(z, "less"), stats.norm.cdf(z))
    assert np.nanmax(p_from_z(z, "two-sided")) <= 1.0
    np.testing.assert_array_equal(p_from_t(z[:50], 7.5, "greater"), stats.t.sf(z[:50], 7.5))
    y0, y1 = rng.normal(0, 1, 9), rng.normal(0.5, 2, 14)
    for equal_var in (True, False):
        se, df = two_sample_se_df(9, 14, y0.var(ddof=1), y1.var(ddof=1), equal_var)
        r = stats.ttest_ind(y1, y0, equal_var=equal_var)  # scipy.stats.ttest_ind: statistic and df
        assert (y1.mean() - y0.mean()) / se == pytest.approx(r.statistic, rel=1e-12)
        assert df == pytest.approx(r.df, rel=1e-12)



def test_t_and_normal_helpers_equal_scipy_stats_bit_for_bit():
    # numeric's t_sf / t_cdf / t_ppf / normal_ppf call scipy.special directly so that a worker running a
    # batch of t-tests needs no scipy.stats; they must give scipy.stats.t's and norm's numbers bit for bit
    # (records of the bundled scenarios stay identical), edge cases included: df <= 0, NaN or infinite,
    # t infinite or NaN, q at 0 and 1 or outside [0, 1]
    rng = np.random.default_rng(12)
    t = np.concatenate([rng.normal(0, 4, 300), [0.0, -0.0, 1e-300, 40.0, -40.0, 1e300, -1e300, np.inf, -np.inf,
                                                np.nan]])
    df = np.array([-1.0, 0.0, 1e-300, 0.3, 1.0, 2.0, 2.5, 7.0, 30.0, 126.0, 1e6, 1e300, np.inf, np.nan])
    tt, dd = np.meshgrid(t, df)
    q = np.concatenate([rng.uniform(0, 1, 100), [0.0, 1e-300, 0.025, 0.5, 0.975, 0.995, 1.0, 1.2, -0.1, np.nan]])
    qq, dq = np.meshgrid(q, df)
    with np.errstate(all="ignore"):
        np.testing.assert_array_equal(t_sf(tt, dd), stats.t.sf(tt, dd))
        np.testing.assert_array_equal(t_cdf(tt, dd), stats.t.cdf(tt, dd))
        np.testing.assert_array_equal(t_ppf(qq, dq), stats.t.ppf(qq, dq))
        np.testing.assert_array_equal(normal_ppf(q), stats.norm.ppf(q))
        for alt in ("two-sided", "greater", "less"):
            ref = {"two-sided": 2.0 * stats.t.sf(np.abs(tt), dd), "greater": stats.t.sf(tt, dd),
                   "less": stats.t.cdf(tt, dd)}[alt]
            np.testing.assert_array_equal(p_from_t(tt, dd, alt), ref)
    # scalars in, numpy scalars out, as scipy.stats gives them (the per-replicate paths call float() on them)
    for got, ref in ((t_sf(1.3, 9), stats.t.sf(1.3, 9)), (t_ppf(0.975, 9), stats.t.ppf(0.975, 9)),
                     (normal_ppf(0.975), stats.norm.ppf(0.975))):
        assert type(got) is type(ref) and got == ref
    # and the values are the t distribution's: the 97.5% point on 10 df is 2.228 (Student's t tables, e.g.
    # Fisher & Yates 1963, Table III; from memory)
    assert round(float(t_ppf(0.975, 10)), 3) == 2.228

# -- the batch result and the engine -------------------------------------------------------------
class _DictT(sp.TTest):
    """A batch analysis written before BatchResult: returns a plain dict, with trouble on replicate 0."""

    name = None

    def batch(self, batch):
        out = {k: v for k, v in super().batch(batch).items()}
        mask = np.zeros(batch.size, bool)
        mask[0] = True
        out["trouble"] = {"warning:UserWarning": mask}
        out["trouble_messages"] = {"warning:UserWarning": "flagged"}
        return out


class _TypedT(_DictT):
    name = None

    def batch(self, batch):
        return as_batch_result(super().batch(batch))


def test_engine_records_dict_and_batch_result_alike():
    proc = sp.TwoArm(n=10, effect=0.5)
    outs = [run_chunk(sp.Scenario(proc, analyses={"t": a()}), 3, 0, 0, 50) for a in (_DictT, _TypedT)]
    assert all(o.paths["t"] == "batch" for o in outs)
    recs = [o.records["t"] for o in outs]
    for f in FIELDS + ("status",):
        np.testing.assert_array_equal(recs[0][f], recs[1][f])
    # the values are Student's t-test's, and replicate 0 carries the flagged cause
    np.testing.assert_array_equal(recs[0]["pvalue"], sp.TTest().batch(proc.draw_batch(
        np.random.default_rng(chunk_seed(3, 0, 0)), 50)).pvalue)
    assert outs[0].causes == ["warning:UserWarning"] and outs[0].messages["warning:UserWarning"] == "flagged"
    assert recs[0]["status"][0] == 1 and not recs[0]["status"][1:].any()


def test_batch_result_reads_as_its_set_fields():
    res = BatchResult(pvalue=np.array([0.1, 0.2]), estimate=np.array([1.0, 2.0]))
    assert set(res) == {"pvalue", "estimate"} and "se" not in res and res.get("trouble") is None
    res.mark("error:ValueError", [True, False], "ValueError: bad")
    res.mark("error:ValueError", [False, True], "another")
    assert res["trouble"]["error:ValueError"].tolist() == [True, True]
    assert res.trouble_messages == {"error:ValueError": "ValueError: bad"}
    with pytest.raises(TypeError, match="return a BatchResult or a dict with 'pvalue'"):
        as_batch_result({"p": 1})


def test_generic_supports_batch_follows_the_declaration():
    class PairsOnly(Analysis):
        name = None
        layouts = ("paired",)

        def _supports(self, layout):
            return layout.y0.shape[1] >= 5

        def __call__(self, data):
            return 0.5

        def batch(self, batch):
            return BatchResult(pvalue=np.full(batch.size, 0.5))

    class NoBatch(Analysis):
        name = None
        layouts = ("two_arm",)

    assert PairsOnly().supports_batch(batch_of("paired"))
    assert not PairsOnly().supports_batch(batch_of("two_arm"))
    small = sp.NormalPaired(n=3).draw_batch(np.random.default_rng(0), 2)
    assert small.layout("paired") is not None and not PairsOnly().supports_batch(small)
    assert not NoBatch().supports_batch(batch_of("two_arm"))
    with pytest.raises(ValueError, match="paired_t: no batch path for this batch .* layouts paired; the batch has "
                                         "table, two_arm"):
        sp.PairedT().batch(batch_of("two_arm"))


def test_engine_keeps_the_batch_path_with_missing_outcomes():
    # 20% MCAR / MAR / MNAR outcomes: the t-test family runs on the batch path through the engine
    # (before, any missingness sent it per replicate), and records the per-replicate path's
    # values (scipy.stats.ttest_ind on the observed values of replicate 0 as the reference)
    analyses = {"t": sp.TTest(), "w": sp.WelchT(), "z": sp.ZTest(), "tost": sp.TOST(margin=0.5),
                "ni": sp.NonInferiority(margin=0.3), "mw": sp.MannWhitney(), "ols": sp.OLS(),
                "ancova": sp.Ancova(cov_type="HC3")}
    for miss in (sp.MCAR(rate=0.2), sp.MAR(rate=0.2), sp.MNAR(rate=0.2)):
        proc = sp.TwoArm(n=15, effect=0.5, baseline_corr=0.3, missing=miss)
        out = run_chunk(sp.Scenario(proc, analyses=analyses), 7, 0, 0, 40)
        assert all(out.paths[k] == "batch" for k in analyses), out.paths
        batch = proc.draw_batch(np.random.default_rng(chunk_seed(7, 0, 0)), 40)
        t = batch.replicate(0)
        ok = np.isfinite(t["y"])
        y, arm = t["y"][ok], t["arm"][ok]
        ref = stats.ttest_ind(y[arm == 1], y[arm == 0]).pvalue
        assert out.records["t"]["pvalue"][0] == pytest.approx(ref, rel=1e-10)
    pairs = {"p": sp.PairedT(), "l": sp.TTest(), "w": sp.WilcoxonSignedRank()}
    paired = run_chunk(sp.Scenario(sp.NormalPaired(n=12, missing=sp.MCAR(rate=0.2)), analyses=pairs), 7, 0, 0, 20)
    assert paired.paths == {"p": "batch", "l": "batch", "w": "batch"}
    clusters = sp.ClusterTrial(clusters=6, cluster_size=5, cluster_size_cv=0.4, icc=0.1, missing=sp.MCAR(rate=0.2))
    out = run_chunk(sp.Scenario(clusters, analyses={"cr": sp.OLS(cov_type="cluster"), "t": sp.TTest()}), 7, 0, 0, 20)
    assert out.paths == {"cr": "batch", "t": "batch"}
