"""The older process names as thin factories over ``trial``.

Each old name (normal_two_arm, two_arm, binary_two_arm, count_two_arm, cluster_trial) builds one
``trial`` from its parameters and hands it the drawing. Checked here:

* the draws equal those of ``trial`` built by hand from the mapped layers, replicate for replicate;
* the draws equal, bit for bit, the drawing code each name had before it became a factory
  (reproduced below as ``_old_*``, the reference for "same seed, same numbers" of existing files);
* specs, words and facts are those the names gave before (stated values; the facts are those the
  analytic cross-check reads: the two-sample t-test's noncentral t, Cohen 1988 ch. 2; the design
  effect of cluster trials, Donner & Klar 2000 ch. 5);
* the ``gaussian`` layer draws the model it states: the ANOVA mean squares of clusters of m
  members with ICC rho, E[MSW] = s^2 (1 - rho), E[MSB] = s^2 (1 + (m - 1) rho) (Donner & Klar 2000,
  ch. 2; from memory), within 4 Monte Carlo SEs.
"""

from __future__ import annotations

import math
import pickle

import numpy as np
import pytest

import simpower as sp
from simpower.errors import ParameterError
from simpower.facts import BinaryFacts, ClusterFacts, NormalFacts
from simpower.processes.cluster_sizes import _within_cluster_arms, draw_clusters
from simpower.processes.composed import Arms, Clusters, Trial
from simpower.processes.event_outcomes import TimeToEventOutcome
from simpower.processes.gaussian_outcome import GaussianOutcome
from simpower.processes.glm_outcomes import BinaryOutcome, CountOutcome
from simpower.registry import build
from simpower.scenario_files import loads

Z = 4.0


# -- the drawing code of the old names before they became factories (the reference for bit identity) --
def _old_normal_two_arm(p, rng, size):
    n0, n1 = p.n, p.n1
    y = rng.standard_normal((size, n0 + n1))
    if p.sd != 1:
        y[:, :n0] *= p.sd
    if p.sd1 != 1:
        y[:, n0:] *= p.sd1
    if p.mean0:
        y[:, :n0] += p.mean0
    y[:, n0:] += p.mean0 + p.effect
    return y


def _old_two_arm(p, rng, size):
    n0, shape = p.n, (size, p.n + p.n1)
    base = None
    if p.baseline_corr is None:
        x = np.asarray(p.outcome.sample(rng, shape), dtype=float)
    else:
        lat = p.latent_corr
        z_base = rng.standard_normal(shape)
        z = lat * z_base + math.sqrt(1.0 - lat**2) * rng.standard_normal(shape)
        x = np.asarray(p.outcome.from_normal(z), dtype=float)
        base = np.asarray(p.outcome.from_normal(z_base), dtype=float)
    o = p.outcome
    centre = o.center if hasattr(o, "center") else o.mean
    t = x[:, n0:]
    if p.effect_type == "ratio":
        t, m = t * p.effect, centre * p.effect
    else:
        shift = p.effect * o.sd if p.effect_type == "d" else p.effect
        t, m = t + shift, centre + shift
    if p.sd_ratio != 1:
        t = m + p.sd_ratio * (t - m)
    x[:, n0:] = t
    return x, base


def _old_binary_two_arm(p, rng, size):
    n0 = p.n
    u = rng.random((size, n0 + p.n1))
    y = np.empty_like(u)
    np.less(u[:, :n0], p.p0, out=y[:, :n0])
    np.less(u[:, n0:], p.p1, out=y[:, n0:])
    return y


def _old_count_two_arm(p, rng, size):
    m = p.n + p.n1
    arm = p.arm_labels()
    rate = np.where(arm == 1, p.rate0 * p.rate_ratio, p.rate0)
    expo = rng.gamma(1.0 / p.exposure_cv**2, p.exposure * p.exposure_cv**2, (size, m)) if p.exposure_cv > 0 \
        else np.full(m, p.exposure)
    mu = rate * expo
    if p.dispersion is not None:
        mu = mu * rng.gamma(p.dispersion, 1.0 / p.dispersion, (size, m))
    return rng.poisson(np.broadcast_to(mu, (size, m))).astype(float), expo


