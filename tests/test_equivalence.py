"""TOST equivalence and non-inferiority t-tests."""

import math

import numpy as np
import pytest
from scipy import integrate, stats
from statsmodels.stats.weightstats import ttest_ind, ttost_ind, ttost_paired

import simpower as sp
from simpower.analyses.equivalence import TOST, NonInferiority
from simpower.errors import ParameterError


def draws(seed=0, n0=20, n1=26, effect=0.1, sd_ratio=1.5, reps=30):
    return sp.NormalTwoArm(n=n0, ratio=n1 / n0, effect=effect, sd_ratio=sd_ratio).draw_batch(
        np.random.default_rng(seed), reps)


def tost_power_exact(delta, n, low, high, sd=1.0, alpha=0.05):
    """Exact power of the pooled-variance TOST with n per arm (Phillips 1990, J Pharmacokinet Biopharm 18:137-144).

    Reject iff low + c se_hat < d_hat < high - c se_hat, with d_hat ~ N(delta, tau^2) independent of
    se_hat = tau sqrt(V / nu), V ~ chi2(nu); integrate the normal probability over V.
    """
    nu = 2 * n - 2
    tau = sd * math.sqrt(2 / n)
    c = stats.t.ppf(1 - alpha, nu)
    v_max = nu * ((high - low) / (2 * c * tau)) ** 2

    def inner(v):
        s = tau * math.sqrt(v / nu)
        return (stats.norm.cdf((high - c * s - delta) / tau) - stats.norm.cdf((low + c * s - delta) / tau)) \
            * stats.chi2.pdf(v, nu)

    return integrate.quad(inner, 0, v_max, limit=200)[0]


@pytest.mark.parametrize("equal_var", [True, False])
def test_tost_matches_statsmodels_per_replicate(equal_var):
    # reference: statsmodels.stats.weightstats.ttost_ind(arm 1, arm 0, low, high, usevar=...)
    b = draws()
    a = TOST(low=-0.4, high=0.6, equal_var=equal_var)
    for i in range(10):
        d = b.replicate(i)
        y0, y1 = d["y"][d["arm"] == 0], d["y"][d["arm"] == 1]
        ref = ttost_ind(y1, y0, -0.4, 0.6, usevar="pooled" if equal_var else "unequal")
        assert a(d).pvalue == pytest.approx(ref[0], rel=1e-10)


def test_tost_one_sample_matches_statsmodels():
    # one sample: ttost_paired against zeros is the one-sample TOST
    y = np.random.default_rng(1).normal(0.1, 1, size=25)
    ref = ttost_paired(y, np.zeros_like(y), -0.5, 0.5)[0]
    assert TOST(margin=0.5)({"y": y}).pvalue == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize("equal_var", [True, False])
def test_tost_and_non_inferiority_batch_equal_per_replicate(equal_var):
    b = draws(seed=2)
    for a in (TOST(margin=0.5, equal_var=equal_var), NonInferiority(margin=0.3, equal_var=equal_var),
              NonInferiority(margin=0.3, equal_var=equal_var, higher_is_better=False)):
        assert a.supports_batch(b)
        out = a.batch(b)
        per = [a(b.replicate(i)) for i in range(b.size)]
        for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
            np.testing.assert_allclose(out[f], [getattr(r, f) for r in per], rtol=1e-10, atol=1e-14, err_msg=f)


def test_tost_rejects_exactly_when_the_90_percent_ci_is_inside_the_range():
    # Schuirmann (1987): TOST at alpha rejects iff the (1 - 2 alpha) CI lies inside (low, high)
    b = draws(seed=3, n0=40, n1=40, sd_ratio=1.0, reps=400)
    out = TOST(margin=0.45).batch(b)
    inside = (out["ci_low"] > -0.45) & (out["ci_high"] < 0.45)
    np.testing.assert_array_equal(out["pvalue"] <= 0.05, inside)
    assert 0 < inside.sum() < inside.size


