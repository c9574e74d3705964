"""cluster_means_t, gee and final_visit_t: batch vs per-replicate, references, power of cluster designs.

External sources, named beside each check:
- scipy.stats.ttest_ind and scipy.stats.nct (noncentral t power);
- statsmodels GEE (Liang & Zeger 1986) fitted directly with formulas;
- Donner & Klar (2000), Design and Analysis of Cluster Randomization Trials, ch. 6: with k equal
  clusters of m per arm the cluster means are i.i.d. N(mu, sigma_b^2 + sigma_w^2 / m), so the
  cluster-means t-test has exact noncentral-t power with df = 2k - 2;
- Eldridge, Ashby & Kerry (2006), Int J Epidemiol: design effect 1 + ((cv^2 + 1) m - 1) icc for
  variable cluster sizes, the variance inflation of the size-weighted (individual-level) mean
  difference for many clusters.
Statistical tolerances are 4 Monte Carlo standard errors (MCSE).
"""

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.genmod.cov_struct import Exchangeable

import simpower as sp
from simpower.analyses.clustered import GEE, ClusterMeansT, FinalVisitT
from simpower.processes.clusters import ClusterTrial, size_law
from simpower.processes.repeated import RepeatedMeasures

FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high")


def per_replicate(analysis, batch):
    rows = [analysis(batch.replicate(i)) for i in range(batch.size)]
    return {f: np.array([getattr(r, f) for r in rows]) for f in FIELDS}


def assert_batch_agrees(analysis, batch):
    assert analysis.supports_batch(batch)
    got = analysis.batch(batch)
    ref = per_replicate(analysis, batch)
    for f in FIELDS:
        assert np.allclose(got[f], ref[f], rtol=0, atol=1e-10, equal_nan=True), f


def noncentral_t_power(effect, se, df, alpha=0.05):
    """Two-sided power of a t-test (scipy.stats.nct)."""
    crit = stats.t.ppf(1 - alpha / 2, df)
    nc = effect / se
    return stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)


def eldridge_power(proc, alpha=0.05):
    """Power at n / DE with DE = 1 + ((cv^2 + 1) m - 1) icc (Eldridge et al. 2006), t with 2k - 2 df."""
    m, cv, icc, k = proc.cluster_size, proc.cluster_size_cv, proc.icc, proc.clusters
    deff = 1 + ((cv**2 + 1) * m - 1) * icc
    se = proc.sd * math.sqrt(2 * deff / (k * m))
    return noncentral_t_power(proc.effect, se, 2 * k - 2, alpha), se


def mean_inverse_size(mean, cv):
    """E[1 / size] for the cluster-size law, summed over the scipy pmf."""
    kind, args = size_law(mean, cv)
    x = np.arange(0, 20_000)
    if kind == "negbin":
        shape, scale = args
        pmf = stats.nbinom.pmf(x, shape, 1 / (1 + scale))
    else:
        raise AssertionError(kind)
    return float(np.sum(pmf / (1 + x)))


# -- cluster_means_t: batch = per replicate ---------------------------------------------
@pytest.mark.parametrize("weights", ["equal", "size"])
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize("cv,missing", [(0.0, None), (0.7, None), (0.0, {"type": "mcar", "rate": 0.3}),
                                        (1.2, {"type": "mcar", "rate": 0.6})])
def test_cluster_means_batch_agrees_with_per_replicate(weights, alternative, cv, missing):
    proc = ClusterTrial(clusters=5, cluster_size=4, cluster_size_cv=cv, icc=0.1, effect=0.4, missing=missing)
    batch = proc.draw_batch(np.random.default_rng(41), 60)
    assert_batch_agrees(ClusterMeansT(weights=weights, alternative=alternative, ci_level=0.9), batch)


