"""Several arms against a shared control: Dunnett's many-to-one test and the one-way ANOVA F test.

External references: ``scipy.stats.dunnett`` and ``scipy.stats.multivariate_t`` /
``multivariate_normal`` (critical values, p-values), Student's t (Dunnett with one
treatment arm is the pooled two-sample t-test), ``scipy.stats.nct`` (per-comparison
power), ``statsmodels.stats.power.FTestAnovaPower`` and ``scipy.stats.f_oneway``
(ANOVA), Dunnett's published tables (from memory), and simulation within 4 MCSE.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower import analytic
from simpower.errors import ParameterError

# scipy.stats.dunnett evaluates the multivariate t CDF by randomised QMC with its default
# budget: its p-values scatter with an SD of about 7e-5 (measured over 20 seeds on a three-arm
# example); 1e-3 is > 10 such SDs. With maxpts = 2e5 its scatter is about 1e-6 (measured), so
# MVT_ATOL = 2e-5 leaves room for both errors.
SCIPY_DUNNETT_ATOL = 1e-3
MVT_ATOL = 2e-5


def _groups(rng, sizes, shifts):
    return [rng.normal(loc=s, size=n) for n, s in zip(sizes, shifts)]


def _mvt_box(rho, df, lo, hi):
    """P(lo < T < hi) from scipy's multivariate t (normal when df is None), with a large budget."""
    if df is None:
        return stats.multivariate_normal(cov=rho).cdf(hi, lower_limit=lo, rng=np.random.default_rng(0))
    return stats.multivariate_t(shape=rho, df=df, seed=0).cdf(hi, lower_limit=lo, maxpts=200_000)


# -- the analytic core ---------------------------------------------------------------------------
@pytest.mark.parametrize("sizes, df", [([10, 10, 10], 27), ([20, 10, 15, 5], 46), ([30, 12, 60], None),
                                       ([6, 6, 6, 6, 6], 3)])
def test_box_probability_against_scipy_multivariate_t(sizes, df):
    # the one-factor quadrature against scipy's multivariate t / normal CDF with the many-to-one
    # correlation rho_ij = lambda_i lambda_j (Dunnett 1955, p. 1103; scipy's _params_dunnett)
    rho = analytic.many_to_one_corr(sizes)
    lam = analytic.many_to_one_lambdas(sizes)
    k = len(sizes) - 1
    rng = np.random.default_rng(1)
    for _ in range(2):
        hi = rng.uniform(0.2, 3.0, k)
        lo = -rng.uniform(0.2, 3.0, k)
        got = analytic.box_probability(lo[None], hi[None], lam, df)[0]
        assert got == pytest.approx(_mvt_box(rho, df, lo, hi), abs=MVT_ATOL)


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize("allocation, df", [(None, 24), ([2, 1, 1], 30), ([1, 2, 1, 3], None)])
def test_critical_value_has_familywise_error_alpha(alternative, allocation, df):
    # at the critical value, scipy's multivariate t gives P(some comparison beyond it) = alpha under H0
    k = 2 if allocation is None else len(allocation) - 1
    sizes = np.ones(k + 1) if allocation is None else np.asarray(allocation, float)
    c = analytic.dunnett_critical(k, df, 0.05, alternative, allocation)
    rho = analytic.many_to_one_corr(sizes)
    inf = np.full(k, np.inf)
    lo, hi = {"two-sided": (-abs(c) * np.ones(k), abs(c) * np.ones(k)), "greater": (-inf, c * np.ones(k)),
              "less": (c * np.ones(k), inf)}[alternative]
    assert 1 - _mvt_box(rho, df, lo, hi) == pytest.approx(0.05, abs=MVT_ATOL)
    assert (c < 0) == (alternative == "less")