def _old_survival_two_arm(p, rng, size):
    """survival_two_arm's own drawing code before it drew through trial (kept here as the reference)."""
    n0, n1 = p.n, p.n1
    m = n0 + n1
    e_event = rng.standard_exponential((size, m))
    u_entry = rng.random((size, m))
    e_loss = rng.standard_exponential((size, m))
    e_event[:, n0:] /= p.hazard_ratio
    t = e_event if p.shape == 1 else e_event ** (1.0 / p.shape)
    t /= p.rate0
    cens = np.full((size, m), math.inf)
    if p.follow_up is not None:
        cens = p.accrual + p.follow_up - p.accrual * u_entry
    if p.loss_rate > 0:
        np.minimum(cens, e_loss / p.loss_rate, out=cens)
    event = (t <= cens).astype(np.int8)
    time = np.minimum(t, cens)
    if p.time_resolution is not None:
        time = np.ceil(time / p.time_resolution) * p.time_resolution
    return time, event, p.accrual * u_entry


def _old_cluster_trial(p, rng, size):
    shape = (size, 2 * p.clusters)
    sizes, u, cluster, present, start = draw_clusters(rng, 2 * p.clusters, p.cluster_size, p.cluster_size_cv, size)
    width = cluster.shape[-1]
    y = p.sd * math.sqrt(1.0 - p.icc) * rng.standard_normal((size, width))
    u *= p.sd * math.sqrt(p.icc)
    y += u[:, cluster] if cluster.ndim == 1 else np.take_along_axis(u, cluster, axis=1)
    if p.randomise == "cluster":
        arm = (cluster >= p.clusters).astype(np.int8)
        y += p.effect * arm
    else:
        b = rng.standard_normal(shape) * p.slope_sd + p.effect
        full = np.broadcast_to(cluster, (size, width))
        arm = _within_cluster_arms(rng, sizes, full, np.ones((size, width), bool) if present is None else present,
                                   np.asarray(start))
        y += arm * np.take_along_axis(b, full, axis=1)
    return y, arm, cluster


