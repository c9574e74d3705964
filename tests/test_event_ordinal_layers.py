"""Time-to-event and ordinal outcome layers of the composed ``trial`` (simpower/processes/event_outcomes.py,
simpower/processes/ordinal_outcomes.py).

Checked against sources outside the project:

* with the ``arms`` design the layers draw exactly what ``survival_two_arm`` and ``ordinal_two_arm`` draw
  with the same fields (replicate for replicate) and state the same facts, so Schoenfeld's (1981, 1983)
  events formula and Whitehead's (1993) proportional-odds formula apply through the cross-check;
* the population-averaged survival under a log-normal frailty, E[exp(-exp(eta + sigma Z) (lam t)^k)],
  integrated here with ``scipy.integrate.quad`` over the normal density (the marginal likelihood of a
  frailty model, McGilchrist & Aisbett 1991), against the Kaplan-Meier estimate of statsmodels'
  ``SurvfuncRight`` on the simulated data;
* the latent ICC of the frailty layer: shape * log(lam T) = log E - eta with log E a minimum extreme-value
  variate, variance pi^2 / 6 and mean -gamma (Euler's constant) (Johnson, Kotz & Balakrishnan 1995,
  ch. 22; from memory), so two members of one cluster have covariance sigma_b^2 (the cloglog latent
  convention, Nakagawa, Johnson & Schielzeth 2017, table 1);
* the ordinal layer's latent ICC sigma_b^2 / (sigma_b^2 + pi^2 / 3) (Snijders & Bosker 2012, ch. 17),
  recovered from the within-cluster pair moments of the dichotomised outcomes (the dichotomised latent
  model is a random-intercept logistic model with the same sigma_b; pair moment E[A_i A_j] = E[p_c^2],
  a U-statistic, common practice);
* the proportional-odds shift logit P(Y1 <= k) = logit P(Y0 <= k) - log(OR) (McCullagh 1980), written out here;
* the log-rank test ignoring the clustering is anti-conservative (the variance inflation of clustered
  survival data, Jung & Jeong 2003): its type I error exceeds Bradley's (1978) liberal bound 1.5 alpha.

Monte Carlo tolerances are 4 MCSE (Morris, White & Crowther 2019).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, optimize, special, stats
from scipy.special import expit

import simpower as sp
from simpower import analytic
from simpower.registry import build
from simpower.scenario_files import loads


def trial(design: dict, outcome: dict, **kw):
    return build("process", {"type": "trial", "design": design, "outcome": outcome, **kw})


def normal_mean(f) -> float:
    return integrate.quad(lambda z: f(z) * stats.norm.pdf(z), -14, 14, epsabs=1e-14, epsrel=1e-12, limit=200)[0]


def within_4_mcse(values: np.ndarray, target: float) -> None:
    mcse = values.std(ddof=1) / math.sqrt(values.size)
    assert abs(values.mean() - target) < 4 * mcse, (values.mean(), target, mcse)


def same_batches(a, b) -> None:
    assert a.per_rep.keys() == b.per_rep.keys() and a.shared.keys() == b.shared.keys() and a.info == b.info
    for part in ("per_rep", "shared"):
        x, z = getattr(a, part), getattr(b, part)
        for key in z:
            assert x[key].dtype == z[key].dtype and np.array_equal(x[key], z[key], equal_nan=True), (part, key)


# -- arms: the two-arm processes' draws and facts ---------------------------------------------------
SURVIVAL_CASES = [
    {"median": 12.0, "hazard_ratio": 0.7, "accrual": 12.0, "follow_up": 12.0},
    {"hazard0": 0.05, "hazard_ratio": 1.4, "shape": 1.7, "accrual": 6.0, "follow_up": 18.0, "dropout_rate": 0.01,
     "time_resolution": 1.0},
    {"median": 3.0, "hazard_ratio": 0.5, "shape": 0.8, "dropout_fraction": 0.1, "dropout_time": 6.0},
]


@pytest.mark.parametrize("fields", SURVIVAL_CASES)
def test_arms_time_to_event_is_survival_two_arm_replicate_for_replicate(fields):
    proc = trial({"type": "arms", "n": 20, "ratio": 1.5}, {"type": "time_to_event", **fields})
    ref = build("process", {"type": "survival_two_arm", "n": 20, "ratio": 1.5, **fields})
    same_batches(proc.draw_batch(np.random.default_rng(5), 40), ref.draw_batch(np.random.default_rng(5), 40))
    assert proc.facts() == ref.facts()
    assert proc.true_effect() == ref.true_effect() and proc.estimand_label == ref.estimand_label
    assert proc.effect_param == "outcome.hazard_ratio" and proc.null().true_effect() == 0.0
    assert proc.linear.mean0 == pytest.approx(ref.median0, rel=1e-12)


def test_entry_is_the_calendar_time_of_enrolment():
    proc = build("process", {"type": "survival_two_arm", "n": 30, "median": 5.0, "accrual": 4.0, "follow_up": 3.0})
    b = proc.draw_batch(np.random.default_rng(2), 20)
    entry, time, event = b["entry"], b["time"], b["event"]
    assert entry.min() >= 0 and entry.max() <= 4.0
    # nobody is followed beyond the calendar end of the study, accrual + follow-up (the censoring rule)
    assert np.all(entry + time <= 7.0 + 1e-12) and np.all(event[np.isclose(entry + time, 7.0)] == 0)


def test_schoenfeld_cross_check_applies_under_arms():
    fields = {"median": 12.0, "hazard_ratio": 0.7, "accrual": 12.0, "follow_up": 12.0}
    proc = trial({"type": "arms", "n": 150}, {"type": "time_to_event", **fields})
    ref = build("process", {"type": "survival_two_arm", "n": 150, **fields})
    logrank = build("analysis", {"type": "logrank"})
    power = logrank.analytic_power(proc, 0.05)
    # Schoenfeld (1983): events D, delta = sqrt(D p (1 - p)) log HR with p = 1/2; two-sided power
    # Phi(delta - z) + Phi(-delta - z), z = z_{1 - alpha/2}
    delta, z = math.sqrt(ref.expected_events() / 4) * math.log(0.7), stats.norm.ppf(0.975)
    direct = stats.norm.cdf(delta - z) + stats.norm.cdf(-delta - z)
    assert power == pytest.approx(direct, rel=1e-9) and power == logrank.analytic_power(ref, 0.05)
    res = sp.run(sp.Scenario(proc, logrank), reps=1000, seed=31, n_jobs=1)
    assert abs(res.power - power) < 4 * math.sqrt(power * (1 - power) / 1000), (res.power, power)


def inverse_cdf_draws(rng, size, n0, n1, p0, p1):
    """The draws of ordinal_two_arm before it became a factory over trial (simpower 2026-12-02, ddb4b80): one
    uniform per participant, the category = the number of inner cumulative probabilities at or below it."""
    u = rng.random((size, n0 + n1))
    y = np.empty(u.shape)
    for sl, probs in ((slice(0, n0), np.asarray(p0) / math.fsum(p0)), (slice(n0, n0 + n1), p1)):
        y[:, sl] = np.searchsorted(np.cumsum(probs)[:-1], u[:, sl], side="right")
    return y


@pytest.mark.parametrize("effect", [{"odds_ratio": 1.8}, {"p1": [0.1, 0.2, 0.3, 0.4]}])
def test_arms_ordinal_is_ordinal_two_arm_replicate_for_replicate(effect):
    missing = {"type": "mcar", "rate": 0.2}
    proc = trial({"type": "arms", "n": 25, "n1": 31}, {"type": "ordinal", "p0": [0.2, 0.3, 0.3, 0.2], **effect},
                 missing=missing)
    ref = build("process", {"type": "ordinal_two_arm", "n": 25, "n1": 31, "p0": [0.2, 0.3, 0.3, 0.2],
                            "missing": missing, **effect})
    same_batches(proc.draw_batch(np.random.default_rng(9), 50), ref.draw_batch(np.random.default_rng(9), 50))
    assert proc.replace(missing=None).facts() == ref.replace(missing=None).facts()
    # and what ordinal_two_arm drew before it was a factory over trial
    p1 = ref.p1_probs
    if "odds_ratio" in effect:   # McCullagh (1980): logit P(Y1 <= k) = logit P(Y0 <= k) - log(OR)
        cum0 = np.cumsum([0.2, 0.3, 0.3])
        cum1 = 1 / (1 + np.exp(-(np.log(cum0 / (1 - cum0)) - math.log(1.8))))
        assert np.allclose(p1, np.diff(np.concatenate([[0.0], cum1, [1.0]])), atol=1e-12)
    old = inverse_cdf_draws(np.random.default_rng(9), 50, 25, 31, [0.2, 0.3, 0.3, 0.2], p1)
    clean = ref.replace(missing=None).draw_batch(np.random.default_rng(9), 50)
    assert np.array_equal(clean["y"], old) and set(clean.per_rep) == {"y"}
    assert proc.true_effect() == ref.true_effect() and proc.estimand_label == ref.estimand_label
    assert proc.null().true_effect() in (0.0, None) and proc.effect_param == f"outcome.{ref.effect_param}"


def test_whitehead_cross_check_applies_under_arms():
    proc = trial({"type": "arms", "n": 80}, {"type": "ordinal", "p0": [0.2, 0.3, 0.3, 0.2], "odds_ratio": 1.8})
    po = build("analysis", {"type": "proportional_odds"})
    assert po.analytic_power(proc, 0.05) == pytest.approx(
        analytic.whitehead_power([0.2, 0.3, 0.3, 0.2], 1.8, 80, alpha=0.05), rel=1e-12)


# -- the frailty layer ---------------------------------------------------------------------------------
def km_at(time, event, t) -> float:
    from statsmodels.duration.survfunc import SurvfuncRight

    sf = SurvfuncRight(time, event)
    idx = np.searchsorted(sf.surv_times, t, side="right") - 1
    return 1.0 if idx < 0 else float(sf.surv_prob[idx])


@pytest.mark.parametrize("baseline", [{"median": 12.0}, {"hazard0": 0.06}])
def test_frailty_marginal_survival_is_the_kaplan_meier_of_the_draws(baseline):
    shape, hr, icc = 1.3, 0.7, 0.15
    proc = trial({"type": "clusters", "clusters": 20, "cluster_size": 10, "icc": icc},
                 {"type": "time_to_event", **baseline, "hazard_ratio": hr, "shape": shape, "accrual": 6.0,
                  "follow_up": 18.0, "dropout_rate": 0.01})
    # independent reference: sigma from the latent ICC, beta0 from the stated baseline, quad integrals
    sigma = math.sqrt(icc / (1 - icc) * math.pi**2 / 6)
    if "median" in baseline:
        lam = math.log(2) ** (1 / shape) / 12.0
        b0 = optimize.brentq(lambda b: normal_mean(lambda z: math.exp(-math.exp(b + sigma * z) * math.log(2))) - 0.5,
                             -5, 5, xtol=1e-13)
    else:
        lam, b0 = 0.06, -sigma**2 / 2   # the mean cluster cumulative hazard is (hazard0 t)^shape
    assert proc.linear.beta0 == pytest.approx(b0, abs=1e-9) and proc.linear.sigma == pytest.approx(sigma, rel=1e-12)

    def surv(t, arm):
        eta = b0 + math.log(hr) * arm
        return normal_mean(lambda z: math.exp(-math.exp(eta + sigma * z) * (lam * t) ** shape))

    b = proc.draw_batch(np.random.default_rng(41), 150)
    arm = b["arm"]
    for t in (6.0, 12.0, 20.0):
        for a in (0, 1):
            km = np.array([km_at(b["time"][i, arm == a], b["event"][i, arm == a], t) for i in range(b.size)])
            within_4_mcse(km, surv(t, a))
    if "median" in baseline:
        assert surv(12.0, 0) == pytest.approx(0.5, abs=1e-9)   # the stated median is population-averaged


def test_frailty_latent_icc_of_the_log_times():
    shape, icc, hazard0 = 1.5, 0.25, 0.1
    proc = trial({"type": "clusters", "clusters": 30, "cluster_size": 8, "icc": icc},
                 {"type": "time_to_event", "hazard0": hazard0, "hazard_ratio": 0.8, "shape": shape})
    s2 = icc / (1 - icc) * math.pi**2 / 6
    b = proc.draw_batch(np.random.default_rng(43), 200)
    assert np.all(b["event"] == 1)   # no censoring: the latent variable is seen
    # control arm: shape * log(lam T) = log E - beta0 - sigma u, E[log E] = -gamma, beta0 = -sigma^2 / 2
    latent = shape * np.log(hazard0 * b["time"]) - (-np.euler_gamma + s2 / 2)
    cluster, control = b["cluster"], b["arm"] == 0
    pair, total = [], []
    for c in np.unique(cluster[control]):
        rows = cluster == c
        s, sq, m = latent[:, rows].sum(axis=1), (latent[:, rows] ** 2).sum(axis=1), rows.sum()
        pair.append((s * s - sq) / (m * (m - 1)))
        total.append(sq / m)
    within_4_mcse(np.mean(pair, axis=0), s2)                      # covariance of two members: sigma_b^2
    within_4_mcse(np.mean(total, axis=0), s2 + math.pi**2 / 6)    # variance: sigma_b^2 + pi^2 / 6


def test_logrank_ignoring_the_clustering_is_anti_conservative():
    proc = trial({"type": "clusters", "clusters": 15, "cluster_size": 20, "icc": 0.2},
                 {"type": "time_to_event", "median": 1.0, "hazard_ratio": 1.0, "follow_up": 2.0})
    res = sp.run(sp.Scenario(proc, build("analysis", {"type": "logrank"})), reps=2000, seed=47, n_jobs=1)
    rate = res.power
    assert rate - 4 * math.sqrt(rate * (1 - rate) / 2000) > 1.5 * 0.05, rate
    # the same trial without clustering keeps its level (Bradley's interval around 0.05)
    flat = proc.replace(**{"design.icc": 0.0})
    rate0 = sp.run(sp.Scenario(flat, build("analysis", {"type": "logrank"})), reps=2000, seed=47, n_jobs=1).power
    assert 0.025 < rate0 < 0.075, rate0


# -- the ordinal cluster layer ---------------------------------------------------------------------------
def quad_cut(cum: float, sigma: float) -> float:
    """The cut alpha with E[expit(alpha - sigma Z)] = cum (independent of the module's quadrature)."""
    return optimize.brentq(lambda a: normal_mean(lambda z: expit(a - sigma * z)) - cum, -30, 30, xtol=1e-13)


def test_ordinal_latent_icc_is_recovered_from_the_draws():
    p0, icc = [0.2, 0.3, 0.3, 0.2], 0.15
    proc = trial({"type": "clusters", "clusters": 80, "cluster_size": 10, "icc": icc},
                 {"type": "ordinal", "p0": p0, "odds_ratio": 1.0})
    sigma = math.sqrt(icc / (1 - icc) * math.pi**2 / 3)
    assert proc.linear.sigma == pytest.approx(sigma, rel=1e-12)
    b = proc.draw_batch(np.random.default_rng(51), 250)
    y, cluster, m = b["y"], b["cluster"], 10
    assert np.array_equal(cluster, np.repeat(np.arange(160), m))   # equal clusters, rows in cluster order
    for k, cum in enumerate(np.cumsum(p0)[:-1]):
        s = (y > k).reshape(b.size, 160, m).sum(axis=2)
        moments = (s * (s - 1) / (m * (m - 1))).mean(axis=1)    # per replicate, over the clusters
        cut = quad_cut(cum, sigma)
        within_4_mcse(moments, normal_mean(lambda z: (1 - expit(cut - sigma * z)) ** 2))
        if k != 1:
            continue
        # the latent ICC recovered at the middle cut: invert the (increasing) pair moment at the 4-MCSE ends,
        # the inner integrals by scipy's Gauss-Hermite rule (probabilists' weights, 60 nodes)
        x, w = special.roots_hermitenorm(60)
        w = w / w.sum()

        def pair_moment(s):   # E[P(Y > k | u)^2] for cluster SD s, the marginal P(Y > k) held fixed
            c = optimize.brentq(lambda a: w @ expit(a - s * x) - cum, -30, 30, xtol=1e-12)
            return w @ (1 - expit(c - s * x)) ** 2

        mcse = moments.std(ddof=1) / math.sqrt(moments.size)
        ends = [optimize.brentq(lambda s: pair_moment(s) - v, 1e-6, 6.0, xtol=1e-9)
                for v in (moments.mean() - 4 * mcse, moments.mean() + 4 * mcse)]
        low, high = (s * s / (s * s + math.pi**2 / 3) for s in ends)
        assert low < icc < high and high - low < 0.12, (k, low, high)


@pytest.mark.parametrize("scale", ["conditional", "marginal"])
def test_ordinal_category_shares_per_arm(scale):
    p0, odds_ratio, icc = np.array([0.2, 0.3, 0.3, 0.2]), 2.0, 0.1
    proc = trial({"type": "clusters", "clusters": 30, "cluster_size": 10, "icc": icc, "cluster_size_cv": 0.4},
                 {"type": "ordinal", "p0": list(p0), "odds_ratio": odds_ratio, "effect_scale": scale})
    sigma = math.sqrt(icc / (1 - icc) * math.pi**2 / 3)
    cum0 = np.cumsum(p0)[:-1]
    if scale == "conditional":   # cluster-specific shift of the cuts, then averaged over the clusters
        cum1 = [normal_mean(lambda z, c=quad_cut(q, sigma): expit(c - math.log(odds_ratio) - sigma * z))
                for q in cum0]
    else:                        # McCullagh (1980) on the population-averaged cumulative odds
        odds = cum0 / (1 - cum0) / odds_ratio
        cum1 = odds / (1 + odds)
    p1 = np.diff(np.concatenate([[0.0], cum1, [1.0]]))
    assert np.allclose(proc.linear.probs1, p1, atol=1e-9)
    b = proc.draw_batch(np.random.default_rng(53), 150)
    present = b.present
    for arm, probs in ((0, p0), (1, p1)):
        rows = (b["arm"] == arm) & present
        for k, p in enumerate(probs):
            share = ((b["y"] == k) & rows).sum(axis=1) / rows.sum(axis=1)
            within_4_mcse(share, p)
    label = "conditional log odds ratio" if scale == "conditional" else "log odds ratio"
    assert proc.estimand_label == label and proc.true_effect() == pytest.approx(math.log(odds_ratio))


# -- TOML, refusals, the null --------------------------------------------------------------------------
def test_layers_from_toml_and_their_refusals():
    sf = loads('''
[process]
type = "trial"
design = {type = "clusters", clusters = 8, cluster_size = 12, icc = 0.05}
outcome = {type = "time_to_event", median = 10, hazard_ratio = 0.7, accrual = 6, follow_up = 12}

[analysis]
type = "logrank"
''')
    proc = sf.scenario.process
    assert proc.outcome.name == "time_to_event" and proc.size_param == "design.clusters"
    assert proc.null().outcome.hazard_ratio == 1.0 and proc.facts() == ()
    assert proc.estimand_label == "conditional log hazard ratio"
    assert sp.Scenario(proc, sp.LogRank()).true_effect_for("logrank") is None   # a different estimand
    with pytest.raises(sp.ParameterError, match="`missing` does not apply to a time_to_event outcome"):
        proc.replace(missing={"type": "mcar", "rate": 0.1})
    with pytest.raises(sp.ParameterError, match="`outcome.median`, `hazard0`: give exactly one"):
        trial({"type": "arms", "n": 10}, {"type": "time_to_event", "median": 3.0, "hazard0": 0.2})
    with pytest.raises(sp.ParameterError, match="`effect` does not apply to a ordinal outcome"):
        trial({"type": "arms", "n": 10}, {"type": "ordinal", "p0": [0.5, 0.5]}, effect=0.3)
    with pytest.raises(sp.ParameterError, match="`outcome.p0` must list K >= 2 category probabilities"):
        trial({"type": "arms", "n": 10}, {"type": "ordinal", "p0": [0.5, 0.6]})
    with pytest.raises(sp.ScenarioFileError, match="time_to_event"):
        loads('[process]\ntype = "trial"\ndesign = {type = "arms", n = 10}\n'
              'outcome = {type = "time_to_evnt", median = 3}\n[analysis]\ntype = "logrank"\n')


def test_ordinal_null_with_treated_probabilities_and_the_search_size():
    proc = trial({"type": "clusters", "clusters": 6, "cluster_size": 5, "icc": 0.1},
                 {"type": "ordinal", "p0": [0.3, 0.4, 0.3], "p1": [0.2, 0.2, 0.6]})
    assert proc.true_effect() is None and proc.estimand_label is None
    assert proc.true_values()["probability_index"] == pytest.approx(
        0.2 * 0.15 + 0.2 * (0.3 + 0.2) + 0.6 * (0.7 + 0.15))   # P(Y1 > Y0) + P(Y1 = Y0) / 2 by hand
    null = proc.null()
    assert list(null.outcome.p1) == [0.3, 0.4, 0.3] and null.true_values()["probability_index"] == pytest.approx(0.5)
    assert sp.Scenario(proc, sp.MannWhitney()).with_params(**{"design.clusters": 9}).process.design.clusters == 9


# -- the reference page and the docstrings --------------------------------------------------------------
def test_reference_page_examples_load_and_its_numbers_hold():
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "docs" / "reference-event-ordinal-layers.md").read_text()
    blocks = re.findall(r"^```toml\n(.*?)^```$", text, re.S | re.M)
    assert len(blocks) == 2
    tte = loads(blocks[0] + '\n[analysis]\ntype = "logrank"\n').scenario.process
    assert tte.outcome.name == "time_to_event" and tte.linear.sigma == pytest.approx(0.294, abs=5e-4)
    assert math.sqrt(0.2 / 0.8 * math.pi**2 / 6) == pytest.approx(0.641, abs=5e-4)
    ordinal = loads(blocks[1]).scenario.process
    assert ordinal.linear.sigma == pytest.approx(0.605, abs=5e-4)
    assert np.allclose(ordinal.linear.probs1, [0.114, 0.231, 0.331, 0.324], atol=5e-4)
    assert ordinal.true_values()["probability_index"] == pytest.approx(0.599, abs=5e-4)