def test_critical_values_against_student_t_and_dunnett_tables():
    # one treatment arm: Dunnett's critical value is Student's t quantile (df = N - 2)
    assert analytic.dunnett_critical(1, 18, 0.05) == pytest.approx(stats.t.ppf(0.975, 18), abs=1e-8)
    assert analytic.dunnett_critical(1, 18, 0.05, "greater") == pytest.approx(stats.t.ppf(0.95, 18), abs=1e-8)
    assert analytic.dunnett_critical(1, None, 0.05) == pytest.approx(1.959964, abs=1e-6)
    # Dunnett (1955, Table 1a, one-sided 0.05) and Dunnett (1964, Biometrics 20:482-491, two-sided
    # 0.05), equal arms, from memory: k = 2, df = 20: 2.03 and 2.38; k = 4, df = 20: 2.30 and 2.65
    assert round(analytic.dunnett_critical(2, 20, 0.05, "greater"), 2) == 2.03
    assert round(analytic.dunnett_critical(2, 20, 0.05), 2) == 2.38
    assert round(analytic.dunnett_critical(4, 20, 0.05, "greater"), 2) == 2.30
    assert round(analytic.dunnett_critical(4, 20, 0.05), 2) == 2.65


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize("sizes", [[12, 12, 12, 12], [20, 8, 14, 30]])
def test_pvalues_against_scipy_dunnett(alternative, sizes):
    rng = np.random.default_rng(7)
    for rep in range(3):
        groups = _groups(rng, sizes, [0.0, 0.2, -0.3, 0.6 * rep])
        data = {"y": np.concatenate(groups), "arm": np.repeat(np.arange(len(sizes)), sizes)}
        ours = sp.Dunnett(alternative=alternative)(data)
        ref = stats.dunnett(*groups[1:], control=groups[0], alternative=alternative, rng=np.random.default_rng(0))
        assert ours.statistic == pytest.approx(ref.statistic[0], rel=1e-10)
        np.testing.assert_allclose(ours.pvalues, ref.pvalue, atol=SCIPY_DUNNETT_ATOL)
        if rep:
            continue
        # and tightly against the CDF scipy's dunnett evaluates, with a larger budget (first data set)
        t = ref.statistic
        rho, df, k = ref._rho, ref._df, len(t)
        for j in range(k):
            if alternative == "two-sided":
                lo, hi = -abs(t[j]) * np.ones(k), abs(t[j]) * np.ones(k)
            elif alternative == "greater":
                lo, hi = np.full(k, -np.inf), t[j] * np.ones(k)
            else:
                lo, hi = t[j] * np.ones(k), np.full(k, np.inf)
            assert ours.pvalues[j] == pytest.approx(1 - _mvt_box(rho, df, lo, hi), abs=MVT_ATOL)
        assert ours.pvalue == min(ours.pvalues)
        assert ours.names == ("1-0", "2-0", "3-0")


def test_one_treatment_arm_is_the_pooled_t_test():
    # k = 1: Dunnett's test is Student's two-sample t-test (scipy.stats.ttest_ind)
    rng = np.random.default_rng(3)
    y0, y1 = rng.normal(size=11), rng.normal(0.7, size=15)
    data = {"y": np.concatenate([y0, y1]), "arm": np.repeat([0, 1], [11, 15])}
    for alt in ("two-sided", "greater", "less"):
        ref = stats.ttest_ind(y1, y0, alternative=alt)
        assert sp.Dunnett(alternative=alt)(data).pvalue == pytest.approx(ref.pvalue, rel=1e-7, abs=1e-10)


@pytest.mark.parametrize("alternative", ["two-sided", "greater"])
def test_per_comparison_power_is_noncentral_t(alternative):
    effects, n, alloc = [0.4, 0.7, 0.0], 20, [2, 1, 1, 1]
    res = analytic.dunnett_power(effects, n, sd=1.3, alpha=0.05, alternative=alternative, allocation=alloc)
    sizes = n * np.array(alloc) / alloc[0]
    df = sizes.sum() - 4
    assert res["df"] == df
    nc = np.array(effects) / (1.3 * np.sqrt(1 / sizes[1:] + 1 / sizes[0]))
    c = res["critical"]
    ref = stats.nct.sf(c, df, nc) + (stats.nct.cdf(-c, df, nc) if alternative == "two-sided" else 0.0)
    np.testing.assert_allclose(res["per_comparison"], ref, atol=1e-8)
    assert res["all"] < min(res["per_comparison"]) <= max(res["per_comparison"]) < res["any"]


def test_power_under_the_global_null_is_alpha():
    res = analytic.dunnett_power([0.0, 0.0, 0.0], 15, alpha=0.05)
    assert res["any"] == pytest.approx(0.05, abs=1e-8)


