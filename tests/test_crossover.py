"""The AB/BA crossover: process, layout, analyses, closed forms and simulation checks.

Sources named beside each check:

* the period-difference t-test (Senn 2002, *Cross-over Trials in Clinical Research*, 2nd ed.,
  ch. 3): Student's two-sample t on the period differences d = y2 - y1, estimate
  (mean d_AB - mean d_BA) / 2; checked against scipy.stats.ttest_ind, statsmodels OLS on d with
  a sequence indicator, and statsmodels OLS with subject fixed effects, period and treatment
  (the same estimate, SE and df on complete data: Jones & Kenward 2003, *Design and Analysis of
  Cross-Over Trials*, 2nd ed., ch. 2), and statsmodels MixedLM on complete data;
* its exact power: the noncentral t (Cohen 1988, ch. 2), here scipy.stats.nct computed directly;
* average bioequivalence (Schuirmann 1987): the TOST power integral (Phillips 1990), here by
  scipy.integrate.quad over the chi-square variable; required totals for ratio 0.95 against
  the tables of Diletti, Hauschke & Steinijans (1991, Int J Clin Pharmacol Ther Toxicol 29:1-8;
  values from memory); sigma_w = sqrt(log(1 + CV^2)) (common practice);
* a first-order carryover lambda biases the estimate by -lambda / 2 (Grizzle 1965, Biometrics
  21:467-480; Jones & Kenward 2003, ch. 2);
* simulation checks within 4 MCSE (Morris, White & Crowther 2019, Stat Med 38:2074-2102).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

import simpower as sp
from _helpers import nct_power
from simpower import analytic
from simpower.analyses.crossover import CrossoverMixed, CrossoverT, CrossoverTOST, fit_crossover_batch, periods
from simpower.errors import ParameterError
from simpower.processes.crossover import Crossover

ALPHA = 0.05


def draw(process, reps=40, seed=7):
    return process.draw_batch(np.random.default_rng(seed), reps)


# -- the process and its layout ----------------------------------------------------------------
def test_process_moments_match_the_model():
    # per-sequence mean of d = y2 - y1: pi + tau (AB), pi - tau + lambda (BA); Var d = 2 sd^2 (1 - corr)
    p = Crossover(n=50, ratio=1.0, effect=0.6, sd=2.0, corr=0.7, period_effect=0.3, carryover=0.4)
    b = draw(p, reps=400, seed=1)
    lay = b.layout("crossover")
    d = lay.y2 - lay.y1
    for s, expected in ((0, 0.3 + 0.6), (1, 0.3 - 0.6 + 0.4)):
        x = d[:, lay.sequence == s].ravel()
        assert abs(x.mean() - expected) < 4 * x.std() / math.sqrt(x.size)
    resid = np.concatenate([d[:, lay.sequence == s] - d[:, lay.sequence == s].mean() for s in (0, 1)], axis=1)
    var_d = 2 * 4.0 * 0.3
    # variance within 4 MCSE: Var(s^2) = 2 sigma^4 / df for normal data (common practice)
    assert abs(resid.var() - var_d) < 4 * var_d * math.sqrt(2 / resid.size)
    assert abs(np.corrcoef(lay.y1.ravel(), lay.y2.ravel())[0, 1] - 0.7) < 0.05  # shift terms are small


def test_log_scale_outcome_is_lognormal_with_the_within_subject_cv():
    # cv_within: sigma_w = sqrt(log(1 + cv^2)) (common practice), so Var(log y2 - log y1) = 2 sigma_w^2
    p = Crossover(n=200, scale="log", cv_within=0.3, corr=0.6, effect=0.9)
    b = draw(p, reps=50, seed=3)
    lay = b.layout("crossover")
    assert np.all(lay.y > 0)
    d = np.log(lay.y2) - np.log(lay.y1)
    ab = d[:, lay.sequence == 0]
    sw2 = math.log(1 + 0.3**2)
    assert abs(ab.var() - 2 * sw2) < 4 * 2 * sw2 * math.sqrt(2 / ab.size)
    assert abs(ab.mean() - math.log(0.9)) < 4 * ab.std() / math.sqrt(ab.size)
    # cv (the CV of one outcome, as the lognormal outcome's cv) is the other spelling
    q = Crossover(n=5, scale="log", cv=0.4, corr=0.6)
    assert q.sigma == pytest.approx(math.sqrt(math.log(1 + 0.16)))
    assert q.sd_within == pytest.approx(q.sigma * math.sqrt(0.4))


def test_dropout_hides_period_two_only():
    p = Crossover(n=100, effect=0.5, dropout=0.2)
    assert p.dropout_rate == 0.2 and "dropout_rate" in p.spec() and p.facts() == ()
    lay = draw(p, reps=50).layout("crossover")
    assert lay.missing and lay.seen1.all()
    share = 1 - lay.seen2.mean()
    assert abs(share - 0.2) < 4 * math.sqrt(0.2 * 0.8 / lay.seen2.size)


def test_layout_matches_the_replicate_tables():
    b = draw(Crossover(n=4, ratio=1.5, effect=0.5, dropout=0.3), reps=10)
    lay = b.layout("crossover")
    assert set(b.layouts()) >= {"table", "crossover"} and "two_arm" not in b.layouts()
    for i in range(b.size):
        y1, y2, seq = periods(b.replicate(i))
        np.testing.assert_array_equal(y1, lay.y1[i])
        np.testing.assert_array_equal(y2, lay.y2[i])
        np.testing.assert_array_equal(seq, lay.sequence)
        np.testing.assert_array_equal(np.isfinite(y1) & np.isfinite(y2), lay.both[i])
    # a table whose treatments do not follow the sequences has no crossover layout
    shared = dict(b.shared, treat=np.zeros_like(b.shared["treat"]))
    assert sp.Batch(b.size, b.per_rep, shared, b.info).layout("crossover") is None


@pytest.mark.parametrize("kw, field", [
    ({"scale": "log", "sd": 1.0, "cv": 0.2}, "sd"),
    ({"scale": "log"}, "cv"),
    ({"scale": "log", "cv": 0.2, "cv_within": 0.2}, "cv"),
    ({"cv": 0.2}, "cv"),
    ({"scale": "log", "cv": 0.2, "effect": 0.0}, "effect"),
    ({"scale": "log", "cv": 0.2, "carryover": -1.0}, "carryover"),
    ({"dropout": 1.0}, "dropout"),
    ({"corr": 1.0}, "corr"),
])
def test_bad_parameters_name_the_field(kw, field):
    with pytest.raises(ParameterError, match=f"^`{field}`") as e:
        Crossover(n=5, **kw)
    assert "\n" not in str(e.value)


# -- the period-difference t-test against scipy and statsmodels ---------------------------------
def test_crossover_t_equals_scipy_and_the_ols_on_differences_with_a_sequence_indicator():
    import statsmodels.api as sm

    b = draw(Crossover(n=9, ratio=1.4, effect=0.4, sd=1.3, period_effect=0.5, dropout=0.25), reps=8)
    a = CrossoverT()
    for i in range(b.size):
        res = a(b.replicate(i))
        y1, y2, seq = periods(b.replicate(i))
        d = y2 - y1
        ok = np.isfinite(d)
        X = sm.add_constant(seq[ok].astype(float))
        ols = sm.OLS(d[ok], X).fit()
        # d = a + b [BA]: b = mean d_BA - mean d_AB = -2 tau_hat (sign convention: B minus A)
        assert res.estimate == pytest.approx(-ols.params[1] / 2, rel=1e-10)
        assert res.se == pytest.approx(ols.bse[1] / 2, rel=1e-10)
        assert res.pvalue == pytest.approx(ols.pvalues[1], rel=1e-9)
        assert res.df == ols.df_resid


def test_crossover_t_equals_the_fixed_subject_model_and_mixedlm_on_complete_data():
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    b = draw(Crossover(n=8, ratio=1.25, effect=0.7, corr=0.6, period_effect=-0.3), reps=5, seed=11)
    a = CrossoverT()
    for i in range(b.size):
        data = b.replicate(i)
        res = a(data)
        frame = pd.DataFrame(data)
        fe = smf.ols("y ~ C(subject) + C(period) + treat", frame).fit()
        # Jones & Kenward (2003), ch. 2: the within-subject analysis is the period-difference t-test
        assert res.estimate == pytest.approx(fe.params["treat"], rel=1e-9)
        assert res.se == pytest.approx(fe.bse["treat"], rel=1e-9)
        assert res.pvalue == pytest.approx(fe.pvalues["treat"], rel=1e-8)
        assert res.df == fe.df_resid
        y1, y2, seq = periods(data)
        X = np.concatenate([np.stack([np.ones_like(y1), 0 * y1, seq], 1), np.stack([np.ones_like(y1), 1 + 0 * y1,
                                                                                      1 - seq], 1)])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mixed = sm.MixedLM(np.concatenate([y1, y2]), X, groups=np.tile(np.arange(y1.size), 2)).fit(
                reml=True, method="bfgs", gtol=1e-10)
        # complete data: the GLS treatment estimate does not depend on the variances; with a positive
        # between-subject variance REML's sigma_e^2 is the within-subject mean square
        assert float(np.asarray(mixed.cov_re)[0, 0]) > 0
        assert np.asarray(mixed.fe_params)[2] == pytest.approx(res.estimate, rel=1e-7)
        se_model = math.sqrt(mixed.scale / 2 * (1 / 8 + 1 / 10))
        assert se_model == pytest.approx(res.se, rel=1e-6)
        # and crossover_mixed reproduces the t-test there, df included (between-within: n - 2)
        m = CrossoverMixed(df="between-within")(data)
        assert m.estimate == pytest.approx(res.estimate, rel=1e-7)
        assert m.se == pytest.approx(res.se, rel=1e-6) and m.df == res.df


def test_tost_is_the_90_percent_interval_inside_the_range():
    # Schuirmann (1987): both one-sided tests at 0.05 reject <=> the 90% CI lies inside (low, high)
    p = Crossover(n=10, scale="log", cv_within=0.25, effect=0.97, dropout=0.1)
    b = draw(p, reps=200, seed=5)
    tost, t90 = CrossoverTOST(scale="log"), CrossoverT(scale="log", ci_level=0.90)
    res, ci = tost.batch(b), t90.batch(b)
    inside = (ci.ci_low > 0.80) & (ci.ci_high < 1.25)
    assert np.array_equal(res.pvalue <= 0.05, inside) and 0 < inside.sum() < b.size
    for i in range(5):
        data = b.replicate(i)
        d = dict(data, y=np.log(data["y"]))
        y1, y2, seq = periods(d)
        diff = y2 - y1
        dab, dba = diff[(seq == 0) & np.isfinite(diff)], diff[(seq == 1) & np.isfinite(diff)]
        p_lo = stats.ttest_ind(dab / 2 - math.log(0.8), dba / 2, alternative="greater").pvalue
        p_hi = stats.ttest_ind(dab / 2 - math.log(1.25), dba / 2, alternative="less").pvalue
        assert tost(data).pvalue == pytest.approx(max(p_lo, p_hi), rel=1e-9)


def test_analyses_refuse_bad_parameters_in_one_line():
    with pytest.raises(ParameterError, match="^`margin` is for scale = 'additive'"):
        CrossoverTOST(scale="log", margin=0.2)
    with pytest.raises(ParameterError, match="^`margin` is required"):
        CrossoverTOST()
    with pytest.raises(ParameterError, match="^`low` must be < `high`"):
        CrossoverTOST(scale="log", low=1.25, high=0.8)


@pytest.mark.parametrize("process", [
    Crossover(n=6, ratio=1.5, effect=0.5, dropout=0.4),
    Crossover(n=3, effect=0.5, dropout=0.5),                    # some replicates lack complete subjects
    Crossover(n=6, scale="log", cv=0.5, effect=1.2, dropout=0.3),
])
@pytest.mark.parametrize("analysis", [CrossoverT(), CrossoverTOST(margin=0.4), CrossoverT(alternative="greater")])
def test_batch_equals_per_replicate_path(process, analysis):
    if process.scale == "log":
        analysis = analysis.replace(**({"scale": "log"} if not isinstance(analysis, CrossoverTOST)
                                       else {"scale": "log", "margin": None}))
    b = draw(process, reps=60, seed=2)
    res = analysis.batch(b)
    for i in range(b.size):
        try:
            ref = analysis(b.replicate(i))
        except ValueError:
            assert res.trouble["error:ValueError"][i]
            continue
        for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
            assert getattr(res, f)[i] == pytest.approx(getattr(ref, f), rel=1e-9, abs=1e-13), f


# -- the mixed model ---------------------------------------------------------------------------
@pytest.mark.slow
def test_mixed_batch_reaches_the_statsmodels_reml_optimum():
    # statsmodels MixedLM, REML, tight gradient tolerance (per-replicate path): estimates within
    # 1e-6 relative and the same decisions, with subjects seen in period 1 only
    import statsmodels.api as sm

    p = Crossover(n=10, ratio=1.2, effect=0.6, corr=0.5, dropout=0.3)
    b = draw(p, reps=30, seed=9)
    fit = fit_crossover_batch(b.layout("crossover"), "additive")
    res = CrossoverMixed().batch(b)
    ref = [CrossoverMixed()(b.replicate(i)) for i in range(b.size)]
    np.testing.assert_allclose(res.estimate, [r.estimate for r in ref], rtol=1e-6)
    np.testing.assert_allclose(res.se, [r.se for r in ref], rtol=1e-6)
    assert np.array_equal(res.pvalue <= ALPHA, np.array([r.pvalue for r in ref]) <= ALPHA)
    # the variance components too (statsmodels' own estimates)
    for i in range(3):
        y1, y2, seq = periods(b.replicate(i))
        X = np.concatenate([np.stack([np.ones_like(y1), 0 * y1, seq], 1),
                            np.stack([np.ones_like(y1), 1 + 0 * y1, 1 - seq], 1)])
        y, g = np.concatenate([y1, y2]), np.tile(np.arange(y1.size), 2)
        k = np.isfinite(y)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            m = sm.MixedLM(y[k], X[k], groups=g[k]).fit(reml=True, method="bfgs", gtol=1e-10)
        assert fit["sigma_e2"][i] == pytest.approx(m.scale, rel=1e-6)
        assert fit["sigma_b2"][i] == pytest.approx(float(np.asarray(m.cov_re)[0, 0]), rel=1e-5)


def test_mixed_uses_the_incomplete_subjects():
    # with dropout, subjects seen only in period 1 carry between-subject information: the mixed
    # estimate differs from the complete-case t-test (which ignores them) on the same data
    b = draw(Crossover(n=10, effect=0.6, corr=0.3, dropout=0.4), reps=20, seed=4)
    t, m = CrossoverT().batch(b), CrossoverMixed().batch(b)
    assert not np.allclose(t.estimate, m.estimate, rtol=1e-6)
    # and on complete data it reproduces the t-test's estimate (no variance dependence)
    c = draw(Crossover(n=10, effect=0.6, corr=0.3), reps=20, seed=4)
    np.testing.assert_allclose(CrossoverMixed().batch(c).estimate, CrossoverT().batch(c).estimate, rtol=1e-9)


# -- closed forms ------------------------------------------------------------------------------


@pytest.mark.parametrize("effect, n, sdw, ratio, alternative", [
    (1.0, 12, 1.0, 1.0, "two-sided"), (0.4, 20, 0.8, 1.5, "greater"), (-0.3, 30, 0.5, 0.8, "less"),
    (0.2, 5, 1.0, 1.0, "two-sided"),
])
def test_crossover_power_is_the_noncentral_t(effect, n, sdw, ratio, alternative):
    n2 = ratio * n
    ncp = effect / (sdw * math.sqrt((1 / n + 1 / n2) / 2))
    ref = nct_power(ncp, n + n2 - 2, ALPHA, alternative)
    got = analytic.crossover_power(effect, n, sd_within=sdw, ratio=ratio, alternative=alternative)
    assert got == pytest.approx(ref, rel=1e-8)
    n_req = analytic.crossover_n(effect, got, sd_within=sdw, ratio=ratio, alternative=alternative)
    assert n_req == pytest.approx(n, rel=1e-8)
    total = analytic.crossover_n(effect, got, sd_within=sdw, ratio=ratio, alternative=alternative, total=True)
    assert total == pytest.approx(n + n2, rel=1e-8)


def be_power_by_quadrature(gmr, n_per_seq, cv, low=0.8, high=1.25, alpha=0.05):
    """Phillips (1990): P(log low + c se < d < log high - c se), d ~ N(log gmr, tau^2), se = tau sqrt(V/df).

    Integrated directly over V ~ chi2(df) with scipy (tau^2 = sigma_w^2 / 2 * 2 / n, df = 2n - 2).
    """
    sw = math.sqrt(math.log(1 + cv**2))
    tau = sw * math.sqrt(1 / n_per_seq)
    df = 2 * n_per_seq - 2
    c = stats.t.ppf(1 - alpha, df)
    lo, hi, e = math.log(low), math.log(high), math.log(gmr)

    def f(v):
        s = math.sqrt(v / df)
        return max(stats.norm.cdf((hi - e) / tau - c * s) - stats.norm.cdf((lo - e) / tau + c * s), 0.0) \
            * stats.chi2.pdf(v, df)

    v_max = df * ((hi - lo) / (2 * c * tau)) ** 2
    return integrate.quad(f, 0, v_max, limit=200, epsabs=1e-12, epsrel=1e-10)[0]


# Diletti, Hauschke & Steinijans (1991), 2x2 crossover, 0.80-1.25, alpha 0.05, ratio 0.95: total
# subjects (values from memory)
BE_TABLE = [(0.20, 0.80, 20), (0.20, 0.90, 26), (0.30, 0.80, 40), (0.30, 0.90, 52)]


@pytest.mark.parametrize("cv, power, total", BE_TABLE)
def test_bioequivalence_sizes_match_the_published_table_and_the_integral(cv, power, total):
    n = analytic.crossover_tost_n(0.95, power, cv_within=cv)
    assert 2 * analytic.ceil_n(n) == total
    # the tabled total reaches the power, two fewer do not (exact integral, computed independently)
    assert be_power_by_quadrature(0.95, total // 2, cv) >= power > be_power_by_quadrature(0.95, total // 2 - 1, cv)
    assert analytic.crossover_tost_power(0.95, total // 2, cv_within=cv) == pytest.approx(
        be_power_by_quadrature(0.95, total // 2, cv), rel=1e-7)
    assert analytic.crossover_tost_power(0.95, n, cv_within=cv) == pytest.approx(power, rel=1e-9)
    assert analytic.crossover_tost_n(0.95, power, cv_within=cv, total=True) == pytest.approx(2 * n)


def test_bioequivalence_refuses_a_ratio_outside_the_range():
    with pytest.raises(ParameterError, match="^`gmr` must lie inside"):
        analytic.crossover_tost_n(1.3, 0.8, cv_within=0.2)
    with pytest.raises(ParameterError, match="^`low` must be < `high`"):
        analytic.crossover_tost_power(0.95, 10, cv_within=0.2, low=1.25, high=0.8)


# -- simulation checks (within 4 MCSE) -------------------------------------------------------
def _run(process, analyses, reps, seed):
    return sp.run(sp.Scenario(process, analyses=analyses), reps=reps, seed=seed, n_jobs=1)


def test_simulated_power_of_crossover_t_matches_the_noncentral_t():
    p = Crossover(n=9, ratio=4 / 3, effect=0.5, sd=1.0, corr=0.5, period_effect=0.4)
    res = _run(p, [CrossoverT()], reps=6000, seed=11)
    s = res.summaries["crossover_t"]
    exact = nct_power(0.5 / (math.sqrt(0.5) * math.sqrt((1 / 9 + 1 / 12) / 2)), 19, ALPHA, "two-sided")
    assert s["analytic_power"] == pytest.approx(exact, rel=1e-8)
    assert abs(s["power"] - exact) < 4 * s["mcse"]
    assert res.paths["crossover_t"] == "batch"


def test_type_one_error_of_the_be_tost_at_the_margin():
    # the true ratio on the upper margin 1.25: the rejection rate is the TOST's exact size there (<= alpha)
    p = Crossover(n=8, scale="log", cv_within=0.2, effect=1.25)
    res = _run(p, [CrossoverTOST(scale="log")], reps=8000, seed=12)
    s = res.summaries["crossover_tost"]
    exact = be_power_by_quadrature(1.25, 8, 0.2)
    assert exact < ALPHA and s["analytic_power"] == pytest.approx(exact, rel=1e-6)
    assert abs(s["power"] - exact) < 4 * s["mcse"]


def test_carryover_biases_the_estimate_by_half_of_it():
    # Grizzle (1965); Jones & Kenward (2003), ch. 2: E tau_hat = tau - lambda / 2
    tau, lam = 0.5, 0.8
    p = Crossover(n=12, effect=tau, corr=0.5, carryover=lam, period_effect=0.3)
    res = _run(p, [CrossoverT()], reps=4000, seed=13)
    s = res.summaries["crossover_t"]
    assert abs(s["mean_estimate"] - (tau - lam / 2)) < 4 * s["mean_estimate_mcse"]
    assert s["bias"] == pytest.approx(s["mean_estimate"] - tau)
    # the closed form under carryover uses the shifted mean, and the simulation agrees with it
    assert abs(s["power"] - s["analytic_power"]) < 4 * s["mcse"]
    assert s["analytic_power"] == pytest.approx(analytic.crossover_power(tau - lam / 2, 12, sd_within=math.sqrt(0.5)))


def test_bundled_scenario_loads_and_runs():
    from pathlib import Path

    path = Path(__file__).parent.parent / "scenarios" / "crossover_bioequivalence.toml"
    res = sp.run(str(path), reps=200, seed=1, n_jobs=1)
    assert set(res.paths.values()) == {"batch"}
    assert 0.5 < res.summaries["bioequivalence"]["power"] <= 1.0