def test_cluster_means_equal_weights_is_scipy_t_on_cluster_means():
    # cluster means computed independently with pandas, then scipy.stats.ttest_ind
    proc = ClusterTrial(clusters=6, cluster_size=5, cluster_size_cv=0.8, icc=0.2, effect=0.5,
                        missing={"type": "mcar", "rate": 0.2})
    d = proc(np.random.default_rng(42))
    df = pd.DataFrame(d).dropna(subset=["y"])
    means = df.groupby("cluster").agg(y=("y", "mean"), arm=("arm", "first"))
    ref = stats.ttest_ind(means.y[means.arm == 1], means.y[means.arm == 0])
    res = ClusterMeansT()(d)
    assert math.isclose(res.pvalue, ref.pvalue, rel_tol=1e-12)
    assert math.isclose(res.estimate, means.y[means.arm == 1].mean() - means.y[means.arm == 0].mean(), rel_tol=1e-12)


def test_size_weights_estimate_individual_mean_difference_and_equal_sizes_coincide():
    proc = ClusterTrial(clusters=6, cluster_size=5, cluster_size_cv=0.8, icc=0.2, effect=0.5)
    d = proc(np.random.default_rng(43))
    res = ClusterMeansT(weights="size")(d)
    assert math.isclose(res.estimate, d["y"][d["arm"] == 1].mean() - d["y"][d["arm"] == 0].mean(), rel_tol=1e-12)
    # equal clusters: the sandwich variance per arm reduces to s^2 / k, so both tests are the same
    batch = ClusterTrial(clusters=6, cluster_size=5, icc=0.2, effect=0.5).draw_batch(np.random.default_rng(44), 40)
    a, b = ClusterMeansT().batch(batch), ClusterMeansT(weights="size").batch(batch)
    for f in FIELDS:
        assert np.allclose(a[f], b[f], rtol=1e-12, atol=1e-14)


def test_cluster_means_refuses_individual_randomisation_on_both_paths():
    proc = ClusterTrial(clusters=4, cluster_size=4, icc=0.1, randomise="individual")
    with pytest.raises(ValueError, match="cluster randomisation"):
        ClusterMeansT()(proc(np.random.default_rng(0)))
    sc = sp.Scenario(proc, ClusterMeansT())
    # the batch path records the same error for every replicate of a chunk ...
    from simpower.engine import run_chunk

    out = run_chunk(sc, 1, 0, 0, 20)
    assert out.paths["cluster_means_t"] == "batch"
    assert out.causes == ["error:ValueError"] and np.all(out.records["cluster_means_t"]["status"] == 1)
    # ... and a run refuses the mismatch up front, naming the analysis and the error
    with pytest.raises(sp.ParameterError, match="analysis `cluster_means_t` cannot analyse.*cluster randomisation"):
        sp.run(sc, reps=20, seed=1, n_jobs=1, max_failure_rate=1.0)


# -- cluster designs: power -------------------------------------------------------------
def test_equal_clusters_power_is_exact_noncentral_t():
    # Donner & Klar (2000): se of the difference of cluster-mean averages sqrt((sigma_b^2 + sigma_w^2/m) 2/k)
    k, m, icc, effect = 8, 10, 0.05, 0.45
    proc = ClusterTrial(clusters=k, cluster_size=m, icc=icc, effect=effect)
    se = math.sqrt((icc + (1 - icc) / m) * 2 / k)
    target = noncentral_t_power(effect, se, 2 * k - 2)
    analysis = ClusterMeansT()
    assert math.isclose(analysis.analytic_power(proc, 0.05), target, rel_tol=1e-6)
    res = sp.run(sp.Scenario(proc, analysis), reps=6000, seed=5, n_jobs=1)
    assert res.paths["cluster_means_t"] == "batch"
    assert abs(res.power - target) < 4 * math.sqrt(target * (1 - target) / res.reps), (res.power, target)
    null = sp.run(sp.Scenario(proc.null(), analysis), reps=6000, seed=6, n_jobs=1)
    assert abs(null.power - 0.05) < 4 * math.sqrt(0.05 * 0.95 / null.reps)
    assert ClusterMeansT().analytic_power(proc.replace(cluster_size_cv=0.5), 0.05) is None