def test_bad_analytic_input_names_the_field():
    with pytest.raises(ParameterError, match="`allocation`"):
        analytic.dunnett_critical(2, 10, 0.05, allocation=[1, 1])
    with pytest.raises(ParameterError, match="`alternative`"):
        analytic.dunnett_critical(2, 10, 0.05, alternative="both")
    with pytest.raises(ParameterError, match="`sd`"):
        analytic.dunnett_power([0.5, 0.5], 10, sd=-1.0)


# -- ANOVA --------------------------------------------------------------------------------------
@pytest.mark.parametrize("f, n, k", [(0.25, 20, 3), (0.1, 100, 4), (0.4, 8, 5)])
def test_anova_power_against_statsmodels(f, n, k):
    from statsmodels.stats.power import FTestAnovaPower

    ref = FTestAnovaPower()
    assert analytic.anova_power(f, n, k) == pytest.approx(ref.power(f, n * k, 0.05, k), rel=1e-9)
    n_req = analytic.anova_n(f, 0.8, k)
    assert n_req * k == pytest.approx(ref.solve_power(f, nobs=None, alpha=0.05, power=0.8, k_groups=k), rel=1e-6)
    assert analytic.anova_effect(n, 0.8, k) == pytest.approx(
        ref.solve_power(None, nobs=n * k, alpha=0.05, power=0.8, k_groups=k), rel=1e-6)


def test_cohen_f_of_equal_arms():
    # Cohen (1988, eq. 8.2.1 and 8.2.2): sigma_m is the SD of the arm means; three means -d/2, 0,
    # d/2 (his pattern 2 for k = 3) give f = d sqrt(1/6)
    assert analytic.cohen_f([-0.25, 0.0, 0.25], sd=1.0) == pytest.approx(0.5 * math.sqrt(1 / 6), rel=1e-12)


def test_anova_f_against_scipy_f_oneway():
    p = sp.MultiArm(effects=[0, 0.3, 0.5, 0.1], n=9, allocation=[1, 2, 1, 1])
    b = p.draw_batch(np.random.default_rng(2), 6)
    res = sp.AnovaF().batch(b)
    for i in range(6):
        d = b.replicate(i)
        ref = stats.f_oneway(*[d["y"][d["arm"] == j] for j in range(4)])
        assert res.pvalue[i] == pytest.approx(ref.pvalue, rel=1e-9)


# -- simulation against the exact power ------------------------------------------------------------
def _within(sim, mcse, exact):
    return abs(sim - exact) < 4 * max(mcse, 1e-12)


@pytest.mark.parametrize("alternative, allocation", [("two-sided", None), ("greater", [2, 1, 1])])
def test_simulated_dunnett_power_matches_the_exact_power(alternative, allocation):
    proc = sp.MultiArm(effects=[0, 0.5, 0.8], n=20, allocation=allocation, sds=[2.0, 2.0, 2.0])
    analysis = sp.Dunnett(alternative=alternative)
    res = sp.run(sp.Scenario(proc, analyses={"dunnett": analysis}), reps=2000, seed=11, n_jobs=1)
    assert res.paths["dunnett"] == "batch"
    exact = analysis.power_parts(proc, 0.05)
    ph = res.summaries["dunnett"]["per_hypothesis"]
    assert _within(ph["any"]["power"], ph["any"]["mcse"], exact["any"])
    assert _within(ph["all"]["power"], ph["all"]["mcse"], exact["all"])
    for j, label in enumerate(("1-0", "2-0")):
        assert _within(ph[label]["power"], ph[label]["mcse"], exact["per_comparison"][j])
    assert res.summaries["dunnett"]["analytic_power"] == pytest.approx(exact["any"])
    assert _within(res.power, res.summaries["dunnett"]["mcse"], exact["any"])


def test_simulated_anova_power_and_type_i_error():
    proc = sp.MultiArm(effects=[0, 0.3, 0.6], n=15)
    res = sp.run(sp.Scenario(proc, analyses={"f": sp.AnovaF()}), reps=2000, seed=12, n_jobs=1)
    s = res.summaries["f"]
    assert s["analytic_power"] is not None
    assert _within(s["power"], s["mcse"], s["analytic_power"])
    null = sp.run(sp.Scenario(proc.null(), analyses={"f": sp.AnovaF(), "dunnett": sp.Dunnett()}), reps=2000, seed=13,
                  n_jobs=1)
    for name in ("f", "dunnett"):
        assert _within(null.summaries[name]["power"], math.sqrt(0.05 * 0.95 / 2000), 0.05)