# -- each name, its hand-built trial, and the old drawing code ------------------------------------
CASES = {
    "normal_two_arm": (
        sp.NormalTwoArm(n=7, ratio=1.6, effect=0.4, sd=2.5, sd_ratio=1.3, mean0=3.1),
        lambda: Trial(design=Arms(n=7, ratio=1.6),
                      outcome=GaussianOutcome(mean0=3.1, sd=2.5, effect=0.4, sd_ratio=1.3)),
        lambda p, rng, s: {"y": _old_normal_two_arm(p, rng, s)}),
    "normal_two_arm/n1": (
        sp.NormalTwoArm(n=9, n1=4, effect=-0.7, sd=1.0),
        lambda: Trial(design=Arms(n=9, n1=4), outcome=GaussianOutcome(effect=-0.7)),
        lambda p, rng, s: {"y": _old_normal_two_arm(p, rng, s)}),
    "two_arm": (
        sp.TwoArm(n=8, effect=0.5, sd_ratio=1.4, outcome=sp.Normal(mean=2.0, sd=3.0)),
        lambda: Trial(design=Arms(n=8), outcome=sp.Normal(mean=2.0, sd=3.0), effect=0.5, sd_ratio=1.4),
        lambda p, rng, s: {"y": _old_two_arm(p, rng, s)[0]}),
    "two_arm/baseline": (
        sp.TwoArm(n=8, ratio=1.5, effect=1.3, effect_type="ratio", outcome=sp.Lognormal(median=2.0, cv=0.8),
                  baseline_corr=0.5),
        lambda: Trial(design=Arms(n=8, ratio=1.5, baseline_corr=0.5), outcome=sp.Lognormal(median=2.0, cv=0.8),
                      effect=1.3, effect_type="ratio"),
        lambda p, rng, s: dict(zip(("y", "baseline"), _old_two_arm(p, rng, s)))),
    "binary_two_arm": (
        sp.BinaryTwoArm(n=9, p0=0.3, risk_ratio=1.5, ratio=1.5, estimand="log_risk_ratio"),
        lambda: Trial(design=Arms(n=9, ratio=1.5), outcome=BinaryOutcome(p0=0.3, risk_ratio=1.5,
                                                                         estimand="log_risk_ratio")),
        lambda p, rng, s: {"y": _old_binary_two_arm(p, rng, s)}),
    "count_two_arm": (
        sp.CountTwoArm(n=7, rate0=1.5, rate_ratio=0.6, dispersion=1.2, exposure=2.0, exposure_cv=0.4, ratio=2.0),
        lambda: Trial(design=Arms(n=7, ratio=2.0), outcome=CountOutcome(rate0=1.5, rate_ratio=0.6, dispersion=1.2,
                                                                        exposure=2.0, exposure_cv=0.4)),
        lambda p, rng, s: dict(zip(("y", "exposure"), _old_count_two_arm(p, rng, s)))),
    "survival_two_arm": (
        sp.SurvivalTwoArm(n=9, ratio=1.5, median=12.0, hazard_ratio=0.7, shape=1.4, accrual=10.0, follow_up=8.0,
                          dropout_fraction=0.1, dropout_time=12.0, time_resolution=0.5),
        lambda: Trial(design=Arms(n=9, ratio=1.5), outcome=TimeToEventOutcome(
            median=12.0, hazard_ratio=0.7, shape=1.4, accrual=10.0, follow_up=8.0, dropout_fraction=0.1,
            dropout_time=12.0, time_resolution=0.5)),
        lambda p, rng, s: dict(zip(("time", "event", "entry"), _old_survival_two_arm(p, rng, s)))),
    "survival_two_arm/exponential": (
        sp.SurvivalTwoArm(n=6, n1=8, hazard0=0.2, hazard_ratio=1.6, dropout_rate=0.05),
        lambda: Trial(design=Arms(n=6, n1=8), outcome=TimeToEventOutcome(hazard0=0.2, hazard_ratio=1.6,
                                                                        dropout_rate=0.05)),
        lambda p, rng, s: dict(zip(("time", "event", "entry"), _old_survival_two_arm(p, rng, s)))),
    "cluster_trial": (
        sp.ClusterTrial(clusters=3, cluster_size=5.5, cluster_size_cv=0.6, icc=0.2, effect=0.5, sd=1.7),
        lambda: Trial(design=Clusters(clusters=3, cluster_size=5.5, cluster_size_cv=0.6, icc=0.2),
                      outcome=GaussianOutcome(sd=1.7, effect=0.5)),
        lambda p, rng, s: dict(zip(("y", "arm", "cluster"), _old_cluster_trial(p, rng, s)))),
    "cluster_trial/individual": (
        sp.ClusterTrial(clusters=3, cluster_size=6, cluster_size_cv=0.3, icc=0.05, effect=0.3,
                        randomise="individual", slope_sd=0.4, sd=3.0),
        lambda: Trial(design=Clusters(clusters=3, cluster_size=6, cluster_size_cv=0.3, icc=0.05,
                                      randomise="individual"),
                      outcome=GaussianOutcome(sd=3.0, effect=0.3, slope_sd=0.4)),
        lambda p, rng, s: dict(zip(("y", "arm", "cluster"), _old_cluster_trial(p, rng, s)))),
    "cluster_trial/individual-no-slope": (
        sp.ClusterTrial(clusters=4, cluster_size=3, icc=0.0, effect=-0.2, randomise="individual"),
        lambda: Trial(design=Clusters(clusters=4, cluster_size=3, icc=0.0, randomise="individual"),
                      outcome=GaussianOutcome(effect=-0.2)),
        lambda p, rng, s: dict(zip(("y", "arm", "cluster"), _old_cluster_trial(p, rng, s)))),
}


def _arrays(batch):
    return {**batch.shared, **batch.per_rep}