@pytest.mark.slow
def test_variable_sizes_unweighted_test_variance_and_its_departure_from_eldridge():
    """The unweighted cluster-means estimator has variance 2 (sigma_b^2 + sigma_w^2 E[1/m]) / k exactly
    (cluster means are i.i.d. within an arm; derived here from the model). Eldridge's design effect
    describes the size-weighted estimator instead, and the unweighted test departs from it in a
    direction set by the ICC: below it when the ICC is small (within-cluster noise dominates and small
    clusters are over-weighted), above it when the ICC is large (equal weights are then near-optimal).
    """
    reps = 6000
    for icc, effect, side in ((0.01, 0.35, "below"), (0.2, 0.6, "above")):
        proc = ClusterTrial(clusters=15, cluster_size=20, cluster_size_cv=0.7, icc=icc, effect=effect)
        res = sp.run(sp.Scenario(proc, ClusterMeansT()), reps=reps, seed=7, n_jobs=1)
        est = res.records["cluster_means_t"].estimate
        exact_var = 2 * (icc + (1 - icc) * mean_inverse_size(20, 0.7)) / 15
        sq = (est - effect) ** 2
        assert abs(sq.mean() - exact_var) < 4 * sq.std(ddof=1) / math.sqrt(reps), (sq.mean(), exact_var)
        approx, _ = eldridge_power(proc)
        gap = res.power - approx
        mcse = math.sqrt(res.power * (1 - res.power) / reps)
        assert (gap < -4 * mcse) if side == "below" else (gap > 4 * mcse), (icc, res.power, approx)
        null = sp.run(sp.Scenario(proc.null(), ClusterMeansT()), reps=reps, seed=8, n_jobs=1)
        assert null.power < 0.05 + 4 * math.sqrt(0.05 * 0.95 / reps)  # a valid test (Donner & Klar 2000)


@pytest.mark.slow
def test_variable_sizes_size_weighted_test_matches_eldridge_design_effect():
    """Eldridge et al. (2006) approximate Var(size-weighted mean difference) by replacing sum m_c^2 / M^2
    with (1 + cv^2) / k and 1 / M with 1 / (k m); the error shrinks with the number of clusters, so the
    check uses 60 clusters per arm (at 15 per arm the sandwich-variance test is liberal, type I error
    about 0.06, and the comparison would not be fair)."""
    reps = 6000
    proc = ClusterTrial(clusters=60, cluster_size=20, cluster_size_cv=0.7, icc=0.05, effect=0.16)
    approx, se = eldridge_power(proc)
    res = sp.run(sp.Scenario(proc, ClusterMeansT(weights="size")), reps=reps, seed=9, n_jobs=1)
    assert abs(res.power - approx) < 4 * math.sqrt(approx * (1 - approx) / reps), (res.power, approx)
    sq = (res.records["cluster_means_t"].estimate - proc.effect) ** 2
    assert abs(sq.mean() - se**2) < 4 * sq.std(ddof=1) / math.sqrt(reps), (sq.mean(), se**2)


# -- GEE ------------------------------------------------------------------------------
@pytest.mark.parametrize("cv,missing", [(0.0, None), (0.6, {"type": "mcar", "rate": 0.2})])
def test_gee_matches_statsmodels_on_cluster_data(cv, missing):
    proc = ClusterTrial(clusters=6, cluster_size=8, cluster_size_cv=cv, icc=0.1, effect=0.5, missing=missing)
    d = proc(np.random.default_rng(51))
    df = pd.DataFrame(d).dropna(subset=["y"])
    ref = sm.GEE.from_formula("y ~ arm", groups="cluster", data=df, cov_struct=Exchangeable(),
                              family=sm.families.Gaussian()).fit()
    res = GEE()(d)
    assert math.isclose(res.estimate, ref.params["arm"], rel_tol=1e-10)
    assert math.isclose(res.se, ref.bse["arm"], rel_tol=1e-10)
    assert math.isclose(res.pvalue, ref.pvalues["arm"], rel_tol=1e-8)
    lo, hi = ref.conf_int().loc["arm"]
    assert math.isclose(res.ci_low, lo, rel_tol=1e-8) and math.isclose(res.ci_high, hi, rel_tol=1e-8)


