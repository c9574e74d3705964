"""two_arm and multi_arm: effect types, per-arm SDs, baseline correlation, layout, engine runs.

Large batches are drawn from the process directly and summary statistics are
compared with their targets within 4 standard errors (delta method for ratios
and correlations: common practice). The engine check compares simulated power
with the noncentral-t power of Student's t-test (Cohen 1988, Statistical Power
Analysis for the Behavioral Sciences, ch. 2; computed here with scipy.stats.nct).
"""

from __future__ import annotations

import json
import math
import pickle

import numpy as np
import pytest
from scipy import optimize, stats

import simpower as sp
from simpower.facts import NormalFacts
from simpower.processes.arms import MultiArm, TwoArm, copula_correlation, latent_correlation
from simpower.processes.missing import MAR, MCAR
from simpower.processes.outcomes import Fleishman, Gamma, Lognormal, Normal, ScipyOutcome, StudentT
from simpower.registry import build
from simpower.scenario_files import loads

Z = 4.0


def arms_of(p, size, seed):
    b = p.draw_batch(np.random.default_rng(seed), size)
    arm = b.shared["arm"]
    return b, b.per_rep["y"][:, arm == 0].ravel(), b.per_rep["y"][:, arm == 1].ravel()


def var_se(x):
    """Sample variance and its SE, sqrt((m4 - m2^2) / n) (delta method)."""
    d = x - x.mean()
    m2 = np.mean(d**2)
    return m2, math.sqrt((np.mean(d**4) - m2**2) / x.size)


def corr_se(x, y):
    """Pearson correlation and its SE from the influence function zx zy - r (zx^2 + zy^2) / 2."""
    zx = (x - x.mean()) / x.std()
    zy = (y - y.mean()) / y.std()
    r = float(np.mean(zx * zy))
    return r, float(np.std(zx * zy - r / 2 * (zx**2 + zy**2)) / math.sqrt(x.size))


# -- effect types ------------------------------------------------------------------------------

def test_shift_effect_realised_mean_difference():
    p = TwoArm(n=2000, outcome=Lognormal(median=2.0, cv=0.5), effect=0.3)
    _, y0, y1 = arms_of(p, 50, 1)
    se = math.sqrt(y0.var() / y0.size + y1.var() / y1.size)
    assert abs((y1.mean() - y0.mean()) - 0.3) <= Z * se
    assert p.true_effect() == 0.3


def test_d_effect_adds_effect_times_sd():
    o = Gamma(shape=3.0, scale=2.0)
    p = TwoArm(n=2000, outcome=o, effect=0.4, effect_type="d")
    _, y0, y1 = arms_of(p, 50, 2)
    se = math.sqrt(y0.var() / y0.size + y1.var() / y1.size)
    assert p.true_effect() == pytest.approx(0.4 * math.sqrt(3.0) * 2.0)
    assert abs((y1.mean() - y0.mean()) - p.true_effect()) <= Z * se


def test_ratio_effect_realised_mean_ratio_and_true_effect_in_raw_units():
    p = TwoArm(n=2000, outcome=Gamma(mean=5.0, cv=0.4), effect=1.3, effect_type="ratio")
    _, y0, y1 = arms_of(p, 50, 3)
    m0, m1 = y0.mean(), y1.mean()
    ratio_se = (m1 / m0) * math.sqrt(y0.var() / (y0.size * m0**2) + y1.var() / (y1.size * m1**2))
    assert abs(m1 / m0 - 1.3) <= Z * ratio_se
    diff_se = math.sqrt(y0.var() / y0.size + y1.var() / y1.size)
    assert p.true_effect() == pytest.approx(5.0 * 0.3)
    assert abs((m1 - m0) - p.true_effect()) <= Z * diff_se
    # a multiplicative effect also multiplies the SD (the CV stays 0.4)
    v1, se1 = var_se(y1)
    assert abs(v1 - (1.3 * 5.0 * 0.4) ** 2) <= Z * se1
    assert p.null().effect == 1.0 and p.null().true_effect() == 0.0