@pytest.mark.parametrize("key", list(CASES))
def test_an_old_name_draws_what_its_mapped_trial_draws_replicate_for_replicate(key):
    proc, by_hand, _ = CASES[key]
    trial = by_hand()
    assert proc.trial.spec() == trial.spec()
    a, b = proc.draw_batch(np.random.default_rng(5), 40), trial.draw_batch(np.random.default_rng(5), 40)
    assert _arrays(a).keys() == _arrays(b).keys() and a.info == b.info
    for name, arr in _arrays(b).items():
        np.testing.assert_array_equal(_arrays(a)[name], arr, err_msg=name)
    for i in (0, 17, 39):
        one, other = a.replicate(i), b.replicate(i)
        assert one.keys() == other.keys()
        for name in one:
            np.testing.assert_array_equal(one[name], other[name])
    assert proc.true_effect() == trial.true_effect() and proc.facts() == trial.facts()


@pytest.mark.parametrize("key", list(CASES))
def test_an_old_name_draws_the_numbers_its_own_code_drew(key):
    proc, _, old = CASES[key]
    batch = proc.draw_batch(np.random.default_rng(11), 25)
    for name, want in old(proc, np.random.default_rng(11), 25).items():
        np.testing.assert_array_equal(batch[name] if name in batch.shared else batch.per_rep[name],
                                      np.broadcast_to(want, np.shape(want)), err_msg=name)


@pytest.mark.parametrize("key", list(CASES))
def test_an_old_name_keeps_its_spec_and_rebuilds_from_it(key):
    proc = CASES[key][0]
    spec = proc.spec()
    assert spec["type"] == proc.name and not {"design", "layers", "trial"} & spec.keys()
    again = build("process", spec)
    assert type(again) is type(proc) and again.fingerprint() == proc.fingerprint() and again.spec() == spec
    thawed = pickle.loads(pickle.dumps(proc))  # the trial is rebuilt from the parameters
    a, b = thawed.draw_batch(np.random.default_rng(1), 3), proc.draw_batch(np.random.default_rng(1), 3)
    column = "y" if "y" in b.per_rep else "time"
    np.testing.assert_array_equal(a[column], b[column])


def test_normal_two_arm_keeps_its_words_facts_and_null():
    p = sp.NormalTwoArm(n=50, effect=0.5, sd=2.0, sd_ratio=1.5)
    assert p.describe() == ("two arms of 50 (control) and 50 (treatment), normal outcomes with SDs 2 (control) and "
                            "3 (treatment); treatment minus control mean difference 0.5")
    assert p.facts() == (NormalFacts("two-sample", effect=0.5, n=50, sd0=2.0, sd1=3.0, ratio=1.0),)
    assert p.estimand_aliases() == set() and sp.NormalTwoArm(n=5, effect=1.0).estimand_aliases() == {"location shift"}
    assert p.null().spec() == {**p.spec(), "effect": 0.0} and p.true_effect() == 0.5
    assert p.effect_param == "effect" and p.size_param == "n" and p.estimand_label == "mean difference"
    assert sp.NormalTwoArm(n=5, effect=1.0, missing=sp.MCAR(rate=0.1)).facts() == ()
    # the closed form the cross-check reads from these facts: Student's t, noncentral t (Cohen 1988, ch. 2)
    from scipy import stats
    q = sp.NormalTwoArm(n=20, effect=0.8)
    df, nc = 38, 0.8 / math.sqrt(2 / 20)
    crit = stats.t.ppf(0.975, df)
    want = stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)
    assert sp.Scenario(q, sp.TTest()).analytic_power()["t_test"] == pytest.approx(want, rel=1e-6)