def test_gee_final_visit_effect_on_repeated_data():
    proc = RepeatedMeasures(n=30, visits=4, rho=0.5, effect=0.6, dropout_rate=0.2)
    d = proc(np.random.default_rng(52))
    df = pd.DataFrame(d).dropna(subset=["y"])
    ref = sm.GEE.from_formula("y ~ C(visit, Treatment(reference=3)) * arm", groups="subject", data=df,
                              cov_struct=Exchangeable(), family=sm.families.Gaussian()).fit()
    res = GEE()(d)
    assert math.isclose(res.estimate, ref.params["arm"], rel_tol=1e-8)
    assert math.isclose(res.se, ref.bse["arm"], rel_tol=1e-8)
    # a user formula goes to statsmodels unchanged
    user = GEE(formula="y ~ arm + C(visit)", cov_struct="independence")(d)
    ref2 = sm.GEE.from_formula("y ~ arm + C(visit)", groups="subject", data=df,
                               family=sm.families.Gaussian()).fit()
    assert math.isclose(user.estimate, ref2.params["arm"], rel_tol=1e-10)


def test_gee_bias_reduced_with_t_reference():
    proc = ClusterTrial(clusters=5, cluster_size=6, icc=0.1, effect=0.5)
    d = proc(np.random.default_rng(53))
    ref = sm.GEE.from_formula("y ~ arm", groups="cluster", data=pd.DataFrame(d), cov_struct=Exchangeable(),
                              family=sm.families.Gaussian()).fit(cov_type="bias_reduced")
    res = GEE(cov_type="bias_reduced", distribution="t", alternative="greater")(d)
    z = ref.params["arm"] / ref.bse["arm"]
    assert math.isclose(res.se, ref.bse["arm"], rel_tol=1e-10)
    assert math.isclose(res.pvalue, stats.t.sf(z, 10 - 2), rel_tol=1e-10)  # 10 clusters, 2 coefficients


def test_gee_fit_warnings_reach_the_engine():
    # a rank-deficient mean model (arm twice: as a number and as a category) makes statsmodels
    # warn; the engine must record it per replicate
    proc = ClusterTrial(clusters=4, cluster_size=5, icc=0.1, effect=0.5)
    sc = sp.Scenario(proc, analyses={"bad": GEE(formula="y ~ arm + C(arm)"), "good": GEE()})
    res = sp.run(sc, reps=6, seed=2, n_jobs=1)
    bad = res.records["bad"]
    assert all(c.startswith("warning:") for c in bad.causes) and np.all(bad.status > 0)
    assert np.all(res.records["good"].status == 0)


def test_gee_bad_parameters():
    with pytest.raises(sp.ParameterError, match="^`formula`"):
        GEE(formula="arm")
    with pytest.raises(sp.ParameterError, match="^`cov_struct`"):
        GEE(cov_struct="ar2")
    with pytest.raises(ValueError, match="term"):
        GEE(term="treatment")(ClusterTrial(clusters=3, cluster_size=3, icc=0.1)(np.random.default_rng(0)))


# -- final_visit_t --------------------------------------------------------------------
@pytest.mark.parametrize("welch", [False, True])
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_final_visit_batch_agrees_with_per_replicate(welch, alternative):
    proc = RepeatedMeasures(n=12, ratio=1.5, visits=4, rho=0.5, effect=0.7, dropout_rate=0.3,
                            dropout_mar_slope=0.8)
    batch = proc.draw_batch(np.random.default_rng(61), 80)
    assert_batch_agrees(FinalVisitT(welch=welch, alternative=alternative), batch)


def test_final_visit_power_without_dropout_is_noncentral_t():
    # the final-visit outcomes are N(effect, sd^2) per arm: Student's t power (scipy.stats.nct)
    n, effect = 20, 0.8
    proc = RepeatedMeasures(n=n, visits=3, rho=0.4, effect=effect, sd=1.0)
    target = noncentral_t_power(effect, math.sqrt(2 / n), 2 * n - 2)
    res = sp.run(sp.Scenario(proc, FinalVisitT()), reps=4000, seed=62, n_jobs=1)
    assert res.paths["final_visit_t"] == "batch"
    assert abs(res.power - target) < 4 * math.sqrt(target * (1 - target) / res.reps)


def test_every_analysis_states_its_null_hypothesis():
    for cls in (ClusterMeansT, GEE, FinalVisitT):
        assert cls.null_hypothesis and cls.__doc__ and "H0" in cls.__doc__