@pytest.mark.parametrize("outcome,effect_type,effect", [
    (Normal(sd=2.0), "shift", 0.5),
    (Lognormal(mean=4.0, cv=0.3), "ratio", 1.5),
])
def test_sd_ratio_scales_treatment_deviations_not_the_mean(outcome, effect_type, effect):
    p = TwoArm(n=2000, outcome=outcome, effect=effect, effect_type=effect_type, sd_ratio=1.5)
    _, y0, y1 = arms_of(p, 50, 4)
    base_sd = outcome.sd * (effect if effect_type == "ratio" else 1.0)
    v1, se1 = var_se(y1)
    assert abs(v1 - (1.5 * base_sd) ** 2) <= Z * se1
    v0, se0 = var_se(y0)
    assert abs(v0 - outcome.sd**2) <= Z * se0
    se = math.sqrt(y0.var() / y0.size + y1.var() / y1.size)
    assert abs((y1.mean() - y0.mean()) - p.true_effect()) <= Z * se


# -- baseline covariate --------------------------------------------------------------------

@pytest.mark.parametrize("outcome,rho", [
    (Normal(mean=1.0, sd=2.0), 0.5),
    (Lognormal(median=1.0, cv=0.6), 0.5),
    (Gamma(shape=2.0), -0.4),
    (Fleishman(skewness=1.0, excess_kurtosis=2.0), 0.7),
    (StudentT(df=6.0), 0.5),
    (ScipyOutcome(dist="poisson", args=[3.0]), 0.5),
])
def test_realised_baseline_correlation_matches_rho_in_each_arm(outcome, rho):
    p = TwoArm(n=1000, outcome=outcome, effect=0.5, baseline_corr=rho)
    b = p.draw_batch(np.random.default_rng(5), 100)
    arm = b.shared["arm"]
    for a in (0, 1):
        r, se = corr_se(b.per_rep["baseline"][:, arm == a].ravel(), b.per_rep["y"][:, arm == a].ravel())
        assert abs(r - rho) <= Z * se, (a, r, se)
    # the baseline has the outcome's distribution (same mean and SD as the control arm)
    base = b.per_rep["baseline"].ravel()
    v, se = var_se(base)
    assert abs(base.mean() - outcome.mean) <= Z * math.sqrt(v / base.size)
    assert abs(v - outcome.sd**2) <= Z * se


def test_lognormal_copula_calibration_matches_closed_form():
    # Cov(e^{sZ1}, e^{sZ2}) = e^{s^2} (e^{r s^2} - 1) from the normal moment generating function, so
    # Pearson corr = (e^{r s^2} - 1) / (e^{s^2} - 1) (Johnson, Kotz & Balakrishnan 1994, ch. 14, from memory)
    o = Lognormal(median=3.0, sigma=0.8)
    s2 = 0.64
    for rho in (-0.3, 0.2, 0.6, 0.95):
        assert latent_correlation(o, rho) == pytest.approx(math.log1p(rho * math.expm1(s2)) / s2, abs=1e-10)
    assert copula_correlation(o, -1.0) == pytest.approx(math.expm1(-s2) / math.expm1(s2), abs=1e-10)


def test_fleishman_copula_calibration_matches_vale_maurelli():
    # Vale & Maurelli (1983, Psychometrika 48:465-471): for two power-method variables with the same
    # coefficients, corr = r (b^2 + 6bd + 9d^2) + 2 c^2 r^2 + 6 d^2 r^3
    o = Fleishman(skewness=1.5, excess_kurtosis=3.0)
    _, b, c, d = o.coefficients
    for rho in (0.3, 0.8, -0.4):
        ref = optimize.brentq(lambda r: r * (b * b + 6 * b * d + 9 * d * d) + 2 * c * c * r**2 + 6 * d * d * r**3
                              - rho, -1, 1, xtol=1e-14)
        assert latent_correlation(o, rho) == pytest.approx(ref, abs=1e-10)


def test_normal_baseline_needs_no_calibration():
    assert TwoArm(n=5, baseline_corr=0.37).latent_corr == 0.37


def test_unreachable_baseline_correlation_is_an_error_with_the_range():
    with pytest.raises(sp.ParameterError, match=r"^`baseline_corr` = -0.5 cannot be reached.*\(-0\.018, 1\.000\)"):
        TwoArm(n=10, outcome=Lognormal(median=1.0, sigma=2.0), baseline_corr=-0.5)
    with pytest.raises(sp.ParameterError, match=r"^`baseline_corr` needs an outcome with a finite SD"):
        TwoArm(n=10, outcome=StudentT(df=2.0), baseline_corr=0.5)


# -- layout, batch vs per-replicate, engine ------------------------------------------------------