def test_two_arm_binary_and_count_keep_their_words_and_facts():
    t = sp.TwoArm(n=30, effect=0.4, effect_type="d", outcome=sp.Normal(mean=1.0, sd=2.0))
    assert t.facts() == (NormalFacts("two-sample", effect=0.8, n=30, sd0=2.0, sd1=2.0, ratio=1.0),)
    assert t.describe() == ("two independent arms of 30 (control) and 30 (treatment); outcome normal (mean 1, SD 2); "
                            "treatment adds 0.4 SD (0.8) to the outcome; estimand: treatment minus control "
                            "difference in mean outcome = 0.8")
    assert t.replace(baseline_corr=0.3).facts() == () and t.replace(baseline_corr=0.3).latent_corr == 0.3
    b = sp.BinaryTwoArm(n=100, p0=0.2, odds_ratio=3.0, estimand="log_odds_ratio")
    # an odds ratio of 3 on a control risk of 0.2 gives a treatment risk of 0.75 / 1.75 = 3/7 (worked by hand)
    assert b.p1 == pytest.approx(3 / 7, rel=1e-15) and b.true_effect() == pytest.approx(math.log(3.0), rel=1e-14)
    assert b.facts() == (BinaryFacts(p0=0.2, p1=b.p1, n=100, ratio=1.0),)
    assert b.effect_param == "odds_ratio" and b.null().odds_ratio == 1.0 and b.estimand_label == "log odds ratio"
    assert b.describe() == ("two arms of 100 (control) and 100 (treatment), binary outcome with event risks 0.2 "
                            "(control) and 0.4286 (treatment; odds_ratio = 3), participants independent")
    c = sp.CountTwoArm(n=50, rate0=2.0, exposure=2.0, dispersion=2.0, rate_ratio=0.5)
    assert c.true_effect() == math.log(0.5) and c.facts() == () and c.estimand_label == "log rate ratio"
    assert c.null().rate_ratio == 1.0 and float(c.variance(4.0)) == 12.0  # 4 + 4^2 / 2


def test_cluster_trial_keeps_its_words_and_facts():
    p = sp.ClusterTrial(clusters=6, cluster_size=10, icc=0.05, effect=0.4, sd=2.0, randomise="individual",
                        slope_sd=0.3)
    assert p.facts() == (ClusterFacts(clusters=6, cluster_size=10, cluster_size_cv=0.0, icc=0.05, effect=0.4,
                                      sd=2.0, sd1=2.0, randomise="individual", slope_sd=0.3),)
    assert p.describe() == ("12 clusters with individuals randomised 1:1 within each cluster; clusters of 10 members "
                            "each; normal outcomes with total SD 2 and ICC 0.05 (random cluster intercepts); "
                            "treatment minus control mean difference 0.4, varying between clusters with SD 0.3")
    assert p.size_param == "clusters" and p.effect_param == "effect" and p.estimand_aliases() == set()
    assert p.between_sd == 2.0 * math.sqrt(0.05) and p.n_clusters == 12


@pytest.mark.parametrize("name, kw, message", [
    ("cluster_trial", {"clusters": 3, "cluster_size": 4, "icc": 0.1, "slope_sd": 0.3},
     "`process.slope_sd` must be 0 with randomise = 'cluster'"),
    ("cluster_trial", {"clusters": 3, "cluster_size": 4, "icc": 0.1,
                       "missing": {"type": "mar", "rate": 0.2, "on": "baseline"}},
     r"`process.missing.on` = 'baseline' is not a column of cluster_trial \(it has arm, cluster\)\.$"),
    ("two_arm", {"n": 7, "baseline_corr": -0.99, "outcome": {"type": "lognormal", "median": 1.0, "cv": 2.0}},
     "`process.baseline_corr` = -0.99 cannot be reached"),
    ("two_arm", {"n": 7, "missing": {"type": "mar", "rate": 0.2, "on": "baseline"}},
     "not a column of two_arm .*; set `baseline_corr` to add a baseline column"),
    ("binary_two_arm", {"n": 7, "p0": 0.6, "risk_ratio": 2.0}, "`process.risk_ratio` = 2 with p0 = 0.6"),
    ("count_two_arm", {"n": 7, "rate0": 1.0, "missing": {"type": "mar", "rate": 0.2, "on": "cluster"}},
     r"not a column of count_two_arm \(it has arm, exposure\)"),
])
def test_errors_name_the_fields_as_the_old_names_write_them(name, kw, message):
    with pytest.raises(ParameterError, match=message):
        build("process", {"type": name, **kw}, where="process")


