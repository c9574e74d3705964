"""Binary and count outcome layers of the composed ``trial`` (simpower/processes/glm_outcomes.py).

Checked against sources outside the project:

* the latent-scale ICC of a logistic random-intercept model, sigma_b^2 / (sigma_b^2 + pi^2 / 3)
  (Snijders & Bosker 2012, ch. 17), and the ICC of the 0/1 outcomes, Var(p_c) / (p0 (1 - p0))
  (Donner & Klar 2000, ch. 2), here integrated independently with ``scipy.integrate.quad``; the
  simulated draws are checked through the unbiased within-cluster pair moment
  E[y_i y_j] = E[p_c^2] (i != j in one cluster; a U-statistic, common practice);
* Zeger, Liang & Albert (1988): beta_M ~ beta_C / sqrt(1 + c^2 sigma^2), c = 16 sqrt(3) / (15 pi);
* the log link: E[exp(b0 + b1 + s Z)] / E[exp(b0 + s Z)] = exp(b1) exactly (the lognormal mean,
  common practice), and the count ICC mu (A - 1) / (1 + mu ((1 + 1/k) A - 1)), A = exp(s^2), from
  the moments of a Poisson-lognormal-gamma mixture (derived in the module; checked here by simulation);
* with the ``arms`` design the layers draw exactly what ``binary_two_arm`` and ``count_two_arm``
  draw (replicate for replicate);
* the type I error of the cluster-means t-test (equal and size weights) at 10 clusters per arm lies
  in Bradley's (1978) liberal interval [0.5 alpha, 1.5 alpha].

Monte Carlo tolerances are 4 MCSE (Morris, White & Crowther 2019).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, optimize, stats
from scipy.special import expit, logit

import simpower as sp
from simpower.errors import UnknownNameError
from simpower.processes.glm_outcomes import ZLA_C, proportion_icc, zla_marginal
from simpower.registry import build


# -- independent integrals (scipy quad over the standard normal density) ------------------------
def normal_mean(f) -> float:
    return integrate.quad(lambda z: f(z) * stats.norm.pdf(z), -14, 14, epsabs=1e-14, epsrel=1e-12, limit=200)[0]


def quad_intercept(p: float, sigma: float) -> float:
    return optimize.brentq(lambda b: normal_mean(lambda z: expit(b + sigma * z)) - p, -30, 30, xtol=1e-13)


def quad_moments(b: float, sigma: float) -> tuple[float, float]:
    return normal_mean(lambda z: expit(b + sigma * z)), normal_mean(lambda z: expit(b + sigma * z) ** 2)


def trial(design: dict, outcome: dict, **kw):
    return build("process", {"type": "trial", "design": design, "outcome": outcome, **kw})


def clusters(k=40, m=12, icc=0.1, **kw) -> dict:
    return {"type": "clusters", "clusters": k, "cluster_size": m, "icc": icc, **kw}


def pair_moment(y: np.ndarray, cluster: np.ndarray, keep: np.ndarray):
    """Per replicate: the mean over clusters in ``keep`` of (S^2 - S_2) / (m (m - 1)), an unbiased
    estimate of E[y_i y_j] for two members of one cluster (S the cluster sum, S_2 the sum of squares)."""
    ids = np.unique(cluster[keep])
    out = []
    for c in ids:
        rows = cluster == c
        s, s2, m = y[:, rows].sum(axis=1), (y[:, rows] ** 2).sum(axis=1), rows.sum()
        out.append((s * s - s2) / (m * (m - 1)))
    return np.mean(out, axis=0)


def within_4_mcse(values: np.ndarray, target: float) -> None:
    mcse = values.std(ddof=1) / math.sqrt(values.size)
    assert abs(values.mean() - target) < 4 * mcse, (values.mean(), target, mcse)


# -- the ICC on its two scales -------------------------------------------------------------------
def test_latent_icc_is_its_definition_and_the_draws_have_that_cluster_variance():
    icc, p0 = 0.12, 0.3
    proc = trial(clusters(icc=icc), {"type": "binary", "p0": p0, "odds_ratio": 1.8})
    s = proc.linear.sigma
    assert s**2 / (s**2 + math.pi**2 / 3) == pytest.approx(icc, rel=1e-12)  # Snijders & Bosker 2012, ch. 17
    # the intercept makes the control arm's population-averaged risk p0 (scipy quad, not the module's nodes)
    b0 = quad_intercept(p0, s)
    assert proc.linear.beta0 == pytest.approx(b0, abs=1e-9)
    m1, m2 = quad_moments(b0, s)
    # simulated: control-arm risk and the within-cluster pair moment E[p_c^2]
    batch = proc.draw_batch(np.random.default_rng(101), 400)
    y, cluster = batch.per_rep["y"], batch.shared["cluster"]
    control = batch.shared["arm"] == 0
    within_4_mcse(y[:, control].mean(axis=1), p0)
    within_4_mcse(pair_moment(y, cluster, control), m2)
    # the realised 0/1 ICC is the closed form (m2 - p0^2) / (p0 (1 - p0)), integrated two ways
    assert proportion_icc(s, p0) == pytest.approx((m2 - m1 * m1) / (m1 * (1 - m1)), rel=1e-8)


@pytest.mark.parametrize("p0,icc", [(0.05, 0.01), (0.3, 0.05), (0.6, 0.2), (0.9, 0.02)])
def test_proportion_scale_icc_round_trip(p0, icc):
    proc = trial(clusters(icc=icc), {"type": "binary", "p0": p0, "odds_ratio": 1.5, "icc_scale": "proportion"})
    s = proc.linear.sigma
    b0 = quad_intercept(p0, s)
    m1, m2 = quad_moments(b0, s)
    assert m1 == pytest.approx(p0, rel=1e-9)
    assert (m2 - p0**2) / (p0 * (1 - p0)) == pytest.approx(icc, rel=1e-7)  # Donner & Klar 2000, ch. 2
    assert proc.facts()[0].icc == pytest.approx(icc, rel=1e-9)  # the cross-check's ICC is on this scale


def test_proportion_scale_icc_of_the_draws():
    p0, icc = 0.25, 0.08
    proc = trial(clusters(k=30, m=10, icc=icc), {"type": "binary", "p0": p0, "odds_ratio": 2.0,
                                                 "icc_scale": "proportion"})
    batch = proc.draw_batch(np.random.default_rng(102), 500)
    control = batch.shared["arm"] == 0
    within_4_mcse(pair_moment(batch.per_rep["y"], batch.shared["cluster"], control), p0**2 + icc * p0 * (1 - p0))


def test_unreachable_proportion_icc_is_refused_in_one_line():
    with pytest.raises(sp.ParameterError, match=r"^`design.icc` = 0.95 on the proportion scale .* lower icc\.$"):
        trial(clusters(icc=0.95), {"type": "binary", "p0": 0.02, "odds_ratio": 1.5, "icc_scale": "proportion"})


# -- marginal and conditional effects ------------------------------------------------------------
@pytest.mark.parametrize("sigma", [0.1, 0.25, 0.5])
def test_marginal_log_odds_ratio_is_close_to_zeger_liang_albert_for_small_sigma(sigma):
    icc = sigma**2 / (sigma**2 + math.pi**2 / 3)
    proc = trial(clusters(icc=icc), {"type": "binary", "p0": 0.3, "odds_ratio": 2.0,
                                     "estimand": "log_odds_ratio"})
    assert proc.linear.sigma == pytest.approx(sigma, rel=1e-12)
    beta_c = math.log(2.0)
    b0 = quad_intercept(0.3, sigma)
    p1 = normal_mean(lambda z: expit(b0 + beta_c + sigma * z))
    exact = float(logit(p1) - logit(0.3))
    assert proc.true_effect() == pytest.approx(exact, rel=1e-8)
    assert proc.true_values()["conditional_log_odds_ratio"] == beta_c
    assert 0 < exact < beta_c  # the marginal effect is attenuated
    # ZLA (1988): beta_M ~ beta_C / sqrt(1 + c^2 sigma^2); within 2% of beta_C for sigma <= 0.5 (our bound)
    assert ZLA_C == pytest.approx(0.5881, abs=1e-4)
    assert abs(exact - zla_marginal(beta_c, sigma)) < 0.02 * beta_c


def test_marginal_effect_scale_solves_for_the_stated_population_averaged_effect():
    for effect in ({"odds_ratio": 2.0}, {"risk_ratio": 1.5}, {"risk_difference": -0.1}):
        proc = trial(clusters(icc=0.15), {"type": "binary", "p0": 0.3, "effect_scale": "marginal", **effect})
        lin = proc.linear
        p1 = normal_mean(lambda z: expit(lin.beta0 + lin.beta1 + lin.sigma * z))
        target = sp.BinaryTwoArm(n=10, p0=0.3, **effect).p1
        assert p1 == pytest.approx(target, rel=1e-8) and lin.mean1 == pytest.approx(target, rel=1e-12)
        assert abs(lin.beta1) > abs(float(logit(target) - logit(0.3)))  # the conditional effect is the larger


def test_log_link_marginal_and_conditional_rate_ratios_are_equal():
    proc = trial(clusters(icc=0.2), {"type": "count", "rate0": 1.5, "rate_ratio": 0.7, "dispersion": 2.0})
    lin = proc.linear
    assert lin.sigma > 0
    ratio = (normal_mean(lambda z: math.exp(lin.beta0 + lin.beta1 + lin.sigma * z))
             / normal_mean(lambda z: math.exp(lin.beta0 + lin.sigma * z)))
    assert ratio == pytest.approx(0.7, rel=1e-10)  # E[exp(b0 + b1 + sZ)] / E[exp(b0 + sZ)] = exp(b1)
    assert normal_mean(lambda z: math.exp(lin.beta0 + lin.sigma * z)) == pytest.approx(1.5, rel=1e-10)
    marginal = trial(clusters(icc=0.2), {"type": "count", "rate0": 1.5, "rate_ratio": 0.7, "dispersion": 2.0,
                                         "effect_scale": "marginal"})
    assert marginal.linear == lin and proc.true_effect() == math.log(0.7)


def test_conditional_risk_ratio_in_clusters_is_refused_and_effect_belongs_to_the_layer():
    with pytest.raises(sp.ParameterError, match=r"^`outcome.effect_scale` = 'conditional' needs "
                                                r"`outcome.odds_ratio`.*effect_scale = 'marginal'\.$"):
        trial(clusters(), {"type": "binary", "p0": 0.3, "risk_ratio": 1.5})
    # no cluster variation: any measure (the arms design, as binary_two_arm)
    arms = trial({"type": "arms", "n": 10}, {"type": "binary", "p0": 0.3, "risk_ratio": 1.5})
    assert arms.linear.mean1 == sp.BinaryTwoArm(n=10, p0=0.3, risk_ratio=1.5).p1
    with pytest.raises(sp.ParameterError, match=r"^`effect` does not apply to a binary outcome.*remove `effect`"):
        trial({"type": "arms", "n": 10}, {"type": "binary", "p0": 0.3, "odds_ratio": 2.0}, effect=0.5)
    with pytest.raises(UnknownNameError, match=r"^`outcome.type`: unknown outcome 'binari'. Did you mean 'binary'\?$"):
        trial({"type": "arms", "n": 10}, {"type": "binari", "p0": 0.3})
    with pytest.raises(sp.ParameterError, match=r"^`design.icc` = 0.9 cannot be reached by counts with dispersion"):
        trial(clusters(icc=0.9), {"type": "count", "rate0": 1.0, "dispersion": 0.5})


# -- event rates per arm -------------------------------------------------------------------------
def test_event_rates_per_arm_are_p0_and_the_marginal_treated_risk():
    proc = trial(clusters(k=20, m=8, icc=0.1, cluster_size_cv=0.5), {"type": "binary", "p0": 0.2,
                                                                     "odds_ratio": 2.5})
    batch = proc.draw_batch(np.random.default_rng(103), 600)
    y, arm, present = batch.per_rep["y"], batch.per_rep["arm"], batch.per_rep["present"]
    b0 = quad_intercept(0.2, proc.linear.sigma)
    p1 = normal_mean(lambda z: expit(b0 + math.log(2.5) + proc.linear.sigma * z))
    for a, target in ((0, 0.2), (1, p1)):
        sel = present & (arm == a)
        # replicate-level risks weighted by their members: the ratio of sums over replicates,
        # with the per-replicate totals' MCSE by the delta method (common practice)
        events, members = np.where(sel, y, 0).sum(axis=1), sel.sum(axis=1)
        est = events.sum() / members.sum()
        resid = events - est * members
        mcse = resid.std(ddof=1) * math.sqrt(resid.size) / members.sum()
        assert abs(est - target) < 4 * mcse, (a, est, target, mcse)


def test_count_means_and_count_icc_of_the_draws():
    rate0, rr, k, icc = 2.0, 1.4, 3.0, 0.1
    proc = trial(clusters(k=30, m=8, icc=icc), {"type": "count", "rate0": rate0, "rate_ratio": rr,
                                                "dispersion": k, "exposure": 1.5})
    assert proc.outcome.count_icc(proc.linear.sigma) == pytest.approx(icc, rel=1e-12)
    batch = proc.draw_batch(np.random.default_rng(104), 400)
    y, arm, cluster = batch.per_rep["y"], batch.shared["arm"], batch.shared["cluster"]
    mu = rate0 * 1.5
    within_4_mcse(y[:, arm == 0].mean(axis=1), mu)
    within_4_mcse(y[:, arm == 1].mean(axis=1), mu * rr)
    # E[y_i y_j] in one cluster = mu^2 exp(sigma^2); Var(y) = mu + mu^2 ((1 + 1/k) exp(sigma^2) - 1)
    a = math.exp(proc.linear.sigma**2)
    within_4_mcse(pair_moment(y, cluster, arm == 0), mu * mu * a)
    within_4_mcse(y[:, arm == 0].var(axis=1, ddof=1), mu + mu * mu * ((1 + 1 / k) * a - 1))


# -- the arms design draws what the two-arm processes draw ----------------------------------------
@pytest.mark.parametrize("effect", [{"odds_ratio": 2.0}, {"risk_ratio": 1.5}, {"risk_difference": -0.1}])
def test_arms_binary_is_binary_two_arm_replicate_for_replicate(effect):
    missing = {"type": "mcar", "rate": 0.2}
    proc = trial({"type": "arms", "n": 25, "n1": 31}, {"type": "binary", "p0": 0.3, **effect}, missing=missing)
    ref = build("process", {"type": "binary_two_arm", "n": 25, "n1": 31, "p0": 0.3, "missing": missing, **effect})
    a, b = proc.draw_batch(np.random.default_rng(7), 60), ref.draw_batch(np.random.default_rng(7), 60)
    assert a.per_rep.keys() == b.per_rep.keys() and a.shared.keys() == b.shared.keys() and a.info == b.info
    for key in b.per_rep:
        assert np.array_equal(a.per_rep[key], b.per_rep[key], equal_nan=True), key
    assert np.array_equal(a.shared["arm"], b.shared["arm"])
    clean = proc.replace(missing=None)
    assert clean.facts() == ref.replace(missing=None).facts()
    assert proc.true_effect() == ref.true_effect() and proc.estimand_label == ref.estimand_label
    assert proc.null().true_effect() == 0.0


@pytest.mark.parametrize("extra", [{}, {"dispersion": 1.5, "exposure_cv": 0.4}])
def test_arms_count_is_count_two_arm_replicate_for_replicate(extra):
    proc = trial({"type": "arms", "n": 12, "ratio": 1.5}, {"type": "count", "rate0": 2.0, "rate_ratio": 0.6,
                                                         "exposure": 2.0, **extra})
    ref = build("process", {"type": "count_two_arm", "n": 12, "ratio": 1.5, "rate0": 2.0, "rate_ratio": 0.6,
                            "exposure": 2.0, **extra})
    a, b = proc.draw_batch(np.random.default_rng(8), 40), ref.draw_batch(np.random.default_rng(8), 40)
    for part in ("per_rep", "shared"):
        x, z = getattr(a, part), getattr(b, part)
        assert x.keys() == z.keys() and all(np.array_equal(x[k], z[k]) for k in z), part
    assert proc.true_effect() == ref.true_effect() and proc.estimand_label == ref.estimand_label


# -- estimands, the null, the search's size ------------------------------------------------------
def test_estimand_labels_give_bias_and_coverage_only_on_the_right_scale():
    design = clusters(k=6, m=5, icc=0.1)
    marginal = trial(design, {"type": "binary", "p0": 0.3, "odds_ratio": 2.0, "estimand": "log_odds_ratio"})
    sc = sp.Scenario(marginal, analyses=[sp.Logistic(), sp.ClusterMeansT()])
    assert sc.true_effect_for("logistic") == pytest.approx(marginal.true_values()["log_odds_ratio"])
    assert sc.true_effect_for("cluster_means_t") == sc.true_effect_for("logistic")  # unlabelled: the process's
    conditional = marginal.replace(**{"outcome.estimand": "conditional_log_odds_ratio"})
    assert sp.Scenario(conditional, analyses=[sp.Logistic()]).true_effect_for("logistic") is None
    arms = trial({"type": "arms", "n": 10}, {"type": "binary", "p0": 0.3, "odds_ratio": 2.0,
                                            "estimand": "conditional_log_odds_ratio"})
    assert sp.Scenario(arms, analyses=[sp.Logistic()]).true_effect_for("logistic") == pytest.approx(math.log(2.0))
    rd = trial(design, {"type": "binary", "p0": 0.3, "odds_ratio": 2.0})
    assert sp.Scenario(rd, analyses=[sp.TwoProportions()]).true_effect_for("two_proportions") == pytest.approx(
        rd.linear.mean1 - 0.3)


def test_null_and_nested_size_parameter():
    proc = trial(clusters(k=6, m=5, icc=0.1), {"type": "binary", "p0": 0.3, "risk_difference": 0.1,
                                               "effect_scale": "marginal"})
    assert proc.effect_param == "outcome.risk_difference" and proc.null().outcome.risk_difference == 0.0
    assert proc.null().true_effect() == 0.0 and proc.null().linear.beta1 == 0.0
    sc = sp.Scenario(proc, sp.ClusterMeansT())
    assert proc.size_param == "design.clusters" and sc.get_params()["design.clusters"] == 6
    assert sc.with_params(**{"design.clusters": 9}).process.design.clusters == 9


# -- the cross-check's reach ---------------------------------------------------------------------
def test_cluster_binary_closed_form_reach():
    outcome = {"type": "binary", "p0": 0.3, "odds_ratio": 2.0}
    variable = trial(clusters(k=8, m=10, icc=0.05, cluster_size_cv=0.5), outcome)
    size = build("analysis", {"type": "cluster_means_t", "weights": "size"})
    assert size.analytic_power(variable, 0.05) is not None
    assert sp.ClusterMeansT().analytic_power(variable, 0.05) is None  # equal weights, unequal sizes: none
    assert size.analytic_power(trial(clusters(randomise="individual"), outcome), 0.05) is None
    assert trial(clusters(), outcome, missing={"type": "mcar", "rate": 0.1}).facts() == ()
    # the naive two-proportion test gets no closed form from cluster facts (it ignores the clustering)
    assert sp.TwoProportions().analytic_power(variable, 0.05) is None


def test_size_weighted_power_near_the_design_effect_closed_form():
    # 40 clinics per arm: Eldridge's approximation of sum m_c^2 / M^2 by (1 + cv^2) / k is close there
    proc = trial(clusters(k=40, m=20, icc=0.03, cluster_size_cv=0.6),
                 {"type": "binary", "p0": 0.4, "risk_difference": 0.08, "effect_scale": "marginal",
                  "icc_scale": "proportion"})
    analysis = build("analysis", {"type": "cluster_means_t", "weights": "size"})
    approx = analysis.analytic_power(proc, 0.05)
    res = sp.run(sp.Scenario(proc, analysis), reps=4000, seed=105, n_jobs=1)
    assert abs(res.power - approx) < 4 * math.sqrt(approx * (1 - approx) / res.reps), (res.power, approx)


# -- type I error of the cluster-level analysis ----------------------------------------------------
@pytest.mark.parametrize("weights", ["equal", "size"])
def test_cluster_means_type_one_error_in_bradley_interval(weights):
    proc = trial(clusters(k=10, m=30, icc=0.04, cluster_size_cv=0.6),
                 {"type": "binary", "p0": 0.4, "risk_difference": 0.0, "effect_scale": "marginal",
                  "icc_scale": "proportion"})
    res = sp.run(sp.Scenario(proc, build("analysis", {"type": "cluster_means_t", "weights": weights})),
                 reps=10000, seed=106, n_jobs=1)
    assert res.paths["cluster_means_t"] == "batch"
    assert 0.025 <= res.power <= 0.075, res.power  # Bradley (1978): [0.5 alpha, 1.5 alpha]