def test_the_docstring_examples_hold():
    import doctest

    import simpower.processes.event_outcomes

    result = doctest.testmod(simpower.processes.event_outcomes, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0


@pytest.mark.parametrize("outcome", [{"type": "time_to_event", "median": 2.0, "hazard_ratio": 0.5},
                                     {"type": "ordinal", "p0": [0.3, 0.4, 0.3], "odds_ratio": 3.0}])
def test_individual_randomisation_without_cluster_variation(outcome):
    # icc = 0 with arms varying by replicate: no cluster effect, the treated rows still get the effect
    proc = trial({"type": "clusters", "clusters": 10, "cluster_size": 20, "icc": 0.0, "randomise": "individual"},
                 outcome)
    b = proc.draw_batch(np.random.default_rng(59), 200)
    assert b["arm"].ndim == 2
    col = "event" if outcome["type"] == "time_to_event" else "y"
    treated = b["arm"] == 1
    # exponential, no censoring: P(T1 > T0) = 1 / (1 + HR); ordinal: the mean category moves up
    if col == "event":
        assert np.all(b["event"] == 1)
        t0 = np.where(~treated, b["time"], 0).sum(axis=1) / (~treated).sum(axis=1)
        t1 = np.where(treated, b["time"], 0).sum(axis=1) / treated.sum(axis=1)
        within_4_mcse(t1 / t0, 2.0 * (200 / 199))  # mean ratio 1/HR; E[1/mean of n exponentials] = n/(n-1)
    else:
        shares = (np.where(treated, b["y"], 0).sum(axis=1) / treated.sum(axis=1))
        within_4_mcse(shares, float(np.arange(3) @ proc.linear.probs1))