# -- the new pieces of trial the factories rest on ---------------------------------------------
def test_gaussian_layer_in_clusters_gives_the_icc_of_its_outcomes():
    k, m, icc, sd = 20, 8, 0.15, 2.0
    p = Trial(design=Clusters(clusters=k // 2, cluster_size=m, icc=icc), outcome=GaussianOutcome(sd=sd, mean0=1.0))
    b = p.draw_batch(np.random.default_rng(2), 3000)
    g = b["y"].reshape(3000, k, m)
    means = g.mean(axis=2)
    msw = ((g - means[:, :, None]) ** 2).sum(axis=(1, 2)) / (k * (m - 1))
    msb = m * means.var(axis=1, ddof=1)
    for got, want in ((msw, sd**2 * (1 - icc)), (msb, sd**2 * (1 + (m - 1) * icc))):
        assert abs(got.mean() - want) <= Z * got.std() / math.sqrt(got.size)


def test_gaussian_layer_in_arms_gives_each_arms_mean_and_sd():
    p = Trial(design=Arms(n=40, n1=60), outcome=GaussianOutcome(mean0=5.0, sd=2.0, effect=1.5, sd_ratio=0.5))
    y = p.draw_batch(np.random.default_rng(3), 500)["y"]
    for rows, mean, sd in ((y[:, :40], 5.0, 2.0), (y[:, 40:], 6.5, 1.0)):
        assert abs(rows.mean() - mean) <= Z * sd / math.sqrt(rows.size)
        var = rows.var(axis=1, ddof=1)  # unbiased per replicate; its SD is about sd^2 sqrt(2 / (n - 1))
        assert abs(var.mean() - sd**2) <= Z * var.std() / math.sqrt(var.size)


def test_trial_layers_from_toml_and_their_refusals():
    p = loads("""
        [process]
        type = "trial"
        design = {type = "arms", n = 12, baseline_corr = 0.5}
        outcome = {type = "gamma", mean = 2.0, cv = 0.5}
        effect = 0.4
        missing = {type = "mar", on = "baseline", rate = 0.2}
        [analysis]
        type = "t_test"
    """).scenario.process
    old = sp.TwoArm(n=12, outcome=sp.Gamma(mean=2.0, cv=0.5), effect=0.4, baseline_corr=0.5,
                    missing=sp.MAR(on="baseline", rate=0.2))
    a, b = p.draw_batch(np.random.default_rng(4), 5), old.draw_batch(np.random.default_rng(4), 5)
    assert list(a.per_rep) == list(b.per_rep) == ["baseline", "y", "observed"]
    for key in a.per_rep:
        np.testing.assert_array_equal(a.per_rep[key], b.per_rep[key])
    assert "baseline covariate" in p.describe() and p.facts() == ()
    with pytest.raises(ParameterError, match=r"`design.baseline_corr` needs an outcome distribution"):
        Trial(design=Arms(n=5, baseline_corr=0.3), outcome=GaussianOutcome())
    with pytest.raises(ParameterError, match=r"set `design.baseline_corr` to add a baseline column"):
        Trial(design=Arms(n=5), missing=sp.MAR(on="baseline", rate=0.2))
    with pytest.raises(ParameterError, match=r"`outcome.sd_ratio` must be 1 with the clusters design"):
        Trial(design=Clusters(clusters=3, cluster_size=4, icc=0.1), outcome=GaussianOutcome(sd_ratio=2.0))
    with pytest.raises(ParameterError, match=r"`outcome.slope_sd` needs the clusters design"):
        Trial(design=Arms(n=5), outcome=GaussianOutcome(slope_sd=0.2))
    with pytest.raises(ParameterError, match=r"`effect` does not apply to a gaussian outcome"):
        Trial(design=Arms(n=5), outcome=GaussianOutcome(), effect=0.3)