def test_no_closed_form_without_a_common_sd_or_with_missing_outcomes():
    unequal = sp.MultiArm(effects=[0, 0.3, 0.6], n=15, sds=[1.0, 1.5, 1.0])
    missing = sp.MultiArm(effects=[0, 0.3, 0.6], n=15, missing=sp.MCAR(rate=0.1))
    for proc in (unequal, missing):
        assert sp.Dunnett().analytic_power(proc, 0.05) is None
        assert sp.AnovaF().analytic_power(proc, 0.05) is None


def test_missing_outcomes_take_the_batch_path_and_match_scipy_on_the_observed_values():
    proc = sp.MultiArm(effects=[0, 0.3, 0.6], n=10, missing=sp.MCAR(rate=0.2))
    b = proc.draw_batch(np.random.default_rng(4), 3)
    assert sp.Dunnett().supports_batch(b) and sp.AnovaF().supports_batch(b)
    d = b.replicate(0)
    ok = np.isfinite(d["y"])
    groups = [d["y"][ok & (d["arm"] == j)] for j in range(3)]
    ref = stats.dunnett(*groups[1:], control=groups[0], rng=np.random.default_rng(0))
    np.testing.assert_allclose(sp.Dunnett()(d).pvalues, ref.pvalue, atol=SCIPY_DUNNETT_ATOL)
    np.testing.assert_allclose(sp.Dunnett().batch(b).pvalues[0], ref.pvalue, atol=SCIPY_DUNNETT_ATOL)


def test_a_table_without_control_is_an_error():
    data = {"y": np.arange(6.0), "arm": np.array([1, 1, 1, 2, 2, 2])}
    with pytest.raises(ValueError, match="arm 0"):
        sp.Dunnett()(data)
    with pytest.raises(ValueError, match="arm"):
        sp.AnovaF()({"y": np.arange(6.0)})


@pytest.mark.parametrize("spec", [{"type": "dunnett"}, {"type": "dunnett", "alternative": "greater"},
                                  {"type": "anova_f"}])
def test_missing_outcomes_keep_the_batch_path_and_equal_the_per_replicate_path(spec):
    """Complete cases per replicate, arm sizes differing between replicates; the reference on each replicate is
    the per-replicate path: scipy.stats.f_oneway, and Dunnett's p-values by the same quadrature (which the
    tests above check against scipy.stats.dunnett). Small arms and 30% missing: some arms end up empty."""
    from simpower.analyses.base import as_batch_result

    from simpower.registry import build

    proc = build("process", {"type": "multi_arm", "effects": [0.0, 0.3, 0.6], "n": [6, 4, 5],
                             "missing": {"type": "mcar", "rate": 0.3}})
    an = build("analysis", spec)
    sc = sp.Scenario(proc, an)
    assert sp.run(sc, reps=50, seed=1, n_jobs=1, progress=False).paths[sc.primary] == "batch"
    batch = proc.draw_batch(np.random.default_rng(11), 400)
    res = as_batch_result(an.batch(batch))
    failed = 0
    for i in range(batch.size):
        try:
            want = an(batch.replicate(i))
        except ValueError:
            failed += 1
            assert np.isnan(res.pvalue[i]) and res.trouble and any(m[i] for m in res.trouble.values())
            continue
        assert math.isclose(res.pvalue[i], want.pvalue, rel_tol=1e-10, abs_tol=1e-14)
        if want.pvalues is not None:
            np.testing.assert_allclose(res.pvalues[i], want.pvalues, rtol=1e-10, atol=1e-14)
            assert math.isclose(res.estimate[i], want.estimate, rel_tol=1e-12)
        else:
            y, arm = batch.replicate(i)["y"], batch.replicate(i)["arm"]
            groups = [y[(arm == j) & np.isfinite(y)] for j in range(3)]
            assert math.isclose(res.pvalue[i], stats.f_oneway(*groups).pvalue, rel_tol=1e-10)
    assert 0 < failed < 40   # empty arms happened, and were handed to the per-replicate path
