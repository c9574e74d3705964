"""The composed process ``trial``: a design (arms, clusters) x a continuous outcome x missingness.

Sources. One-way ANOVA of k clusters of m members with intracluster correlation rho and total
variance s^2: E[MSW] = s^2 (1 - rho) and E[MSB] = s^2 (1 + (m - 1) rho) (Donner & Klar 2000,
Design and Analysis of Cluster Randomization Trials, ch. 2; from memory). The t-test on cluster
means of k clusters per arm has noncentral-t power with 2(k - 1) df and noncentrality
effect / sqrt(2 var(mean) / k), var(mean) = s^2 (rho + (1 - rho) / m) (Donner & Klar 2000, ch. 5;
computed with scipy.stats.nct). A lognormal outcome is exp of a normal one, so on the log scale
the same expected mean squares hold with s the SD of log Y. Tolerances are 4 Monte Carlo SEs.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower.processes.composed import Arms, Clusters, Trial
from simpower.scenario_files import loads

Z = 4.0


@pytest.mark.parametrize("kw", [
    {"effect": 0.4},
    {"outcome": sp.Lognormal(median=2.0, cv=0.5), "effect": 0.4, "effect_type": "d", "sd_ratio": 1.3,
     "missing": sp.MNAR(rate=0.2)},
    {"outcome": sp.Gamma(mean=2.0, cv=0.7), "effect": 1.2, "effect_type": "ratio",
     "missing": sp.MAR(rate=0.3, on="arm")},
])
def test_trial_with_arms_draws_exactly_what_two_arm_draws(kw):
    """two_arm = arms x outcome x missingness: the same fields give the same replicates."""
    composed, old = Trial(design=Arms(n=9, ratio=1.4), **kw), sp.TwoArm(n=9, ratio=1.4, **kw)
    a, b = composed.draw_batch(np.random.default_rng(1), 6), old.draw_batch(np.random.default_rng(1), 6)
    assert a.per_rep.keys() == b.per_rep.keys() and a.info == b.info
    for key in b.per_rep:
        np.testing.assert_array_equal(a.per_rep[key], b.per_rep[key])
    np.testing.assert_array_equal(a["arm"], b["arm"])
    assert composed.true_effect() == old.true_effect() and composed.facts() == old.facts()


def _mean_squares(y, cluster, n_clusters, m):
    """Per-replicate one-way ANOVA mean squares of equal clusters of m (rows ordered by cluster)."""
    g = y.reshape(y.shape[0], n_clusters, m)
    means = g.mean(axis=2)
    msw = ((g - means[:, :, None]) ** 2).sum(axis=(1, 2)) / (n_clusters * (m - 1))
    msb = m * means.var(axis=1, ddof=1)
    return msw, msb


@pytest.mark.parametrize("outcome, log", [(sp.Normal(mean=1.0, sd=2.0), False),
                                          (sp.Lognormal(median=3.0, sigma=0.8), True)])
def test_clusters_give_the_icc_on_the_normal_scores_scale(outcome, log):
    k, m, icc = 20, 8, 0.15
    p = Trial(design=Clusters(clusters=k // 2, cluster_size=m, icc=icc), outcome=outcome)
    b = p.draw_batch(np.random.default_rng(2), 3000)
    y = np.log(b["y"]) if log else b["y"]
    s2 = 0.8**2 if log else 4.0
    msw, msb = _mean_squares(y, b["cluster"], k, m)
    for got, want in ((msw, s2 * (1 - icc)), (msb, s2 * (1 + (m - 1) * icc))):
        assert abs(got.mean() - want) <= Z * got.std() / math.sqrt(got.size)
    control = b["y"][:, b["arm"] == 0]
    assert abs(control.mean() - outcome.mean) <= Z * control.std() * math.sqrt((1 + (m - 1) * icc) / control.size)


def test_cluster_means_t_power_matches_the_noncentral_t():
    k, m, icc, effect = 8, 10, 0.05, 0.4
    sc = sp.Scenario(Trial(design=Clusters(clusters=k, cluster_size=m, icc=icc), effect=effect), sp.ClusterMeansT())
    res = sp.run(sc, reps=3000, seed=3, n_jobs=1)
    df = 2 * (k - 1)
    nc = effect / math.sqrt(2 * (icc + (1 - icc) / m) / k)
    crit = stats.t.ppf(0.975, df)
    exact = stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)
    assert abs(res.power - exact) <= Z * math.sqrt(exact * (1 - exact) / 3000)


def test_variable_clusters_individual_randomisation_and_missingness_keep_the_layout():
    p = Trial(design=Clusters(clusters=4, cluster_size=6, cluster_size_cv=0.5, icc=0.1, randomise="individual"),
              outcome=sp.Gamma(mean=2.0, cv=1.0), effect=0.3, missing=sp.MNAR(rate=0.25))
    b = p.draw_batch(np.random.default_rng(4), 400)
    present = b["present"]
    hidden = np.isnan(b["y"]) & present
    np.testing.assert_array_equal(hidden, (b["observed"] == 0) & present)
    assert abs(hidden.sum() / present.sum() - 0.25) <= Z * math.sqrt(0.25 * 0.75 / present.sum())
    row = b.replicate(0)
    assert set(row) == {"y", "arm", "cluster", "subject", "observed"} and len(set(map(len, row.values()))) == 1
    # every cluster holds both arms (individual randomisation), the odd member by a coin
    for c in np.unique(row["cluster"]):
        arms = row["arm"][row["cluster"] == c]
        assert abs(int(arms.sum()) * 2 - arms.size) <= 1


def test_trial_from_toml_searches_the_design_size_and_refuses_unknown_columns():
    sf = loads('''
[process]
type = "trial"
effect = 0.25
design = {type = "clusters", clusters = 6, cluster_size = 10, icc = 0.05}
outcome = {type = "lognormal", median = 3, cv = 0.8}

[analysis]
type = "cluster_means_t"
''')
    proc = sf.scenario.process
    assert proc.size_param == "design.clusters"
    assert sf.scenario.with_params(**{"design.clusters": 9}).process.design.clusters == 9
    assert Trial(design=Arms(sizes=[10, 20])).size_param == "design.n"
    with pytest.raises(sp.ParameterError, match="`missing.on` = 'baseline' is not a column of trial"):
        Trial(design=Arms(n=10), missing=sp.MAR(rate=0.1))
    with pytest.raises(sp.ScenarioFileError, match=r"`process\.design\.icc` must be in \[0, 1\); got 1\.5"):
        loads('[process]\ntype = "trial"\ndesign = {type = "clusters", clusters = 4, cluster_size = 5, icc = 1.5}\n'
              '[analysis]\ntype = "cluster_means_t"\n')