def test_long_table_columns_and_batch_layout():
    p = TwoArm(n=6, ratio=1.5, outcome=Gamma(shape=2.0), effect=1.0, baseline_corr=0.5,
               missing=MAR(rate=0.3, strength=1.0))
    b = p.draw_batch(np.random.default_rng(6), 4)
    assert set(b.per_rep) == {"y", "baseline", "observed"} and set(b.shared) == {"arm"}
    assert b.info["missing"] is True and (b.info["n0"], b.info["n1"]) == (6, 9)
    assert np.array_equal(b.shared["arm"], [0] * 6 + [1] * 9)
    assert np.array_equal(np.isnan(b.per_rep["y"]), b.per_rep["observed"] == 0)
    one = p(np.random.default_rng(6))
    assert set(one) == {"y", "baseline", "observed", "arm"} and all(v.shape == (15,) for v in one.values())
    assert np.array_equal(one["baseline"], p.draw_batch(np.random.default_rng(6), 1).per_rep["baseline"][0])
    assert "missing" not in TwoArm(n=6).draw_batch(np.random.default_rng(1), 2).info


def test_batch_t_tests_agree_with_per_replicate_on_two_arm_data():
    p = TwoArm(n=12, ratio=2.0, outcome=Lognormal(median=1.0, cv=0.8), effect=0.4, baseline_corr=0.6)
    b = p.draw_batch(np.random.default_rng(7), 30)
    for analysis in (sp.TTest(), sp.WelchT()):
        assert analysis.supports_batch(b)
        out = analysis.batch(b)
        one = [analysis(b.replicate(i)) for i in range(b.size)]
        for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
            assert np.allclose(out[f], [getattr(r, f) for r in one], rtol=1e-10, atol=1e-12), f


def test_engine_power_matches_noncentral_t_and_normal_two_arm():
    n, effect = 30, 0.6
    sc = sp.Scenario(TwoArm(n=n, outcome=Normal(), effect=effect), analyses=[sp.TTest(), sp.WelchT()])
    res = sp.run(sc, reps=4000, seed=11, n_jobs=1, progress=False, point=0)
    df = 2 * n - 2
    ncp = effect / math.sqrt(2 / n)
    crit = stats.t.ppf(0.975, df)
    ref = stats.nct.sf(crit, df, ncp) + stats.nct.cdf(-crit, df, ncp)
    for name in ("t_test", "welch_t"):
        s = res.summaries[name]
        assert res.paths[name] == "batch"
        assert abs(s["power"] - ref) <= Z * math.sqrt(ref * (1 - ref) / 4000), (name, s["power"], ref)
    assert res.summaries["t_test"]["analytic_power"] == pytest.approx(ref, rel=1e-6)
    # the same numbers as the built-in normal two-arm process: same draws in the same order
    # (the same seed key given to both: by default each scenario is keyed by its own content)
    ref_run = sp.run(sp.Scenario(sp.NormalTwoArm(n=n, effect=effect), analyses=[sp.TTest()]), reps=4000,
                     seed=11, n_jobs=1, progress=False, point=0)
    assert np.allclose(res.records["t_test"].pvalue, ref_run.records["t_test"].pvalue, rtol=1e-12)


def test_engine_with_mcar_dropout_keeps_type_one_error():
    sc = sp.Scenario(TwoArm(n=20, missing=MCAR(rate=0.25)), analysis=sp.TTest())
    res = sp.run(sc, reps=1000, seed=12, n_jobs=1, progress=False)
    s = res.summaries["t_test"]
    assert res.paths["t_test"] == "batch" and s["n_ok"] == 1000
    assert abs(s["power"] - 0.05) <= Z * math.sqrt(0.05 * 0.95 / 1000)


def test_normal_facts_only_for_the_analytic_cases():
    facts = TwoArm(n=20, ratio=2.0, outcome=Normal(sd=2.0), effect=0.5, effect_type="d", sd_ratio=1.5).facts()
    assert facts == (NormalFacts("two-sample", effect=1.0, n=20, sd0=2.0, sd1=3.0, ratio=2.0),)
    assert facts[0].sd is None  # unequal SDs: no common SD
    assert TwoArm(n=20, outcome=Lognormal(median=1.0, cv=0.5)).facts() == ()
    assert TwoArm(n=20, baseline_corr=0.5).facts() == ()
    assert TwoArm(n=20, missing=MCAR(rate=0.1)).facts() == ()


