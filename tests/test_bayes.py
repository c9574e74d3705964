"""Bayesian posterior-probability rules (posterior_probability): exact operating characteristics and checks.

External references: with a flat prior, "P(theta > 0 | data) > 1 - alpha" is the one-sided
z-test at level alpha (a known identity, e.g. Spiegelhalter, Abrams & Myles 2004, section 3.7);
the conjugate normal update (ibid., ch. 3); the beta posterior probability against direct
numerical integration with scipy.integrate.quad; the exact operating characteristics by
enumeration of the binomial outcomes, against simulation within 4 MCSE.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

import simpower as sp
from simpower.analyses.bayes import PosteriorProbability
from simpower.analytic.bayes import (beta_binomial_rule_power, beta_difference_probability, calibrate_eta,
                                     normal_rule_power)


def test_flat_prior_rule_is_the_one_sided_z_test_replicate_by_replicate():
    sc = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.3), analyses={
        "rule": PosteriorProbability(sd=1.0, eta=0.975), "z": sp.ZTest(alternative="greater")})
    res = sp.run(sc, reps=3000, seed=2, n_jobs=1, progress=False)
    rule = res.records["rule"].pvalue == 0
    z = res.records["z"].pvalue <= 0.025
    assert np.array_equal(rule, z)
    assert math.isclose(normal_rule_power(0.3, 40), sp.analytic.z_power(0.3, 40, alpha=0.025, alternative="greater",
                                                                         design="two-sample"), rel_tol=1e-12)


def test_informative_prior_power_by_simulation_matches_the_exact_value():
    rule = PosteriorProbability(sd=2.0, eta=0.9, prior_mean=0.0, prior_sd=0.5, threshold=0.1)
    sc = sp.Scenario(sp.NormalTwoArm(n=80, effect=0.8, sd=2.0), analyses={"rule": rule, "z": sp.ZTest(sd=2.0)})
    res = sp.run(sc, reps=6000, seed=3, n_jobs=1, progress=False)
    exact = normal_rule_power(0.8, 80, sd=2.0, eta=0.9, prior_mean=0.0, prior_sd=0.5, threshold=0.1)
    assert abs(res.summaries["rule"]["power"] - exact) < 4 * res.summaries["rule"]["mcse"]
    # the posterior mean is the difference shrunk by s^2 / (s^2 + se^2) towards the prior mean 0 (conjugate update)
    se2 = 2.0**2 * (2 / 80)
    d = res.records["z"].estimate
    assert np.allclose(res.records["rule"].estimate, d * 0.25 / (0.25 + se2), rtol=1e-12)


def test_calibrated_normal_rule_has_type_i_error_alpha_exactly():
    eta = calibrate_eta(0.025, n0=50, sd=1.5, prior_mean=0.3, prior_sd=0.4)
    assert eta != 0.975  # an optimistic prior needs a stricter eta
    assert math.isclose(normal_rule_power(0.0, 50, sd=1.5, eta=eta, prior_mean=0.3, prior_sd=0.4), 0.025,
                        rel_tol=1e-9)


@pytest.mark.parametrize("a0, b0, a1, b1, thr", [(4, 9, 7, 6, 0.0), (20.5, 30.5, 25.5, 25.5, 0.05),
                                                 (2, 2, 1, 3, -0.1)])
def test_beta_posterior_probability_against_direct_integration(a0, b0, a1, b1, thr):
    direct, _ = integrate.quad(lambda p: stats.beta.pdf(p, a0, b0) * stats.beta.sf(p + thr, a1, b1), 0, 1,
                               epsabs=1e-12, limit=200)
    assert abs(float(beta_difference_probability(a0, b0, a1, b1, thr)) - direct) < 1e-8


def test_beta_binomial_rule_by_simulation_matches_enumeration():
    rule = PosteriorProbability(model="beta_binomial", eta=0.95, prior_a0=2, prior_b0=5)
    sc = sp.Scenario(sp.BinaryTwoArm(n=50, p0=0.25, risk_difference=0.15), rule)
    res = sp.run(sc, reps=6000, seed=4, n_jobs=1, progress=False)
    exact = beta_binomial_rule_power(0.25, 0.40, 50, 50, eta=0.95, prior0=(2, 5))
    assert abs(res.power - exact) < 4 * res.mcse


def test_calibrated_beta_binomial_rule_keeps_its_type_i_error():
    eta = calibrate_eta(0.05, model="beta_binomial", n0=30, null_p=0.2)
    size = beta_binomial_rule_power(0.2, 0.2, 30, 30, eta=eta)
    assert size <= 0.05
    # a slightly smaller eta lets in at least one more outcome table, and the error exceeds 0.05
    assert beta_binomial_rule_power(0.2, 0.2, 30, 30, eta=eta - 1e-9) > 0.05
    rule = PosteriorProbability(model="beta_binomial", eta=eta)
    res = sp.run(sp.Scenario(sp.BinaryTwoArm(n=30, p0=0.2, risk_difference=0.0), rule), reps=8000, seed=5,
                 n_jobs=1, progress=False)
    assert abs(res.power - size) < 4 * math.sqrt(size * (1 - size) / 8000)


def test_batch_and_per_replicate_paths_agree_with_missing_outcomes():
    proc = sp.NormalTwoArm(n=30, effect=0.5, missing=sp.MCAR(rate=0.2))
    for rule in (PosteriorProbability(), PosteriorProbability(sd=1.0, prior_sd=1.0, prior_mean=0.2)):
        b = proc.draw_batch(np.random.default_rng(6), 50)
        out = rule.batch(b)
        for i in range(50):
            one = rule(b.replicate(i))
            assert one.pvalue == out["pvalue"][i]
            assert math.isclose(one.estimate, out["estimate"][i], rel_tol=1e-12)


def test_bad_settings_are_one_line_errors():
    with pytest.raises(sp.ParameterError, match="eta"):
        PosteriorProbability(eta=1.0)
    with pytest.raises(sp.ParameterError, match="threshold"):
        PosteriorProbability(model="beta_binomial", threshold=1.5)


def test_scenario_alpha_does_not_move_a_rule_that_decides_itself_and_the_description_says_so():
    """The rule's decision is coded as its p-value (0 / 1), so the scenario's alpha cannot move it, while the
    z-test's decisions move with alpha; the description and the justification name the rule instead of the
    scenario's alpha (the design of this analysis: FDA 2010, from memory; common practice for Bayesian rules)."""
    rule = PosteriorProbability(sd=1.0, eta=0.9)
    sc = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.3), analyses={"rule": rule, "z": sp.ZTest()}, alpha=0.2)
    res = sp.run(sc, reps=1000, seed=5, n_jobs=1, progress=False)
    post = res.records["rule"]  # posterior mean and SD: P(difference > 0 | data) = Phi(mean / sd)
    assert res.summaries["rule"]["power"] == np.mean(stats.norm.cdf(post.estimate / post.se) > 0.9)
    assert res.summaries["z"]["power"] == np.mean(res.records["z"].pvalue <= 0.2)
    lines = sc.describe()
    assert any("`rule` decides by its own rule" in line and "eta = 0.9" in line for line in lines)
    assert any("at most alpha = 0.2 (the analyses deciding by their own rule excepted)" in line for line in lines)
    from simpower.answer import justification

    text = str(justification(res))
    assert "eta = 0.9" in text and "significance level of 0.2" not in text
