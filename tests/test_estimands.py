"""Bias and coverage are computed only against the true value of what an analysis estimates."""

import pytest

import simpower as sp


def test_location_shift_matches_mean_difference_only_under_a_pure_shift():
    shift = sp.Scenario(sp.TwoArm(n=20, effect=0.5), analyses=[sp.WelchT(), sp.MannWhitney()])
    assert shift.true_effect_for("welch_t") == 0.5
    assert shift.true_effect_for("mann_whitney") == 0.5  # a pure shift: HL shift estimates 0.5
    ratio = sp.Scenario(sp.TwoArm(n=20, effect=0.8, effect_type="ratio", outcome=sp.Lognormal(median=1, cv=1)),
                        analyses=[sp.WelchT(), sp.MannWhitney(), sp.LogT()])
    assert ratio.true_effect_for("welch_t") == pytest.approx(ratio.process.outcome.mean * (0.8 - 1))
    assert ratio.true_effect_for("mann_whitney") is None
    assert ratio.true_effect_for("log_t") is None  # a ratio of geometric means: not the mean difference
    given = sp.Scenario(ratio.process, analyses=[sp.WelchT(), sp.LogT()], true_effects={"log_t": 0.8})
    assert given.true_effect_for("log_t") == 0.8
    res = sp.run(given, reps=400, seed=1, n_jobs=1)
    assert "bias" in res.summaries["log_t"] and res.summaries["log_t"]["true_effect"] == 0.8


def test_survival_and_count_analyses_use_their_own_scale():
    sc = sp.Scenario(sp.CountTwoArm(n=30, rate0=1.0, rate_ratio=0.7), analyses=[sp.PoissonGLM(), sp.WelchT()])
    import math

    assert sc.true_effect_for("poisson_glm") == pytest.approx(math.log(0.7))
    assert sc.true_effect_for("welch_t") == pytest.approx(math.log(0.7))  # unlabeled: the process's estimand


def test_true_effects_must_name_an_analysis():
    with pytest.raises(sp.ParameterError, match="`true_effects.logt` names no analysis. Did you mean 'log_t'"):
        sp.Scenario(sp.TwoArm(n=5), analyses=[sp.LogT()], true_effects={"logt": 1.0})