def test_spec_pickle_and_scenario_file_round_trips():
    p = TwoArm(n=40, outcome=Gamma(mean=3.0, cv=0.5), effect=1.2, effect_type="ratio", baseline_corr=0.4,
               missing=MAR(rate=0.1))
    spec = json.loads(json.dumps(p.spec()))
    assert build("process", spec) == p
    q = pickle.loads(pickle.dumps(p))
    assert q == p and q.latent_corr == p.latent_corr
    text = """
        [process]
        type = "two_arm"
        n = 40
        effect = 1.2
        effect_type = "ratio"
        baseline_corr = 0.4
        [process.outcome]
        type = "gamma"
        mean = 3.0
        cv = 0.5
        [process.missing]
        type = "mar"
        rate = 0.1
        [analysis]
        type = "welch_t"
    """
    assert loads(text).scenario.process == p
    assert "estimand" in p.describe() and "Gaussian copula" in p.describe()


def test_sweep_through_nested_parameters():
    p = TwoArm(n=10, outcome=Lognormal(median=2.0, cv=0.5), effect=0.2)
    assert p.replace(**{"outcome.cv": 0.9}).outcome.sd == pytest.approx(Lognormal(median=2.0, cv=0.9).sd)
    assert p.null().effect == 0.0


# -- bad input -------------------------------------------------------------------------------

@pytest.mark.parametrize("kw,start", [
    ({"effect_type": "ratio", "effect": 1.2}, "`effect_type` = 'ratio' needs an outcome that cannot be negative"),
    ({"outcome": StudentT(df=5), "effect_type": "ratio", "effect": 1.2}, "`effect_type` = 'ratio'"),
    ({"outcome": Gamma(shape=2.0), "effect_type": "ratio", "effect": 0.0}, "`effect` must be > 0"),
    ({"effect_type": "shfit"}, "`effect_type` must be one of"),
    ({"baseline_corr": 1.0}, "`baseline_corr` must be in (-1, 1)"),
    ({"ratio": 0.01}, "`ratio` gives a treatment arm of 0"),
    ({"outcome": {"type": "student_t", "df": 2}, "effect_type": "d"}, "`outcome.df` must be > 2"),
    ({"outcome": {"type": "lognormal", "median": 1.0, "mean": 2.0, "cv": 0.5}}, "`outcome.median`"),
    ({"outcome": {"type": "lognormal", "median": 1.0, "cv": 0.0}}, "`outcome.cv` must be > 0"),
    ({"missing": {"type": "mcar", "rate": 1.2}}, "`missing.rate` must be in [0, 1)"),
    ({"sd_rato": 2.0}, "`sd_rato` is not a parameter"),
])
def test_two_arm_bad_input_one_line_error(kw, start):
    with pytest.raises(sp.ParameterError) as exc:
        TwoArm(n=10, **kw)
    msg = str(exc.value)
    assert msg.startswith(start) and "\n" not in msg, msg


def test_unknown_effect_type_suggests_nearest():
    with pytest.raises(sp.ParameterError, match="Did you mean 'shift'"):
        TwoArm(n=10, effect_type="shfit")
    with pytest.raises(sp.ParameterError, match="Did you mean 'sd_ratio'"):
        TwoArm(n=10, sd_rato=2.0)


# -- multi_arm --------------------------------------------------------------------------------

def test_multi_arm_sizes_means_and_sds():
    p = MultiArm(effects=[0.0, 0.3, 0.6], n=4000, allocation=[2, 1, 1], sds=[1.0, 1.5, 0.5],
                 outcome=Normal(mean=1.0))
    assert p.sizes == (4000, 2000, 2000) and p.true_effects() == [0.0, 0.3, 0.6]
    b = p.draw_batch(np.random.default_rng(13), 20)
    arm = b.shared["arm"]
    assert np.array_equal(np.unique(arm), [0, 1, 2])
    y = b.per_rep["y"]
    for j, (eff, sd) in enumerate(zip((0.0, 0.3, 0.6), (1.0, 1.5, 0.5))):
        x = y[:, arm == j].ravel()
        v, se = var_se(x)
        assert abs(x.mean() - (1.0 + eff)) <= Z * math.sqrt(v / x.size)
        assert abs(v - sd**2) <= Z * se


