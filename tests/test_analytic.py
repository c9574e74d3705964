"""External checks of simpower.analytic: reference libraries, published tables, formulas.

Each check names its source beside it. "common practice" marks a fact of the
trade with no single source; "value from memory" marks a figure recalled rather
than looked up. Reference computations written here from scipy.stats are
independent re-derivations of the published formula, not calls into simpower.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import stats

from simpower.analytic import (
    ancova_effect,
    ancova_n,
    ancova_power,
    ceil_n,
    clusters_per_arm,
    design_effect,
    inflate_for_dropout,
    prop2_effect,
    prop2_n,
    prop2_power,
    schoenfeld_events,
    schoenfeld_power,
    t_effect,
    t_n,
    t_power,
    welch_df,
    welch_effect,
    welch_n,
    welch_power,
    z_critical,
    z_effect,
    z_n,
    z_power,
)
from simpower.errors import ParameterError

sm_power = pytest.importorskip("statsmodels.stats.power")
sm_prop = pytest.importorskip("statsmodels.stats.proportion")

SM_ALT = {"two-sided": "two-sided", "greater": "larger", "less": "smaller"}


def _sm(fun, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fun(*args, **kwargs)


# --------------------------------------------------------------------------- t-tests
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize("n, ratio, d, alpha", [(64, 1.0, 0.5, 0.05), (40, 1.7, 0.35, 0.05),
                                                (12, 0.5, 0.9, 0.01), (250, 3.0, 0.15, 0.10)])
def test_t_two_sample_power_matches_statsmodels(alternative, n, ratio, d, alpha):
    # Reference: statsmodels.stats.power.TTestIndPower (noncentral t, pooled SD, both tails).
    e = -d if alternative == "less" else d
    ref = _sm(sm_power.TTestIndPower().power, e, n, alpha, ratio=ratio, alternative=SM_ALT[alternative])
    got = t_power(e, n, alpha=alpha, alternative=alternative, design="two-sample", ratio=ratio)
    assert got == pytest.approx(ref, rel=1e-10, abs=1e-13)


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize("design", ["one-sample", "paired"])
def test_t_one_sample_power_matches_statsmodels(alternative, design):
    # Reference: statsmodels.stats.power.TTestPower (one-sample / paired differences).
    for d, n, alpha in [(0.3, 30, 0.01), (0.6, 9, 0.05), (0.1, 500, 0.05)]:
        e = -d if alternative == "less" else d
        ref = _sm(sm_power.TTestPower().power, e, n, alpha, alternative=SM_ALT[alternative])
        got = t_power(e, n, alpha=alpha, alternative=alternative, design=design)
        assert got == pytest.approx(ref, rel=1e-10, abs=1e-13)


def test_t_power_matches_noncentral_t_directly():
    # Reference: scipy.stats.nct with df = n + ratio*n - 2 and nc = d / sqrt(1/n + 1/(ratio n)).
    n, ratio, d, alpha = 30.0, 1.5, 0.6, 0.05
    df = n + ratio * n - 2
    nc = d / math.sqrt(1 / n + 1 / (ratio * n))
    crit = stats.t.ppf(1 - alpha / 2, df)
    ref = stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)
    assert t_power(d, n, design="two-sample", ratio=ratio) == pytest.approx(ref, rel=1e-12)
    # paired: df = pairs - 1, sd = SD of the differences
    sd_diff, effect, pairs = 2.0, 0.9, 20
    nc = effect / (sd_diff / math.sqrt(pairs))
    ref = stats.nct.sf(stats.t.ppf(0.95, pairs - 1), pairs - 1, nc)
    assert t_power(effect, pairs, sd=sd_diff, design="paired", alternative="greater") == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize("d, ratio, alternative", [(0.5, 1.0, "two-sided"), (0.25, 2.0, "two-sided"),
                                                   (0.4, 1.0, "greater"), (-0.7, 0.5, "less")])
def test_t_n_matches_statsmodels_solver(d, ratio, alternative):
    # Reference: statsmodels TTestIndPower.solve_power (continuous nobs1).
    ref = _sm(sm_power.TTestIndPower().solve_power, effect_size=d, alpha=0.05, power=0.8, ratio=ratio,
              alternative=SM_ALT[alternative])
    got = t_n(d, 0.8, design="two-sample", ratio=ratio, alternative=alternative)
    assert got == pytest.approx(ref, rel=1e-6)


def test_t_n_one_sample_matches_statsmodels_solver():
    # Reference: statsmodels TTestPower.solve_power.
    ref = _sm(sm_power.TTestPower().solve_power, effect_size=0.4, alpha=0.05, power=0.9)
    assert t_n(0.4, 0.9) == pytest.approx(ref, rel=1e-6)


@pytest.mark.parametrize("d, table_n", [(0.5, 64), (0.8, 26)])
def test_t_n_cohen_table(d, table_n):
    # Cohen (1988), Statistical Power Analysis for the Behavioral Sciences, Table 2.4.1:
    # two-sample t, two-sided alpha 0.05, power 0.80 -> 64 per group for d = 0.5, 26 for d = 0.8.
    assert ceil_n(t_n(d, 0.8, design="two-sample")) == table_n


def test_t_n_cohen_table_small_effect():
    # Cohen (1988), Table 2.4.1 prints 393 per group for d = 0.2 (two-sided 0.05, power 0.80).
    # That entry comes from an approximation; the exact noncentral-t continuous n is about
    # 393.4, so rounding up gives 394, one more than printed.
    n = t_n(0.2, 0.8, design="two-sample")
    assert 393.0 < n < 394.0
    assert ceil_n(n) == 394


def test_t_effect_matches_statsmodels_solver():
    # Reference: statsmodels TTestIndPower.solve_power for effect_size.
    ref = _sm(sm_power.TTestIndPower().solve_power, nobs1=50, alpha=0.05, power=0.9, ratio=1.0)
    assert t_effect(50, 0.9, design="two-sample") == pytest.approx(ref, rel=1e-6)


def test_t_power_far_tail_with_large_effect_is_finite():
    # scipy.special.nctdtr returns NaN for some far-tail cells (e.g. df 3, nc 8, x -3.18).
    # Two-sided power must still be a number, and it differs from the one-sided upper
    # tail at alpha/2 by the wrong-side tail, which is below Phi(-nc) (Z + nc < 0 is
    # needed for T < 0): common practice bound, checked here with scipy.stats.norm.
    for effect, n in [(1.0, 300), (6.0, 4), (2.0, 60)]:
        nc = effect * math.sqrt(n)
        two = t_power(effect, n)
        upper = t_power(effect, n, alpha=0.025, alternative="greater")
        assert np.isfinite(two)
        assert 0.0 <= two - upper <= stats.norm.cdf(-nc) + 1e-15
    # A large effect with few observations still gets a sample size (power 0.8 near n = 2.5).
    n = t_n(5.0, 0.8)
    assert t_power(5.0, n) == pytest.approx(0.8, abs=1e-9)


# --------------------------------------------------------------------------- z-tests
def test_z_critical_values():
    # common practice: z* = 1.645 (one-sided 0.05), 2.326 (one-sided 0.01), 1.960 (two-sided 0.05).
    assert z_critical(0.05, "greater") == pytest.approx(1.645, abs=5e-4)
    assert z_critical(0.01, "greater") == pytest.approx(2.326, abs=5e-4)
    assert z_critical(0.05, "two-sided") == pytest.approx(1.960, abs=5e-4)
    # and it is the one z_power uses: power at effect 0 of a one-sided test is
    # Phi(-z*) (scipy.stats.norm as reference).
    assert z_power(0.0, 10, alternative="greater", alpha=0.01) == pytest.approx(
        stats.norm.sf(z_critical(0.01, "greater")), rel=1e-12)


@pytest.mark.parametrize("alternative", ["greater", "less", "two-sided"])
def test_z_power_at_the_null_is_alpha(alternative):
    # common practice: power of the z-test at a true mean equal to the null is alpha.
    for alpha in (0.01, 0.05, 0.2):
        assert z_power(0.0, 17, alpha=alpha, alternative=alternative) == pytest.approx(alpha, rel=1e-12)


@pytest.mark.parametrize("shift, alpha, beta, tol", [(0.875, 0.05, 0.131, 0.002), (0.875, 0.01, 0.33, 0.01),
                                                     (1.0, 0.05, 0.065, 0.002)])
def test_z_type_two_error_worked_values(shift, alpha, beta, tol):
    # common practice (worked textbook values): one-sample one-sided z-test, n = 10,
    # standardised shift 0.875 -> beta 0.131 at alpha 0.05 and 0.33 at alpha 0.01;
    # shift 1.0 -> beta 0.065 at alpha 0.05.
    assert 1 - z_power(shift, 10, alpha=alpha, alternative="greater") == pytest.approx(beta, abs=tol)


@pytest.mark.parametrize("ratio", [1.0, 0.5, 2.5])
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_z_two_sample_matches_statsmodels(ratio, alternative):
    # Reference: statsmodels NormalIndPower (two-sample z, both tails) and zt_ind_solve_power.
    d = -0.35 if alternative == "less" else 0.35
    ref = _sm(sm_power.NormalIndPower().power, d, 80, 0.05, ratio=ratio, alternative=SM_ALT[alternative])
    assert z_power(d, 80, design="two-sample", ratio=ratio, alternative=alternative) == pytest.approx(ref, rel=1e-12)
    ref_n = _sm(sm_power.zt_ind_solve_power, effect_size=d, alpha=0.05, power=0.85, ratio=ratio,
                alternative=SM_ALT[alternative])
    got_n = z_n(d, 0.85, design="two-sample", ratio=ratio, alternative=alternative)
    assert got_n == pytest.approx(ref_n, rel=1e-6)


def test_z_one_sample_matches_statsmodels():
    # Reference: statsmodels NormalIndPower with ratio=0 is the one-sample z-test.
    for d, n in [(0.2, 150), (0.5, 20)]:
        ref = _sm(sm_power.NormalIndPower().power, d, n, 0.05, ratio=0)
        assert z_power(d, n) == pytest.approx(ref, rel=1e-12)


def test_z_n_one_sided_closed_form():
    # Textbook formula (common practice): n = ((z_{1-a} + z_{1-b}) * sd / effect)^2, one sample,
    # and g = 1 + 1/ratio times that for two arms; scipy.stats.norm as reference.
    za, zb = stats.norm.ppf(0.95), stats.norm.ppf(0.9)
    assert z_n(2.0, 0.9, sd=5.0, alternative="greater") == pytest.approx(((za + zb) * 5 / 2) ** 2, rel=1e-12)
    assert z_n(0.3, 0.9, alternative="greater", design="two-sample", ratio=3) == pytest.approx(
        (1 + 1 / 3) * ((za + zb) / 0.3) ** 2, rel=1e-12)


def test_z_n_two_sided_counts_far_tail():
    # The one-tail formula with z_{1-a/2} (common practice) slightly over-states n; the exact
    # two-sided n is below it, and the difference is the far tail's share.
    one_tail = 2 * (stats.norm.ppf(0.975) + stats.norm.ppf(0.8)) ** 2 / 0.5**2
    exact = z_n(0.5, 0.8, design="two-sample")
    assert exact < one_tail
    assert exact == pytest.approx(one_tail, rel=1e-5)
    assert z_power(0.5, exact, design="two-sample") == pytest.approx(0.8, abs=1e-12)


def test_z_effect_matches_statsmodels():
    # Reference: statsmodels zt_ind_solve_power for effect_size.
    ref = _sm(sm_power.zt_ind_solve_power, nobs1=100, alpha=0.05, power=0.8, ratio=1.0)
    assert z_effect(100, 0.8, design="two-sample") == pytest.approx(ref, rel=1e-6)


# --------------------------------------------------------------------------- Welch
def _welch_reference(effect, n0, n1, sd0, sd1, alpha, alternative):
    # Satterthwaite (1946) / Welch (1947) df from population variances; scipy.stats.nct.
    a0, a1 = sd0**2 / n0, sd1**2 / n1
    df = (a0 + a1) ** 2 / (a0**2 / (n0 - 1) + a1**2 / (n1 - 1))
    nc = effect / math.sqrt(a0 + a1)
    if alternative == "two-sided":
        crit = stats.t.ppf(1 - alpha / 2, df)
        return stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)
    crit = stats.t.ppf(1 - alpha, df)
    return stats.nct.sf(crit, df, nc) if alternative == "greater" else stats.nct.cdf(-crit, df, nc)


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize("n, ratio, sd0, sd1", [(30, 1.0, 1.0, 2.0), (25, 2.0, 1.5, 0.7), (8, 0.75, 1.0, 1.0)])
def test_welch_power_matches_direct_noncentral_t(alternative, n, ratio, sd0, sd1):
    e = -0.8 if alternative == "less" else 0.8
    ref = _welch_reference(e, n, ratio * n, sd0, sd1, 0.05, alternative)
    got = welch_power(e, n, sd0=sd0, sd1=sd1, ratio=ratio, alternative=alternative)
    assert got == pytest.approx(ref, rel=1e-10)


def test_welch_equal_variances_equal_arms_is_pooled_t():
    # statsmodels has no power function with Welch-Satterthwaite df (TTestIndPower is the
    # pooled-variance test). With equal SDs and equal arms the Welch df equal n0 + n1 - 2,
    # so TTestIndPower is then an exact reference.
    assert welch_df(40, 1.3, 1.3, 1.0) == pytest.approx(78.0, rel=1e-12)
    ref = _sm(sm_power.TTestIndPower().power, 0.45, 40, 0.05, ratio=1.0)
    assert welch_power(0.45 * 1.3, 40, sd0=1.3, sd1=1.3) == pytest.approx(ref, rel=1e-10)


def test_welch_df_matches_scipy_welch_test_df():
    # Reference: scipy.stats.ttest_ind(equal_var=False) reports the Satterthwaite df of the
    # sample variances; feeding samples whose variances equal the population values checks
    # our df formula.
    rng = np.random.default_rng(20240611)
    y0, y1 = rng.standard_normal(12), rng.standard_normal(30)
    y0 = (y0 - y0.mean()) / y0.std(ddof=1) * 1.5
    y1 = (y1 - y1.mean()) / y1.std(ddof=1) * 0.6
    res = stats.ttest_ind(y1, y0, equal_var=False)
    assert welch_df(12, 1.5, 0.6, 30 / 12) == pytest.approx(res.df, rel=1e-10)


def test_welch_n_and_effect_invert():
    n = welch_n(0.6, 0.85, sd0=1.0, sd1=1.8, ratio=1.5)
    assert welch_power(0.6, n, sd0=1.0, sd1=1.8, ratio=1.5) == pytest.approx(0.85, abs=1e-10)
    e = welch_effect(n, 0.85, sd0=1.0, sd1=1.8, ratio=1.5)
    assert e == pytest.approx(0.6, rel=1e-8)


# --------------------------------------------------------------------------- two proportions
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize("p0, p1, n, ratio", [(0.6, 0.8, 82, 1.0), (0.1, 0.2, 200, 2.0), (0.45, 0.3, 60, 0.5)])
def test_prop2_power_matches_statsmodels(alternative, p0, p1, n, ratio):
    # Reference: statsmodels power_proportions_2indep (pooled SE under H0, unpooled under H1,
    # both tails). Its sample 1 (nobs1, p = prop2 + diff) is our control arm, its sample 2
    # (ratio * nobs1, prop2) our treatment arm, so diff = p0 - p1 and "greater" (p1 > p0)
    # is its "smaller".
    sm_alt = {"two-sided": "two-sided", "greater": "smaller", "less": "larger"}[alternative]
    ref = _sm(sm_prop.power_proportions_2indep, p0 - p1, p1, n, ratio=ratio, alpha=0.05,
              alternative=sm_alt, return_results=False)
    got = prop2_power(p0, p1, n, ratio=ratio, alternative=alternative)
    assert got == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize("p0, p1, ratio", [(0.6, 0.8, 1.0), (0.1, 0.2, 2.0), (0.3, 0.45, 0.5)])
def test_prop2_n_one_sided_matches_statsmodels(p0, p1, ratio):
    # Reference: statsmodels samplesize_proportions_2indep_onetail (closed form, one tail).
    ref = _sm(sm_prop.samplesize_proportions_2indep_onetail, p0 - p1, p1, 0.8, ratio=ratio, alpha=0.05,
              alternative="smaller")
    assert prop2_n(p0, p1, 0.8, ratio=ratio, alternative="greater") == pytest.approx(ref, rel=1e-10)


def _flp_n(p0, p1, power, ratio, z_alpha):
    # Fleiss, Levin & Paik (2003), eq. 4.14 and its unequal-allocation form, written out
    # from scipy.stats.norm: control-arm n.
    pbar = (p0 + ratio * p1) / (1 + ratio)
    num = z_alpha * math.sqrt((ratio + 1) * pbar * (1 - pbar)) + stats.norm.ppf(power) * math.sqrt(
        ratio * p0 * (1 - p0) + p1 * (1 - p1))
    return num**2 / (ratio * (p1 - p0) ** 2)


def _ftu(n, p0, p1, ratio):
    # Fleiss, Tytun & Ury (1980) continuity correction, unequal-allocation form.
    return n / 4 * (1 + math.sqrt(1 + 2 * (ratio + 1) / (ratio * n * abs(p1 - p0)))) ** 2


@pytest.mark.parametrize("p0, p1, ratio", [(0.6, 0.8, 1.0), (0.05, 0.15, 1.0), (0.2, 0.35, 3.0)])
def test_prop2_n_against_fleiss_formulas(p0, p1, ratio):
    z1 = stats.norm.ppf(0.95)
    n1 = _flp_n(p0, p1, 0.9, ratio, z1)
    assert prop2_n(p0, p1, 0.9, ratio=ratio, alternative="greater") == pytest.approx(n1, rel=1e-12)
    assert prop2_n(p0, p1, 0.9, ratio=ratio, alternative="greater", continuity=True) == pytest.approx(
        _ftu(n1, p0, p1, ratio), rel=1e-12)
    # two-sided: the textbook formulas use z_{1-a/2} and ignore the far tail; we count it,
    # which lowers n by a negligible amount at power 0.9.
    z2 = stats.norm.ppf(0.975)
    n2 = _flp_n(p0, p1, 0.9, ratio, z2)
    exact = prop2_n(p0, p1, 0.9, ratio=ratio)
    assert exact <= n2 and exact == pytest.approx(n2, rel=1e-5)
    exact_cc = prop2_n(p0, p1, 0.9, ratio=ratio, continuity=True)
    assert exact_cc <= _ftu(n2, p0, p1, ratio) and exact_cc == pytest.approx(_ftu(n2, p0, p1, ratio), rel=1e-5)


def test_prop2_worked_example_by_hand():
    # Hand calculation from FLP (2003) eq. 4.14 and the FTU (1980) correction:
    # p0 = 0.6, p1 = 0.8, two-sided 0.05, power 0.8: pbar = 0.7,
    # n = (1.96*sqrt(2*0.21) + 0.8416*sqrt(0.24 + 0.16))^2 / 0.2^2 = 81.2 -> 82 per arm;
    # n_cc = 81.2/4 * (1 + sqrt(1 + 4/(81.2*0.2)))^2 = 90.9 -> 91 per arm.
    assert prop2_n(0.6, 0.8, 0.8) == pytest.approx(81.2, abs=0.05)
    assert ceil_n(prop2_n(0.6, 0.8, 0.8)) == 82
    assert prop2_n(0.6, 0.8, 0.8, continuity=True) == pytest.approx(90.9, abs=0.05)
    assert ceil_n(prop2_n(0.6, 0.8, 0.8, continuity=True)) == 91


def test_prop2_continuity_power_against_formula():
    # Fleiss (1981) corrected statistic (|p1_hat - p0_hat| - (1/n0 + 1/n1)/2) / SE0, with
    # p1_hat - p0_hat ~ N(p1 - p0, SE1^2); one-sided power written out with scipy.stats.norm.
    p0, p1, n, ratio = 0.3, 0.5, 70, 1.5
    n1 = ratio * n
    pbar = (n * p0 + n1 * p1) / (n + n1)
    se0 = math.sqrt(pbar * (1 - pbar) * (1 / n + 1 / n1))
    se1 = math.sqrt(p0 * (1 - p0) / n + p1 * (1 - p1) / n1)
    cc = 0.5 * (1 / n + 1 / n1)
    ref = stats.norm.cdf((p1 - p0 - cc - stats.norm.ppf(0.95) * se0) / se1)
    got = prop2_power(p0, p1, n, ratio=ratio, alternative="greater", continuity=True)
    assert got == pytest.approx(ref, rel=1e-12)


def test_prop2_effect_inverts_power():
    for alternative, p0 in [("two-sided", 0.3), ("greater", 0.1), ("less", 0.5)]:
        p1 = prop2_effect(p0, 120, 0.8, alternative=alternative, ratio=1.5)
        assert (p1 < p0) if alternative == "less" else (p1 > p0)
        assert prop2_power(p0, p1, 120, alternative=alternative, ratio=1.5) == pytest.approx(0.8, abs=1e-9)


# --------------------------------------------------------------------------- cluster designs, dropout
def test_design_effect_donner_klar_and_eldridge():
    # Donner & Klar (2000): 1 + (m - 1) * ICC. m = 20, ICC 0.05 -> 1.95.
    assert design_effect(20, 0.05) == pytest.approx(1 + 19 * 0.05, rel=1e-14)
    assert design_effect(20, 0.05) == pytest.approx(1.95, rel=1e-14)
    # Eldridge, Ashby & Kerry (2006): 1 + ((cv^2 + 1) m - 1) ICC; cv 0.5 -> 1 + 24 * 0.05 = 2.2.
    assert design_effect(20, 0.05, cv=0.5) == pytest.approx(2.2, rel=1e-14)
    # ICC 0 means no inflation; cluster size 1 with cv 0 means none either.
    assert design_effect(35, 0.0, cv=0.7) == 1.0
    assert design_effect(1, 0.3) == pytest.approx(1.0, rel=1e-14)


def test_clusters_per_arm_donner_klar():
    # Donner & Klar (2000) normal-approximation formula, written out from scipy.stats.norm:
    # k = 2 (z_{1-a/2} + z_{1-b})^2 sd^2 / effect^2 * (1 + (m - 1) ICC) / m per arm (far tail
    # of the two-sided test ignored, hence rel=1e-5).
    zsum = stats.norm.ppf(0.975) + stats.norm.ppf(0.8)
    ref = 2 * zsum**2 * 4.0 / 0.6**2 * (1 + 24 * 0.02) / 25
    assert clusters_per_arm(0.6, 0.8, 25, 0.02, sd=2.0) == pytest.approx(ref, rel=1e-5)


def test_inflate_for_dropout():
    # common practice: recruit n / (1 - dropout rate).
    assert inflate_for_dropout(64, 0.2) == pytest.approx(80.0, rel=1e-14)
    assert inflate_for_dropout(50, 0.0) == 50.0


def test_ceil_n():
    assert ceil_n(64.0000000001) == 64
    assert ceil_n(64.001) == 65
    assert ceil_n(63.2) == 64
    assert isinstance(ceil_n(3.5), int)
    np.testing.assert_array_equal(ceil_n([1.0, 2.5, 1e6 + 1e-5]), [1, 3, 1_000_000])


# --------------------------------------------------------------------------- survival
def test_schoenfeld_events_hazard_ratio_half():
    # Schoenfeld (1981), Biometrika: D = (z_{1-a/2} + z_{1-b})^2 (1 + r)^2 / r / log(HR)^2.
    # HR 0.5, two-sided 0.05, power 0.8, 1:1 -> 4 (1.96 + 0.8416)^2 / log(0.5)^2 = 65.3 -> 66.
    ref = 4 * (stats.norm.ppf(0.975) + stats.norm.ppf(0.8)) ** 2 / math.log(0.5) ** 2
    d = schoenfeld_events(0.5, 0.8)
    assert ref == pytest.approx(65.3, abs=0.05)
    assert d == pytest.approx(ref, rel=1e-5)  # we also count the far tail (negligible here)
    assert ceil_n(d) == 66


def test_schoenfeld_one_sided_and_unequal_allocation():
    # Schoenfeld (1981) formula with z_{1-a} (one-sided) and 2:1 allocation, from scipy.stats.norm.
    ref = (stats.norm.ppf(0.975) + stats.norm.ppf(0.9)) ** 2 * 9 / 2 / math.log(0.7) ** 2
    assert schoenfeld_events(0.7, 0.9, alpha=0.025, alternative="less", ratio=2.0) == pytest.approx(ref, rel=1e-12)
    assert schoenfeld_power(0.7, ref, alpha=0.025, alternative="less", ratio=2.0) == pytest.approx(0.9, abs=1e-12)


# --------------------------------------------------------------------------- ANCOVA
def test_ancova_power_is_t_with_residual_sd():
    # Borm, Fransen & Lemmens (2007): residual SD sd * sqrt(1 - rho^2), one df fewer;
    # reference computed with scipy.stats.nct.
    n, rho, d = 40, 0.6, 0.5
    df = 2 * n - 3
    nc = d / (math.sqrt(1 - rho**2) * math.sqrt(2 / n))
    crit = stats.t.ppf(0.975, df)
    ref = stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)
    assert ancova_power(d, n, rho=rho) == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize("d", [0.3, 0.5, 0.8])
@pytest.mark.parametrize("rho", [0.3, 0.5, 0.7])
def test_ancova_n_design_factor(d, rho):
    # Borm et al. (2007): adjusted n is about the unadjusted t-test n times 1 - rho^2; the
    # lost df adds less than one participant per arm here.
    approx = t_n(d, 0.8, design="two-sample") * (1 - rho**2)
    exact = ancova_n(d, 0.8, rho=rho)
    assert 0.0 < exact - approx < 1.0
    assert ancova_power(d, exact, rho=rho) == pytest.approx(0.8, abs=1e-10)
    assert ancova_effect(exact, 0.8, rho=rho) == pytest.approx(d, rel=1e-8)


# --------------------------------------------------------------------------- shapes and errors
def test_scalar_in_float_out_array_in_array_out():
    assert type(t_power(0.5, 20)) is float
    out = t_power(np.array([0.2, 0.5]), np.array([[10], [40], [90]]), design="two-sample")
    assert isinstance(out, np.ndarray) and out.shape == (3, 2)
    assert out[1, 1] == pytest.approx(t_power(0.5, 40, design="two-sample"), rel=1e-14)
    n = z_n([0.2, 0.5], 0.8)
    assert n.shape == (2,) and n[1] == pytest.approx(z_n(0.5, 0.8), rel=1e-14)
    assert type(design_effect(np.float64(10.0), 0.1)) is float


@pytest.mark.parametrize("call, message", [
    (lambda: t_power(0.5, 20, alpha=1.5), "`alpha` must be in (0, 1); got 1.5."),
    (lambda: z_power(0.5, 20, alternative="two_sided"), "Did you mean 'two-sided'?"),
    (lambda: t_power(0.5, 1, design="one-sample"), "`n` must leave df = n - 1 > 0; got 1."),
    (lambda: t_power(0.5, [5, 0.5], design="two-sample"), "`n` must leave df = n + ratio*n - 2 > 0"),
    (lambda: z_n(-0.5, 0.8, alternative="greater"), "`effect` must be > 0 for alternative='greater'"),
    (lambda: z_n(0.5, 0.03), "`power` must exceed `alpha`"),
    (lambda: design_effect(20, 1.2), "`icc` must be in [0, 1); got 1.2."),
    (lambda: design_effect(0.5, 0.1), "`cluster_size` must be >= 1; got 0.5."),
    (lambda: design_effect(10, 0.1, cv=-1), "`cv` must be >= 0; got -1."),
    (lambda: inflate_for_dropout(100, 1.0), "`rate` must be in [0, 1); got 1."),
    (lambda: prop2_power(0.2, 1.2, 50), "`p1` must be in (0, 1); got 1.2."),
    (lambda: prop2_power(0.2, 0.3, 50, continuity="yes"), "`continuity` must be True or False"),
    (lambda: t_power(0.5, 20, design="crossover"), "`design` must be one of"),
    (lambda: welch_power(0.5, 20, sd1=0), "`sd1` must be > 0; got 0."),
    (lambda: ancova_power(0.5, 20, rho=1.0), "`rho` must be in (-1, 1); got 1."),
    (lambda: schoenfeld_events(1.0, 0.8), "`log(hazard_ratio)` must be != 0"),
    (lambda: t_power(0.5, [10, np.nan]), "`n` must be > 0; got nan (element [1])."),
    (lambda: prop2_effect(0.5, 3, 0.99), "`n` = 3 is too small"),
])
def test_bad_input_gives_one_line_parameter_error(call, message):
    with pytest.raises(ParameterError) as info:
        call()
    text = str(info.value)
    assert message in text and "\n" not in text
    assert isinstance(info.value, ValueError)


def test_noncentral_t_fallback_agrees_with_scipy_where_scipy_is_finite():
    # Reference: scipy.stats.nct.cdf. Our quadrature (used only where scipy returns NaN)
    # must reproduce scipy on cells where scipy is finite, and the filled cells must obey
    # 0 <= P(T <= x) <= Phi(-nc) for x <= 0 < nc.
    from simpower.analytic._nct import _by_quadrature, nct_cdf

    for df, nc, x in [(3.0, 2.0, -3.18), (0.7, 1.0, 0.5), (57.5, -1.2, 1.9), (900.0, 4.0, 2.5), (5.0, 0.0, -2.0)]:
        assert _by_quadrature(df, nc, x) == pytest.approx(stats.nct.cdf(x, df, nc), rel=1e-8, abs=1e-14)
    filled = nct_cdf(np.array([3.0, 3.0]), np.array([8.0, 2.0]), -3.18)
    assert np.all(np.isfinite(filled))
    assert 0.0 <= filled[0] <= stats.norm.cdf(-8.0)
    assert filled[1] == pytest.approx(stats.nct.cdf(-3.18, 3.0, 2.0), rel=1e-12)