@pytest.mark.parametrize("effect", [0.0, 0.2, 0.5])
def test_tost_power_matches_exact_formula(effect):
    # simulated power of the pooled TOST vs the exact integral (Phillips 1990); at effect = margin the
    # rejection rate is the test's size at the boundary (<= alpha, Schuirmann 1987)
    n, margin, reps = 30, 0.5, 4000
    sc = sp.Scenario(sp.NormalTwoArm(n=n, effect=effect), TOST(margin=margin, equal_var=True))
    res = sp.run(sc, reps=reps, seed=21, n_jobs=1)
    exact = tost_power_exact(effect, n, -margin, margin)
    assert res.paths["tost"] == "batch"
    assert abs(res.power - exact) < 4 * math.sqrt(exact * (1 - exact) / reps)
    assert res.summaries["tost"]["analytic_power"] == pytest.approx(exact, rel=1e-7)
    if effect == margin:
        assert exact <= 0.05


@pytest.mark.parametrize("effect,n,low,high,sd", [(0.0, 30, -0.5, 0.5, 1.0), (0.5, 30, -0.5, 0.5, 1.0),
                                                  (0.2, 8, -0.6, 0.9, 1.3), (-0.3, 150, -0.3, 0.2, 0.8),
                                                  (15.0, 90, -15.0, 15.0, 40.0)])
def test_analytic_tost_power_equals_the_integral_over_the_variance(effect, n, low, high, sd):
    # analytic.tost_power (quadrature over log V) against the plain integral over V of Phillips (1990),
    # two implementations of the same exact probability
    got = sp.analytic.tost_power(effect, n, low=low, high=high, sd=sd, design="two-sample")
    assert got == pytest.approx(tost_power_exact(effect, n, low, high, sd=sd), rel=1e-7, abs=1e-12)


@pytest.mark.parametrize("design,ratio", [("one-sample", 1.0), ("two-sample", 2.0)])
def test_analytic_tost_with_an_unreachable_margin_is_the_one_sided_t_test(design, ratio):
    # With low far below, only H0: theta >= high can bind: the TOST is the one-sided t-test (Schuirmann
    # 1987), whose power is the noncentral t cdf P(T' < -t_{1-alpha, df}), nc = (effect - high) / tau
    # (scipy.stats.nct)
    n, high, sd, effect = 12, 0.4, 1.5, -0.2
    g, df = (1.0, n - 1) if design == "one-sample" else (1 + 1 / ratio, n + ratio * n - 2)
    tau = sd * math.sqrt(g / n)
    ref = stats.nct.cdf(-stats.t.ppf(0.95, df), df, (effect - high) / tau)
    got = sp.analytic.tost_power(effect, n, low=-1e6, high=high, sd=sd, design=design, ratio=ratio)
    assert got == pytest.approx(ref, rel=1e-7)


def test_analytic_tost_power_matches_direct_draws_of_the_two_statistics():
    # Schuirmann's (1987) definition drawn directly with numpy: d_hat ~ N(effect, tau^2) and
    # se_hat = tau sqrt(chi2_df / df) independent; reject iff (d_hat - low)/se_hat > c and
    # (d_hat - high)/se_hat < -c. 400,000 draws, tolerance 4 MCSE.
    rng = np.random.default_rng(77)
    n, low, high, draws = 10, -0.8, 0.8, 400_000
    df, tau = 2 * n - 2, math.sqrt(2 / n)
    c = stats.t.ppf(0.95, df)
    z, v = rng.standard_normal(draws), rng.chisquare(df, draws)
    for effect in (0.0, 0.3, high):
        d, se = effect + tau * z, tau * np.sqrt(v / df)
        sim = np.mean(((d - low) / se > c) & ((d - high) / se < -c))
        exact = sp.analytic.tost_power(effect, n, low=low, high=high, design="two-sample")
        assert abs(sim - exact) < 4 * math.sqrt(exact * (1 - exact) / draws)


def test_welch_tost_closed_form_against_simulation():
    # welch_tost_power is an approximation (Satterthwaite df from the population SDs); with 40 and 60 per
    # arm and SDs 1 and 2 it is within 4 MCSE of the simulated Welch TOST, at the margin and inside
    reps = 4000
    for effect in (0.6, 0.1):
        proc = sp.NormalTwoArm(n=40, ratio=1.5, effect=effect, sd_ratio=2.0)
        res = sp.run(sp.Scenario(proc, TOST(margin=0.6)), reps=reps, seed=5, n_jobs=1)
        approx = sp.analytic.welch_tost_power(effect, 40, low=-0.6, high=0.6, sd0=1.0, sd1=2.0, ratio=1.5)
        assert res.summaries["tost"]["analytic_power"] == pytest.approx(approx, rel=1e-9)
        assert abs(res.power - approx) < 4 * math.sqrt(approx * (1 - approx) / reps)