def test_multi_arm_effect_types_and_null():
    p = MultiArm(effects=[1.0, 1.2, 2.0], n=[3000, 3000, 1500], outcome=Gamma(mean=2.0, cv=0.5), effect_type="ratio")
    b = p.draw_batch(np.random.default_rng(14), 20)
    arm, y = b.shared["arm"], b.per_rep["y"]
    m0 = y[:, arm == 0].mean()
    for j, e in ((1, 1.2), (2, 2.0)):
        x0, x = y[:, arm == 0].ravel(), y[:, arm == j].ravel()
        se = math.sqrt(x0.var() / x0.size + x.var() / x.size)
        assert abs((x.mean() - m0) - p.true_effects()[j]) <= Z * se
    assert p.null().effects == (1.0, 1.0, 1.0) and p.true_effect() is None
    two = MultiArm(effects=[0, 0.5], n=10, effect_type="d", outcome=Normal(sd=2.0))
    assert two.true_effect() == 1.0


def test_multi_arm_with_two_arms_runs_t_test_batch():
    sc = sp.Scenario(MultiArm(effects=[0, 0.0], n=[15, 25]), analysis=sp.TTest())
    res = sp.run(sc, reps=2000, seed=15, n_jobs=1, progress=False)
    assert res.paths["t_test"] == "batch"
    assert abs(res.power - 0.05) <= Z * math.sqrt(0.05 * 0.95 / 2000)


@pytest.mark.parametrize("kw,start", [
    ({"effects": [0.2, 0.5], "n": 10}, "`effects[0]` is the control arm and must be 0"),
    ({"effects": [0.5], "n": 10}, "`effects` must list at least 2 arms"),
    ({"n": 10}, "`effects` is required for multi_arm: give a list of effects"),
    ({"effects": [0, 0.5]}, "`n` is required for multi_arm"),
    ({"effects": [0, 0.5], "n": [10, 10], "allocation": [1, 1]}, "`allocation` and a list `n`"),
    ({"effects": [0, 0.5, 1], "n": [10, 10]}, "`n` must have one entry per arm (3)"),
    ({"effects": [0, 0.5], "n": 10, "sds": [1.0]}, "`sds` must have one entry per arm (2)"),
    ({"effects": [0, 0.5], "n": 10, "sds": [1.0, -1.0]}, "`sds` must hold positive numbers"),
    ({"effects": [0, 0.5], "n": 10, "allocation": [1, 0.1]}, "`allocation` gives arm 1 only 1"),
    ({"effects": [0, "x"], "n": 10}, "`effects` must hold finite numbers"),
    ({"effects": [0, 0.5], "n": 1}, "`n` must be an integer >= 2"),
    ({"effects": [0, 0.5], "n": 10, "missing": {"type": "mar", "rate": 0.1}}, "`missing.on` = 'baseline'"),
])
def test_multi_arm_bad_input(kw, start):
    with pytest.raises(sp.ParameterError) as exc:
        MultiArm(**kw)
    assert str(exc.value).startswith(start), str(exc.value)


def test_engine_ancova_power_with_correlated_baseline():
    # ANCOVA power for a normal outcome with baseline correlation rho: noncentral t with df = 2n - 3 and
    # ncp = effect / (sd sqrt(1 - rho^2) sqrt(2 / n)) (Borm, Fransen & Lemmens 2007, J Clin Epidemiol
    # 60:1234-1238; it ignores the small chance imbalance at baseline, worth < 0.005 in power here)
    from simpower import registry

    if "ancova" not in registry.names("analysis"):
        pytest.skip("no ancova analysis registered")
    n, effect, rho = 40, 0.5, 0.6
    sc = sp.Scenario(TwoArm(n=n, effect=effect, baseline_corr=rho), analysis=build("analysis", {"type": "ancova"}))
    res = sp.run(sc, reps=4000, seed=16, n_jobs=1, progress=False)
    df = 2 * n - 3
    ncp = effect / (math.sqrt(1 - rho**2) * math.sqrt(2 / n))
    crit = stats.t.ppf(0.975, df)
    ref = stats.nct.sf(crit, df, ncp) + stats.nct.cdf(-crit, df, ncp)
    s = res.summaries["ancova"]
    assert abs(s["power"] - ref) <= Z * math.sqrt(ref * (1 - ref) / 4000) + 0.005, (s["power"], ref)
    est = res.records["ancova"].estimate
    assert abs(est.mean() - effect) <= Z * est.std() / math.sqrt(est.size)
