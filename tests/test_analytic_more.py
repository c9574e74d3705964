"""External checks of the closed forms added to simpower.analytic for the reference cases.

Cohen's h and the arcsine test, the exact binomial test, Freedman's events formula,
Noether's Mann-Whitney size, Poisson / negative binomial rate ratios (Zhu & Lakkis
2014) and the Fisher-z correlation test. Each check names its source beside it;
"common practice" marks a fact of the trade with no single source and "from
memory" a published value recalled rather than looked up. Simulation checks use
fixed seeds and allow 4 Monte Carlo standard errors, plus, where the formula is a
large-sample approximation, an allowance stated (and justified) beside the check
before it was run.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import special, stats

from simpower.analytic import (
    arcsine_effect,
    arcsine_n,
    arcsine_power,
    binom_exact_effect,
    binom_exact_n,
    binom_exact_power,
    binom_exact_region,
    ceil_n,
    cohen_h,
    corr_effect,
    corr_n,
    corr_power,
    freedman_events,
    freedman_power,
    noether_effect,
    noether_n,
    noether_power,
    rate_ratio_effect,
    rate_ratio_n,
    rate_ratio_power,
    schoenfeld_events,
    superiority_normal,
)
from simpower.errors import ParameterError

sm_power = pytest.importorskip("statsmodels.stats.power")
sm_prop = pytest.importorskip("statsmodels.stats.proportion")
sm_rates = pytest.importorskip("statsmodels.stats.rates")

SM_ALT = {"two-sided": "two-sided", "greater": "larger", "less": "smaller"}
ALTERNATIVES = ["two-sided", "greater", "less"]


def _sm(fun, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fun(*args, **kwargs)


def _z(q):
    return float(special.ndtri(q))


def _within(simulated, expected, reps, allowance=0.0):
    """|simulated - expected| <= 4 MCSE (binomial, at the expected power) + allowance."""
    mcse = math.sqrt(expected * (1.0 - expected) / reps)
    return abs(simulated - expected) <= 4.0 * mcse + allowance


# --------------------------------------------------------------------------- 1. Cohen's h, arcsine test
def test_cohen_h_matches_statsmodels_proportion_effectsize():
    # Reference: statsmodels.stats.proportion.proportion_effectsize (Cohen 1988, ch. 6: h = phi1 - phi2).
    p1 = np.array([0.05, 0.3, 0.5, 0.8, 0.99, 0.0, 1.0])
    p0 = np.array([0.1, 0.5, 0.5, 0.6, 0.9, 0.2, 0.5])
    ref = np.array([sm_prop.proportion_effectsize(a, b) for a, b in zip(p1, p0)])
    np.testing.assert_allclose(cohen_h(p1, p0), ref, rtol=1e-13, atol=1e-15)
    assert cohen_h(0.5, 0.5) == 0.0


@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("p0, p1, n, ratio, alpha", [(0.6, 0.8, 50, 2.0, 0.05), (0.1, 0.2, 200, 1.0, 0.01),
                                                     (0.45, 0.5, 900, 0.5, 0.10)])
def test_arcsine_power_and_n_match_statsmodels_normal_ind_power(alternative, p0, p1, n, ratio, alpha):
    # Reference: statsmodels NormalIndPower with effect_size = proportion_effectsize(p1, p0)
    # (Cohen 1988, ch. 6: z-test on the arcsine scale, nobs1 = control arm, ratio = n1 / n0).
    if alternative == "less":
        p0, p1 = p1, p0
    h = sm_prop.proportion_effectsize(p1, p0)
    ref = _sm(sm_power.NormalIndPower().power, h, n, alpha, ratio=ratio, alternative=SM_ALT[alternative])
    got = arcsine_power(p0, p1, n, ratio=ratio, alpha=alpha, alternative=alternative)
    assert got == pytest.approx(ref, rel=1e-12)
    ref_n = _sm(sm_power.NormalIndPower().solve_power, h, None, alpha, 0.8, ratio=ratio,
                alternative=SM_ALT[alternative])
    # statsmodels solves with its own root finder (tolerance ~1e-8); ours inverts to 1e-12
    assert arcsine_n(p0, p1, 0.8, ratio=ratio, alpha=alpha, alternative=alternative) == pytest.approx(ref_n, rel=1e-6)


@pytest.mark.parametrize("h, table_n", [(0.2, 392), (0.5, 63), (0.8, 25)])
def test_arcsine_n_cohen_table(h, table_n):
    # Reference: Cohen (1988), Table 6.4.1 (and Cohen 1992, Psychological Bulletin 112:155, Table 2):
    # n per group for h = .2/.5/.8 at two-sided alpha .05, power .80 is 392/63/25 (values from
    # memory; the table rounds 2((z + z)/h)^2 = 392.4/62.8/24.5 to the nearest integer).
    p0 = 0.5
    p1 = math.sin(math.asin(math.sqrt(p0)) + h / 2.0) ** 2
    assert cohen_h(p1, p0) == pytest.approx(h, rel=1e-12)
    assert round(arcsine_n(p0, p1, 0.8)) == table_n


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_arcsine_effect_inverts_power(alternative):
    # Common practice: the detectable p1 has exactly the target power.
    for p0, n, ratio in [(0.3, 120, 1.0), (0.7, 45, 2.5), (0.02, 400, 0.7)]:
        p1 = arcsine_effect(p0, n, 0.85, ratio=ratio, alternative=alternative)
        assert (p1 < p0) if alternative == "less" else (p1 > p0)
        assert arcsine_power(p0, p1, n, ratio=ratio, alternative=alternative) == pytest.approx(0.85, abs=1e-12)
    with pytest.raises(ParameterError, match="`n` = 3 is too small"):
        arcsine_effect(0.9, 3, 0.95)


# --------------------------------------------------------------------------- 2. exact binomial test
def _brute_pvalues(n, p0, alternative):
    """p-values straight from their definition (common practice), with math.comb."""
    pmf = np.array([math.comb(n, x) * p0**x * (1 - p0) ** (n - x) for x in range(n + 1)])
    if alternative == "greater":
        return np.array([pmf[x:].sum() for x in range(n + 1)])
    if alternative == "less":
        return np.array([pmf[: x + 1].sum() for x in range(n + 1)])
    # two-sided "minimum likelihood" p-value: outcomes no more likely than x (scipy's 1e-7 tie tolerance)
    return np.array([min(1.0, pmf[pmf <= pmf[x] * (1 + 1e-7)].sum()) for x in range(n + 1)])


def _brute_power(n, p, p0, alpha, alternative):
    reject = _brute_pvalues(n, p0, alternative) <= alpha
    return sum(math.comb(n, x) * p**x * (1 - p) ** (n - x) for x in range(n + 1) if reject[x])


@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("p0", [0.07, 0.5, 0.63])
def test_binom_region_matches_scipy_binomtest(alternative, p0):
    # Reference: scipy.stats.binomtest; the region is {x : binomtest(x, n, p0).pvalue <= alpha}.
    for n in (1, 2, 5, 9, 16, 25, 38, 57):
        for alpha in (0.01, 0.05, 0.1):
            ref = np.array([stats.binomtest(x, n, p0, alternative=alternative).pvalue <= alpha
                            for x in range(n + 1)])
            got = binom_exact_region(n, p0, alpha=alpha, alternative=alternative)
            np.testing.assert_array_equal(got, ref, err_msg=f"n={n} p0={p0} alpha={alpha}")


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_binom_power_by_brute_force_summation_and_size_at_most_alpha(alternative):
    # Reference: direct summation of C(n, x) p^x (1-p)^(n-x) over the region defined by the
    # p-values (common practice); the exact test's attained size is <= alpha (its definition).
    for n, p, p0, alpha in [(10, 0.9, 0.5, 0.05), (33, 0.2, 0.4, 0.05), (60, 0.13, 0.05, 0.01),
                            (47, 0.55, 0.5, 0.1), (80, 0.97, 0.9, 0.05)]:
        got = binom_exact_power(n, p, p0, alpha=alpha, alternative=alternative)
        assert got == pytest.approx(_brute_power(n, p, p0, alpha, alternative), rel=1e-11, abs=1e-15)
        size = binom_exact_power(n, p0, p0, alpha=alpha, alternative=alternative)
        assert size == pytest.approx(_brute_power(n, p0, p0, alpha, alternative), rel=1e-11, abs=1e-15)
        assert size <= alpha
    sizes = binom_exact_power(np.arange(1, 150), 0.3, 0.3, alternative=alternative)
    assert np.all(sizes <= 0.05) and np.any(sizes < 0.04)  # discrete: the size is attained only now and then


@pytest.mark.parametrize("p, p0, alternative", [(0.8, 0.5, "two-sided"), (0.5, 0.2, "greater"),
                                                (0.1, 0.3, "less"), (0.35, 0.15, "two-sided")])
def test_binom_exact_n_first_and_robust_against_a_brute_force_scan(p, p0, alternative):
    # Reference: power by brute-force summation for every n from 1 (common practice): the first n
    # with power >= 0.8, and the first n from which power stays >= 0.8 over the documented horizon.
    target, horizon = 0.8, max(10, math.ceil(3 / min(p0, 1 - p0)))
    powers = {m: _brute_power(m, p, p0, 0.05, alternative) for m in range(1, 160)}
    first = min(m for m, v in powers.items() if v >= target)
    robust = min(m for m in powers if m + horizon < 160 and all(powers[j] >= target for j in range(m, m + horizon + 1)))
    assert binom_exact_n(p, p0, target, alternative=alternative) == first
    assert binom_exact_n(p, p0, target, alternative=alternative, robust=True) == robust
    # the saw-tooth is real in these cases: some n above the first has less than the target
    assert robust > first and min(powers[m] for m in range(first, robust)) < target


def test_binom_sawtooth_worked_example():
    # Reference: brute-force summation (common practice). Two-sided, p0 = 0.5, p = 0.8: 20 trials
    # give 0.804 but 21 and 22 give 0.769 and 0.733 (power falls as n grows).
    assert binom_exact_power(20, 0.8, 0.5) == pytest.approx(_brute_power(20, 0.8, 0.5, 0.05, "two-sided"), rel=1e-12)
    got = binom_exact_power(np.array([20, 21, 22, 23]), 0.8, 0.5)
    assert got[0] > got[1] > got[2] and got[3] > got[0]
    np.testing.assert_allclose(got, [0.8042, 0.7693, 0.7326, 0.8402], atol=5e-5)


def test_binom_exact_power_by_simulation():
    # Reference: simulated X ~ Binomial(n, p), each tested with scipy.stats.binomtest; within 4 MCSE.
    rng = np.random.default_rng(20261214)
    reps = 20000
    for n, p, p0, alternative in [(40, 0.3, 0.15, "two-sided"), (25, 0.7, 0.45, "greater")]:
        x = rng.binomial(n, p, reps)
        pval = {k: stats.binomtest(int(k), n, p0, alternative=alternative).pvalue for k in np.unique(x)}
        simulated = np.mean([pval[k] <= 0.05 for k in x])
        expected = binom_exact_power(n, p, p0, alternative=alternative)
        assert _within(simulated, expected, reps), (simulated, expected)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_binom_exact_effect_inverts_power(alternative):
    # Common practice: the detectable p has exactly the target power.
    for n, p0 in [(30, 0.5), (100, 0.1), (15, 0.6)]:
        p = binom_exact_effect(n, p0, 0.8, alternative=alternative)
        assert (p < p0) if alternative == "less" else (p > p0)
        assert binom_exact_power(n, p, p0, alternative=alternative) == pytest.approx(0.8, abs=1e-9)
    with pytest.raises(ParameterError, match="`n` = 3 is too small"):
        binom_exact_effect(3, 0.5, 0.8)


def test_binom_exact_n_is_the_first_crossing_at_large_n():
    # Common practice (definition of the smallest n): with over 500 trials the search,
    # which starts from the Neyman-Pearson bound, must not skip any smaller n whose exact power
    # (checked against brute force above) already reaches the target.
    n = binom_exact_n(0.56, 0.5, 0.8)
    assert n > 500
    below = binom_exact_power(np.arange(1, n), 0.56, 0.5)
    assert binom_exact_power(n, 0.56, 0.5) >= 0.8 and np.all(below < 0.8)
    # a search bound that clips the doubling of the Neyman-Pearson bracket gives the same answer
    assert [binom_exact_n(0.56, 0.5, 0.8, n_max=m) for m in (n, 600, 1000)] == [n, n, n]


# --------------------------------------------------------------------------- 3. Freedman
def test_freedman_events_formula_by_hand():
    # Reference: Freedman (1982), Statistics in Medicine 1:121-129: D = (z_a + z_b)^2 (1+HR)^2/(1-HR)^2
    # for 1:1; HR = 0.5, two-sided 0.05, power 0.8: 7.849 * 9 = 70.64, i.e. 71 events (hand computation).
    d = freedman_events(0.5, 0.8, alternative="less")
    assert d == pytest.approx((_z(0.95) + _z(0.8)) ** 2 * 1.5**2 / 0.5**2, rel=1e-13)
    assert freedman_events(0.5, 0.8) == pytest.approx(70.64, abs=0.01)
    assert ceil_n(freedman_events(0.5, 0.8)) == 71
    # unequal allocation (treatment : control = r): (z_a + z_b)^2 (1 + r HR)^2 / (r (1 - HR)^2),
    # derived in simpower/analytic/freedman.py from Freedman's constant-risk-set argument
    for hr, r in [(0.7, 2.0), (1.4, 0.5), (0.6, 3.0)]:
        alt = "less" if hr < 1 else "greater"
        ref = (_z(0.975) + _z(0.9)) ** 2 * (1 + r * hr) ** 2 / (r * (1 - hr) ** 2)
        assert freedman_events(hr, 0.9, alpha=0.025, alternative=alt, ratio=r) == pytest.approx(ref, rel=1e-13)


def test_freedman_against_schoenfeld_ordering():
    # 1:1: Freedman's factor coth(u)^2 (HR = e^{2u}) exceeds Schoenfeld's (1981) 1/u^2 at every HR != 1
    # (|coth u| > 1/|u|, common practice), so Freedman asks for more events on both sides of 1,
    # with a ratio tending to 1 as HR -> 1. Unequal allocation can flip the order (Hsieh 1992,
    # Statistics in Medicine 11:1091, from memory).
    hr = np.array([0.2, 0.5, 0.7, 0.9, 0.99, 1.01, 1.25, 2.0, 5.0])
    ratio = freedman_events(hr, 0.8) / schoenfeld_events(hr, 0.8)
    u = np.log(hr) / 2
    np.testing.assert_allclose(ratio, (u / np.tanh(u)) ** 2, rtol=1e-12)
    assert np.all(ratio > 1.0)
    assert ratio[4] == pytest.approx(1.0, abs=1e-4)
    assert freedman_events(0.5, 0.8, ratio=3.0) < schoenfeld_events(0.5, 0.8, ratio=3.0)
    assert freedman_events(0.5, 0.8, ratio=1 / 3) > schoenfeld_events(0.5, 0.8, ratio=1 / 3)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_freedman_power_and_events_invert(alternative):
    # Common practice: power(events(power)) = power, both tails counted two-sided.
    for hr, r in [(0.6, 1.0), (1.7, 2.0), (0.8, 0.5)]:
        if (alternative == "greater" and hr < 1) or (alternative == "less" and hr > 1):
            hr = 1 / hr
        d = freedman_events(hr, 0.83, alternative=alternative, ratio=r)
        assert freedman_power(hr, d, alternative=alternative, ratio=r) == pytest.approx(0.83, abs=1e-10)
    assert freedman_power(1.0, 50) == pytest.approx(0.05, abs=1e-15)


# --------------------------------------------------------------------------- 4. Noether
@pytest.mark.parametrize("ratio", [1.0, 2.0, 0.4])
def test_noether_n_is_noethers_formula(ratio):
    # Reference: Noether (1987), JASA 82:645-647: N = (z_a + z_b)^2 / (12 c (1-c) (p - 1/2)^2), c = n0/N.
    c = 1.0 / (1.0 + ratio)
    for p in (0.6, 0.7, 0.35):
        alt = "less" if p < 0.5 else "greater"
        total = (_z(0.95) + _z(0.8)) ** 2 / (12 * c * (1 - c) * (p - 0.5) ** 2)
        assert noether_n(p, 0.8, ratio=ratio, alternative=alt) * (1 + ratio) == pytest.approx(total, rel=1e-13)
        n_two = noether_n(p, 0.8, ratio=ratio)
        assert noether_power(p, n_two, ratio=ratio) == pytest.approx(0.8, abs=1e-12)
        assert noether_effect(n_two, 0.8, ratio=ratio) == pytest.approx(max(p, 1 - p), rel=1e-12)


def test_superiority_of_a_normal_shift_by_simulation():
    # Reference: P(Y1 > Y0) = Phi(d / sqrt(2)) for a normal shift (common practice), estimated from
    # simulated pairs and, through scipy.stats.mannwhitneyu's U / (n0 n1), from simulated samples.
    rng = np.random.default_rng(11)
    pairs = 200000
    d = 0.5
    hit = np.mean(rng.normal(d, 1, pairs) > rng.normal(0, 1, pairs))
    p = superiority_normal(d)
    assert _within(hit, p, pairs)
    u = stats.mannwhitneyu(rng.normal(d, 1, (2000, 30)), rng.normal(0, 1, (2000, 40)), axis=1).statistic / 1200
    assert abs(u.mean() - p) <= 4 * u.std(ddof=1) / math.sqrt(u.size)


@pytest.mark.parametrize("d, ratio, alternative", [(0.5, 1.0, "two-sided"), (0.5, 2.0, "greater"),
                                                   (0.8, 1.0, "two-sided")])
def test_noether_n_gives_the_power_by_simulation(d, ratio, alternative):
    # Reference: simulated normal samples tested with scipy.stats.mannwhitneyu at Noether's n.
    # Noether's formula uses the null variance of U under H1, which overstates the H1 variance
    # when p is away from 1/2, so it is conservative: the simulated power at its n must reach the
    # target (within 4 MCSE) and exceed it by at most a stated allowance of 0.05 (for p <= 0.72).
    p = superiority_normal(d)
    n0 = ceil_n(noether_n(p, 0.8, ratio=ratio, alternative=alternative))
    n1 = int(round(ratio * n0))
    reps = 4000
    rng = np.random.default_rng([14, int(10 * d), int(10 * ratio)])
    res = stats.mannwhitneyu(rng.normal(d, 1, (reps, n1)), rng.normal(0, 1, (reps, n0)), axis=1,
                             alternative=alternative, method="asymptotic")
    simulated = np.mean(res.pvalue <= 0.05)
    mcse = math.sqrt(0.8 * 0.2 / reps)
    assert 0.8 - 4 * mcse <= simulated <= 0.8 + 0.05 + 4 * mcse, simulated


# --------------------------------------------------------------------------- 5. rate ratios
def test_rate_ratio_poisson_reduces_to_the_classic_formula():
    # Reference: the Wald test of a log rate ratio (common practice; cf. Signorini 1991, Biometrika,
    # from memory): n = (z_a + z_b)^2 (1/mu0 + 1/(ratio mu1)) / log(RR)^2, mu = rate * exposure.
    for rate0, rr, expo, r in [(0.5, 0.6, 2.0, 1.0), (3.0, 1.3, 0.5, 2.0), (1.1, 0.8, 1.0, 0.5)]:
        alt = "less" if rr < 1 else "greater"
        mu0, mu1 = rate0 * expo, rate0 * rr * expo
        ref = (_z(0.975) + _z(0.9)) ** 2 * (1 / mu0 + 1 / (r * mu1)) / math.log(rr) ** 2
        got = rate_ratio_n(rate0, rr, 0.9, exposure=expo, ratio=r, alpha=0.025, alternative=alt,
                           null_variance="alternative")
        assert got == pytest.approx(ref, rel=1e-13)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("dispersion", [None, 2.0, 0.6])
@pytest.mark.parametrize("null_variance, method_var", [("pooled", "ftotal"), ("alternative", "alt")])
def test_rate_ratio_power_matches_statsmodels(alternative, dispersion, null_variance, method_var):
    # Reference: statsmodels.stats.rates.power_negbin_ratio_2indep (Zhu & Lakkis 2014, Stat Med
    # 33:376; Zhu 2017), with sample 1 = our control arm, so its log ratio is minus ours
    # ("larger" there is "less" here); its dispersion is 1/k. Poisson: dispersion 0.
    flip = {"two-sided": "two-sided", "greater": "smaller", "less": "larger"}
    for rate0, rr, n, expo, r in [(1.2, 0.7, 150, 1.3, 1.5), (0.3, 1.6, 80, 2.0, 1.0), (2.5, 0.85, 400, 0.5, 0.5)]:
        if (alternative == "greater" and rr < 1) or (alternative == "less" and rr > 1):
            rr = 1 / rr
        ref = _sm(sm_rates.power_negbin_ratio_2indep, rate0, rate0 * rr, n, nobs_ratio=r, exposure=expo,
                  dispersion=0.0 if dispersion is None else 1 / dispersion, alternative=flip[alternative],
                  method_var=method_var, return_results=False)
        got = rate_ratio_power(rate0, rr, n, exposure=expo, dispersion=dispersion, ratio=r,
                               alternative=alternative, null_variance=null_variance)
        assert got == pytest.approx(float(ref), rel=1e-12)


def test_rate_ratio_poisson_matches_statsmodels_poisson_power():
    # Reference: statsmodels.stats.rates.power_poisson_ratio_2indep (value = 1): "alt" is our
    # "alternative", "score" (variance at the constrained MLE) our "pooled".
    for nv, mv in [("alternative", "alt"), ("pooled", "score")]:
        ref = _sm(sm_rates.power_poisson_ratio_2indep, 1.2, 0.84, 150, nobs_ratio=1.5, exposure=1.3,
                  value=1.0, alternative="two-sided", method_var=mv, return_results=False)
        got = rate_ratio_power(1.2, 0.7, 150, exposure=1.3, ratio=1.5, null_variance=nv)
        assert got == pytest.approx(float(ref), rel=1e-12)


def test_rate_ratio_control_null_variance_by_hand():
    # Reference: Zhu & Lakkis (2014), null variance with both rates at the control rate (their
    # method 2, numbering from memory): V0 = (1 + 1/R) (1/(t l0) + 1/k), V1 at the true rates.
    l0, rr, t, k, r, n = 1.2, 0.7, 1.0, 2.0, 1.0, 184
    v0 = (1 + 1 / r) * (1 / (t * l0) + 1 / k)
    v1 = 1 / (t * l0) + 1 / (r * t * l0 * rr) + (1 + r) / (r * k)
    z = _z(0.975)
    ref = stats.norm.cdf((-math.log(rr) * math.sqrt(n) - z * math.sqrt(v0)) / math.sqrt(v1))
    ref += stats.norm.cdf((math.log(rr) * math.sqrt(n) - z * math.sqrt(v0)) / math.sqrt(v1))
    assert rate_ratio_power(l0, rr, n, dispersion=k, ratio=r, null_variance="control") == pytest.approx(ref, rel=1e-13)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("null_variance", ["pooled", "control", "alternative"])
def test_rate_ratio_n_and_effect_invert_power(alternative, null_variance):
    # Common practice: power(n(power)) = power and power(effect(power)) = power.
    for rate0, disp, expo, r in [(1.2, 2.0, 1.0, 1.0), (0.4, None, 2.5, 2.0), (3.0, 0.7, 0.5, 0.6)]:
        rr = 0.75 if alternative == "less" else 1.3
        kw = dict(exposure=expo, dispersion=disp, ratio=r, alternative=alternative, null_variance=null_variance)
        n = rate_ratio_n(rate0, rr, 0.85, **kw)
        assert rate_ratio_power(rate0, rr, n, **kw) == pytest.approx(0.85, abs=1e-10)
        found = rate_ratio_effect(rate0, n, 0.85, **kw)
        assert found == pytest.approx(rr, rel=1e-8)
    with pytest.raises(ParameterError, match="no rate ratio below 1 reaches power"):
        rate_ratio_effect(0.1, 5, 0.9, dispersion=0.5, alternative="less")


def _nb_wald(batch, dispersion, pooled):
    """Wald z of log(ybar1 / ybar0) with known k: SE^2 = sum over arms (1/ybar + 1/k) / n_arm."""
    y, arm = batch.per_rep["y"], batch["arm"]
    y0, y1 = y[:, arm == 0].mean(axis=1), y[:, arm == 1].mean(axis=1)
    n0, n1 = int(np.sum(arm == 0)), int(np.sum(arm == 1))
    inv_k = 0.0 if dispersion is None else 1.0 / dispersion
    if pooled:
        yb = (n0 * y0 + n1 * y1) / (n0 + n1)
        se = np.sqrt((1 / yb + inv_k) * (1 / n0 + 1 / n1))
    else:
        se = np.sqrt((1 / y0 + inv_k) / n0 + (1 / y1 + inv_k) / n1)
    return np.log(y1 / y0) / se, np.log(y1 / y0), se


@pytest.mark.slow
@pytest.mark.parametrize("dispersion, ratio, alternative", [(2.0, 1.0, "two-sided"), (0.8, 2.0, "less")])
def test_rate_ratio_n_by_simulation_with_the_counts_process(dispersion, ratio, alternative):
    # Reference: counts simulated by simpower.processes.counts.CountTwoArm and tested with the
    # negative binomial Wald test at known k (its SE checked against the project's negbin_glm,
    # i.e. statsmodels' GLM, on a few replicates) and with the pooled-variance (score-type) test.
    # Allowance: 4 MCSE plus 0.01 for the large-sample (delta-method) approximation, stated
    # before the run for arms of about 160-330 with mean counts near 1.
    from simpower.analyses.counts import NegBinGLM
    from simpower.processes.counts import CountTwoArm

    reps = 10000
    crit = _z(0.975) if alternative == "two-sided" else _z(0.95)
    for nv in ("alternative", "pooled"):
        n = ceil_n(rate_ratio_n(1.2, 0.7, 0.8, dispersion=dispersion, ratio=ratio, alternative=alternative,
                                null_variance=nv))
        proc = CountTwoArm(n=n, rate0=1.2, rate_ratio=0.7, dispersion=dispersion, ratio=ratio)
        batch = proc.draw_batch(np.random.default_rng([2014, len(nv), int(10 * ratio)]), reps)
        z, est, se = _nb_wald(batch, dispersion, pooled=(nv == "pooled"))
        if nv == "alternative":
            for i in range(3):
                fit = NegBinGLM(dispersion=dispersion)(batch.replicate(i))
                assert fit.estimate == pytest.approx(est[i], rel=1e-8)
                assert fit.se == pytest.approx(se[i], rel=1e-5)
        rejected = (np.abs(z) > crit) if alternative == "two-sided" else (z < -crit)
        expected = rate_ratio_power(1.2, 0.7, proc.n, dispersion=dispersion, ratio=proc.n1 / proc.n,
                                    alternative=alternative, null_variance=nv)
        assert _within(rejected.mean(), expected, reps, allowance=0.01), (nv, rejected.mean(), expected)


def test_rate_ratio_poisson_by_simulation_with_the_project_poisson_glm():
    # Reference: Poisson counts from CountTwoArm analysed by the project's poisson_glm (batch path:
    # the closed-form Poisson MLE and Wald SE); allowance 4 MCSE + 0.01 as above.
    from simpower.analyses.counts import PoissonGLM
    from simpower.processes.counts import CountTwoArm

    reps = 10000
    n = ceil_n(rate_ratio_n(0.8, 0.7, 0.8, exposure=1.5, null_variance="alternative"))
    proc = CountTwoArm(n=n, rate0=0.8, rate_ratio=0.7, exposure=1.5)
    out = PoissonGLM().batch(proc.draw_batch(np.random.default_rng(1991), reps))
    simulated = np.mean(out["pvalue"] <= 0.05)
    expected = rate_ratio_power(0.8, 0.7, n, exposure=1.5, null_variance="alternative")
    assert _within(simulated, expected, reps, allowance=0.01), (simulated, expected)


# --------------------------------------------------------------------------- 6. correlation
@pytest.mark.parametrize("r, table_n", [(0.1, 783), (0.3, 85)])
def test_corr_n_cohen_table(r, table_n):
    # Reference: Cohen (1988), Table 3.4.1, and Cohen (1992), Psychological Bulletin 112:155, Table 2:
    # n = 783 for r = .1 and 85 for r = .3, two-sided alpha .05, power .80 (values from memory).
    assert ceil_n(corr_n(r, 0.8)) == table_n


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_corr_fisher_z_formula_and_inverses(alternative):
    # Reference: Fisher (1921): atanh(r_hat) ~ N(atanh r, 1/(n - 3)); one-sided
    # n = 3 + ((z_a + z_b) / (atanh r - atanh r0))^2 (common practice).
    for r, r0 in [(0.3, 0.0), (0.5, 0.2), (-0.4, -0.1)]:
        if (alternative == "greater" and r < r0) or (alternative == "less" and r > r0):
            r, r0 = r0, r
        n = corr_n(r, 0.9, r0=r0, alternative=alternative)
        if alternative != "two-sided":
            ref = 3 + ((_z(0.95) + _z(0.9)) / (math.atanh(r) - math.atanh(r0))) ** 2
            assert n == pytest.approx(ref, rel=1e-13)
        assert corr_power(n, r, r0=r0, alternative=alternative) == pytest.approx(0.9, abs=1e-12)
        # two-sided answers lie above r0: the mirror image of r on the z scale when r < r0
        mirrored = r if alternative != "two-sided" or r > r0 else math.tanh(2 * math.atanh(r0) - math.atanh(r))
        assert corr_effect(n, 0.9, r0=r0, alternative=alternative) == pytest.approx(mirrored, rel=1e-10)


def test_corr_power_by_simulation_with_pearsonr():
    # Reference: bivariate normal samples tested with scipy.stats.pearsonr (the exact t-test of
    # r = 0); within 4 MCSE plus 0.01 for Fisher's approximation, whose neglected bias
    # r / (2(n - 1)) moves the power at n = 85, r = 0.3 by about 0.005 (allowance stated before the run).
    rng = np.random.default_rng(1921)
    reps, n, rho = 4000, 85, 0.3
    x = rng.standard_normal((reps, n))
    y = rho * x + math.sqrt(1 - rho**2) * rng.standard_normal((reps, n))
    res = stats.pearsonr(x, y, axis=1)
    assert _within(np.mean(res.pvalue <= 0.05), corr_power(n, rho), reps, allowance=0.01)
    # r0 != 0 (no exact test in scipy): the Fisher-z test of the simulated pearsonr statistics
    z = (np.arctanh(res.statistic) - math.atanh(0.1)) * math.sqrt(n - 3)
    assert _within(np.mean(z > _z(0.95)), corr_power(n, rho, r0=0.1, alternative="greater"), reps, allowance=0.01)


# --------------------------------------------------------------------------- shapes and errors
def test_scalar_in_float_out_array_in_array_out():
    assert type(cohen_h(0.3, 0.2)) is float and type(corr_power(50, 0.3)) is float
    assert type(binom_exact_n(0.8, 0.5, 0.8)) is int
    out = arcsine_power(0.5, np.array([0.6, 0.7]), np.array([[20], [80]]))
    assert out.shape == (2, 2) and out[1, 0] == pytest.approx(arcsine_power(0.5, 0.6, 80), rel=1e-14)
    ns = binom_exact_n(np.array([0.8, 0.7]), 0.5, 0.8)
    assert ns.dtype == np.int64 and ns.tolist() == [binom_exact_n(0.8, 0.5, 0.8), binom_exact_n(0.7, 0.5, 0.8)]
    assert binom_exact_power(np.array([20, 21]), 0.8, 0.5).shape == (2,)
    assert rate_ratio_n(1.0, [0.6, 0.7], 0.8).shape == (2,)
    assert noether_n([0.6, 0.7], 0.8).shape == (2,)
    assert freedman_events([0.5, 0.7], 0.8).shape == (2,)


@pytest.mark.parametrize("call, message", [
    (lambda: cohen_h(1.2, 0.5), "`p1` must be in [0, 1]; got 1.2."),
    (lambda: arcsine_n(0.5, 0.5, 0.8), "`h` must be != 0"),
    (lambda: arcsine_power(0.4, 0.5, 20, ratio=0), "`ratio` must be > 0; got 0."),
    (lambda: binom_exact_power(20.5, 0.6, 0.5), "`n` must be a whole number >= 1; got 20.5."),
    (lambda: binom_exact_power(20, 0.6, 1.0), "`p0` must be in (0, 1); got 1."),
    (lambda: binom_exact_n(0.4, 0.5, 0.8, alternative="greater"), "`p - p0` must be > 0"),
    (lambda: binom_exact_n(0.51, 0.5, 0.9, n_max=100), "`n_max` = 100 is too small"),
    (lambda: binom_exact_n(0.8, 0.5, 0.8, robust="yes"), "`robust` must be True or False"),
    (lambda: freedman_events(1.0, 0.8), "`log(hazard_ratio)` must be != 0"),
    (lambda: freedman_power(0.5, 0), "`events` must be > 0; got 0."),
    (lambda: noether_n(0.5, 0.8), "`p_superior - 1/2` must be != 0"),
    (lambda: noether_effect(2, 0.99), "`n` = 2 is too small"),
    (lambda: rate_ratio_power(1.0, 0.7, 100, dispersion=0), "`dispersion` must be > 0; got 0."),
    (lambda: rate_ratio_power(1.0, 0.7, 100, null_variance="score"), "`null_variance` must be one of"),
    (lambda: rate_ratio_n(1.0, 1.0, 0.8), "`log(rate_ratio)` must be != 0"),
    (lambda: corr_power(3, 0.3), "`n` must be > 3; got 3."),
    (lambda: corr_n(1.0, 0.8), "`r` must be in (-1, 1); got 1."),
    (lambda: corr_n(0.3, 0.8, alternative="two_sided"), "Did you mean 'two-sided'?"),
])
def test_bad_input_gives_one_line_parameter_error(call, message):
    with pytest.raises(ParameterError) as info:
        call()
    text = str(info.value)
    assert message in text and "\n" not in text


# --------------------------------------------------------------------------- properties
@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_power_at_the_null_is_alpha_and_rises_with_n(alternative):
    # Common practice: a test's power at the null is its size (alpha for these normal-theory
    # tests), and power grows with the sample size.
    alphas = np.array([0.01, 0.05, 0.2])
    at_null = [
        arcsine_power(0.3, 0.3, 50, alpha=alphas, alternative=alternative),
        freedman_power(1.0, 80, alpha=alphas, alternative=alternative),
        noether_power(0.5, 40, alpha=alphas, alternative=alternative),
        corr_power(60, 0.25, r0=0.25, alpha=alphas, alternative=alternative),
    ]
    for nv in ("pooled", "control", "alternative"):
        at_null.append(rate_ratio_power(1.5, 1.0, 90, dispersion=1.5, alpha=alphas, alternative=alternative,
                                        null_variance=nv))
    for got in at_null:
        np.testing.assert_allclose(got, alphas, rtol=1e-12)
    n = np.array([10.0, 40.0, 160.0, 640.0])
    sign = -1 if alternative == "less" else 1
    for curve in (arcsine_power(0.4, 0.4 + 0.1 * sign, n, alternative=alternative),
                  freedman_power(np.exp(0.4 * sign), n, alternative=alternative),
                  noether_power(0.5 + 0.08 * sign, n, alternative=alternative),
                  corr_power(n, 0.15 * sign, alternative=alternative),
                  rate_ratio_power(0.9, np.exp(0.3 * sign), n, dispersion=3.0, alternative=alternative)):
        assert np.all(np.diff(curve) > 0) and curve[-1] > 0.9