def test_analytic_tost_bad_input_names_the_field():
    with pytest.raises(ParameterError, match="`low` must be < `high`"):
        sp.analytic.tost_power(0.0, 20, low=0.5, high=0.5)
    with pytest.raises(ParameterError, match="`n`"):
        sp.analytic.tost_power(0.0, 1, low=-0.5, high=0.5)
    with pytest.raises(ParameterError, match="`sd1`"):
        sp.analytic.welch_tost_power(0.0, 20, low=-0.5, high=0.5, sd1=0.0)


def test_null_boundaries_are_the_margins():
    assert TOST(margin=0.5).null_boundary().value == 0.5
    assert TOST(low=-0.2, high=0.7).null_boundary().value == 0.7
    assert NonInferiority(margin=0.3).null_boundary().value == -0.3
    assert NonInferiority(margin=0.3, higher_is_better=False).null_boundary().value == 0.3


def test_tost_power_formula_against_normal_approximation():
    # sanity of the reference itself: for large n the exact power approaches the normal approximation
    # 1 - 2 Phi(z_{1-alpha} - margin / tau) at effect 0 (Chow, Shao & Wang 2008, sec. 3.2.3)
    n, margin = 400, 0.25
    tau = math.sqrt(2 / n)
    approx = 1 - 2 * stats.norm.cdf(stats.norm.ppf(0.95) - margin / tau)
    assert tost_power_exact(0.0, n, -margin, margin) == pytest.approx(approx, abs=0.005)


@pytest.mark.parametrize("equal_var", [True, False])
@pytest.mark.parametrize("higher_is_better", [True, False])
def test_non_inferiority_matches_statsmodels(equal_var, higher_is_better):
    # reference: statsmodels ttest_ind(arm 1, arm 0, value=-margin, alternative="larger") (or +margin, "smaller")
    b = draws(seed=4)
    a = NonInferiority(margin=0.3, equal_var=equal_var, higher_is_better=higher_is_better)
    value, alt = (-0.3, "larger") if higher_is_better else (0.3, "smaller")
    for i in range(10):
        d = b.replicate(i)
        y0, y1 = d["y"][d["arm"] == 0], d["y"][d["arm"] == 1]
        ref = ttest_ind(y1, y0, value=value, alternative=alt, usevar="pooled" if equal_var else "unequal")
        assert a(d).pvalue == pytest.approx(ref[1], rel=1e-10)


def test_non_inferiority_power_matches_noncentral_t_and_cross_check():
    # one-sided pooled t of H0: delta <= -margin: power = P(T' > t_{1-alpha, 2n-2}) with
    # nc = (delta + margin) / (sd sqrt(2/n)) (computed here from scipy.stats.nct)
    n, margin, effect, reps = 25, 0.4, 0.1, 4000
    sc = sp.Scenario(sp.NormalTwoArm(n=n, effect=effect), NonInferiority(margin=margin, equal_var=True))
    res = sp.run(sc, reps=reps, seed=8, n_jobs=1)
    df = 2 * n - 2
    power = stats.nct.sf(stats.t.ppf(0.95, df), df, (effect + margin) / math.sqrt(2 / n))
    assert abs(res.power - power) < 4 * math.sqrt(power * (1 - power) / reps)
    assert res.summaries["non_inferiority"]["analytic_power"] == pytest.approx(power, rel=1e-6)


def test_non_inferiority_type_one_error_at_the_margin():
    # at delta = -margin the one-sided t-test has size exactly alpha (normal data)
    reps = 4000
    sc = sp.Scenario(sp.NormalTwoArm(n=20, effect=-0.3, sd_ratio=2.0), NonInferiority(margin=0.3))
    res = sp.run(sc, reps=reps, seed=12, n_jobs=1)
    assert abs(res.power - 0.05) < 4 * math.sqrt(0.05 * 0.95 / reps)


def test_bad_parameters_name_the_field():
    with pytest.raises(ParameterError, match="margin"):
        TOST()
    with pytest.raises(ParameterError, match="margin"):
        TOST(margin=0.5, low=-1.0, high=1.0)
    with pytest.raises(ParameterError, match="low"):
        TOST(low=1.0, high=-1.0)
    with pytest.raises(ParameterError, match="margin"):
        NonInferiority(margin=-0.1)
    with pytest.raises(ParameterError, match="margin"):
        NonInferiority()
