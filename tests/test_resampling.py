"""Permutation test, bootstrap CI and log-scale t-test."""

import itertools
import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower._validation import Int, Real
from simpower.analyses.resampling import BootstrapCI, LogT, PermutationTest, data_rng
from simpower.errors import ParameterError
from simpower.processes.base import Batch, Process


class LogNormalTwoArm(Process):
    """Test process: log y ~ N(0, sigma^2) in arm 0 and N(effect, sigma^2) in arm 1; estimand exp(effect)."""

    params = {"n": Int(low=2), "effect": Real(), "sigma": Real(0.0, low_open=True)}
    defaults = {"effect": 0.0, "sigma": 1.0}
    estimand_label = "ratio of geometric means"

    def draw_batch(self, rng, size):
        z = rng.standard_normal((size, 2 * self.n)) * self.sigma
        z[:, self.n:] += self.effect
        return Batch(size, {"y": np.exp(z)}, {"arm": np.repeat(np.array([0, 1], np.int8), self.n)})

    def true_effect(self):
        return math.exp(self.effect)


def two_arm(seed, n0=12, n1=15, shift=0.5):
    rng = np.random.default_rng(seed)
    y0, y1 = rng.exponential(size=n0), rng.exponential(size=n1) + shift
    return {"y": np.r_[y0, y1], "arm": np.repeat([0, 1], [n0, n1])}, y0, y1


# -- reproducible resampling ---------------------------------------------------------------
def test_data_rng_depends_only_on_seed_and_data():
    x = np.arange(5.0)
    a = data_rng(3, x, x + 1).random(4)
    np.testing.assert_array_equal(a, data_rng(3, x.copy(), x + 1).random(4))
    assert not np.array_equal(a, data_rng(4, x, x + 1).random(4))
    assert not np.array_equal(a, data_rng(3, x + 1, x).random(4))
    # the split between arrays matters, not only the concatenated bytes
    assert not np.array_equal(a, data_rng(3, np.r_[x, 0.0], (x + 1)[1:]).random(4))


def test_permutation_results_do_not_depend_on_job_count():
    sc = sp.Scenario(LogNormalTwoArm(n=10, effect=0.5), PermutationTest(n_resamples=99))
    one = sp.run(sc, reps=120, seed=5, n_jobs=1, chunk_size=40)
    two = sp.run(sc, reps=120, seed=5, n_jobs=2, chunk_size=40)
    np.testing.assert_array_equal(one.pvalues, two.pvalues)
    assert len(np.unique(one.pvalues)) > 10


# -- permutation test ----------------------------------------------------------------------
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize("statistic", ["mean", "median"])
def test_permutation_test_is_exact_by_enumeration(alternative, statistic):
    # Fisher (1935) / Pitman (1937): with all C(10, 5) = 252 splits enumerated the p-value is the share
    # of splits at least as extreme; n_resamples >= 252 makes scipy enumerate them.
    d, y0, y1 = two_arm(1, 5, 5)
    loc = np.mean if statistic == "mean" else np.median
    pooled = np.r_[y1, y0]
    obs = loc(y1) - loc(y0)
    stats_all = []
    for idx in itertools.combinations(range(10), 5):
        mask = np.zeros(10, bool)
        mask[list(idx)] = True
        stats_all.append(loc(pooled[mask]) - loc(pooled[~mask]))
    t = np.array(stats_all)
    tol = 1e-12 * max(1.0, abs(obs))
    p_greater, p_less = np.mean(t >= obs - tol), np.mean(t <= obs + tol)
    ref = {"greater": p_greater, "less": p_less, "two-sided": min(1.0, 2 * min(p_greater, p_less))}[alternative]
    r = PermutationTest(statistic=statistic, alternative=alternative, n_resamples=500)(d)
    assert r.pvalue == pytest.approx(ref, abs=1e-12)
    assert r.estimate == pytest.approx(obs)


def test_sign_flip_permutation_for_pairs_by_enumeration():
    # one-sample / paired layout: all 2^8 sign flips of the differences (Fisher 1935)
    rng = np.random.default_rng(4)
    d = rng.normal(0.4, 1, size=8)
    obs = d.mean()
    flips = np.array([(np.array(s) * d).mean() for s in itertools.product([-1, 1], repeat=8)])
    ref = min(1.0, 2 * min(np.mean(flips >= obs - 1e-12), np.mean(flips <= obs + 1e-12)))
    paired = {"y": np.r_[np.zeros(8), d], "arm": np.repeat([0, 1], 8), "pair": np.tile(np.arange(8), 2)}
    assert PermutationTest(n_resamples=1000)(paired).pvalue == pytest.approx(ref, abs=1e-12)
    assert PermutationTest(n_resamples=1000)({"y": d}).pvalue == pytest.approx(ref, abs=1e-12)


def test_permutation_test_holds_alpha_on_skewed_data():
    # a Monte Carlo permutation p-value (k + 1)/(B + 1) has P(p <= alpha) <= alpha exactly when
    # alpha (B + 1) is an integer (Phipson & Smyth 2010, Stat Appl Genet Mol Biol 9:39): the type I
    # error must sit within 4 MCSE of 0.05 on lognormal data, where exchangeability holds under H0
    reps = 1000
    sc = sp.Scenario(LogNormalTwoArm(n=12, sigma=1.2), PermutationTest(n_resamples=199))
    res = sp.run(sc, reps=reps, seed=2, n_jobs=1)
    assert abs(res.power - 0.05) < 4 * math.sqrt(0.05 * 0.95 / reps)


# -- bootstrap -------------------------------------------------------------------------------
@pytest.mark.parametrize("method", ["percentile", "basic", "bca"])
def test_bootstrap_ci_is_scipys(method):
    # reference: scipy.stats.bootstrap with the same resamples
    d, y0, y1 = two_arm(2)
    a = BootstrapCI(method=method, n_resamples=999, seed=7)
    r = a(d)
    ref = stats.bootstrap((y0, y1), lambda u, v, axis=-1: v.mean(axis=axis) - u.mean(axis=axis), vectorized=True,
                          n_resamples=999, method=method, rng=data_rng(7, y0, y1))
    assert (r.ci_low, r.ci_high) == pytest.approx(tuple(ref.confidence_interval), rel=1e-12)
    assert r.se == pytest.approx(ref.standard_error)
    assert r.estimate == pytest.approx(y1.mean() - y0.mean())


@pytest.mark.parametrize("method", ["percentile", "basic", "bca"])
@pytest.mark.parametrize("statistic", ["mean", "median"])
def test_bootstrap_pvalue_inverts_scipys_interval(method, statistic):
    # Duality: at null value theta0 with two-sided p-value p, scipy's interval of level 1 - p (same
    # bootstrap distribution) has an endpoint at theta0, up to the gap between the bootstrap values
    # around theta0 (scipy interpolates quantiles). Checked over several theta0.
    d, y0, y1 = two_arm(3, 20, 20)
    loc = np.mean if statistic == "mean" else np.median

    def stat(u, v, axis=-1):
        return loc(v, axis=axis) - loc(u, axis=axis)

    base = stats.bootstrap((y0, y1), stat, vectorized=True, n_resamples=1999, method=method,
                           rng=data_rng(0, y0, y1))
    boot = np.sort(base.bootstrap_distribution)
    theta = stat(y0, y1)
    for q in (0.01, 0.03, 0.1, 0.3, 0.7, 0.9, 0.97):
        theta0 = float(np.quantile(boot, q))
        if method == "basic":
            theta0 = 2 * theta - theta0
        p = BootstrapCI(method=method, statistic=statistic, n_resamples=1999, null_value=theta0)(d).pvalue
        assert 0 < p < 1
        ci = stats.bootstrap((y0, y1), stat, vectorized=True, n_resamples=0, bootstrap_result=base,
                             method=method, confidence_level=1 - p).confidence_interval
        end = ci.low if abs(ci.low - theta0) < abs(ci.high - theta0) else ci.high

        def on_dist(v):  # basic endpoints are 2 theta minus a bootstrap quantile
            return 2 * theta - v if method == "basic" else v

        x, e = on_dist(theta0), on_dist(end)
        j = np.searchsorted(boot, x)  # boot[j - 1] < x <= boot[j]
        gap_lo, gap_hi = boot[max(j - 2, 0)], boot[min(j + 1, boot.size - 1)]
        assert gap_lo - 1e-12 <= e <= gap_hi + 1e-12, (q, theta0, end, gap_lo, gap_hi)


def test_bootstrap_pvalue_agrees_with_ci_exclusion():
    # p <= 1 - level exactly when the level's CI excludes the null value (away from the 1/B granularity)
    d, y0, y1 = two_arm(4)
    a = BootstrapCI(method="bca", n_resamples=1999)
    ci = a(d)
    width = ci.ci_high - ci.ci_low
    for theta0 in np.linspace(ci.ci_low - width, ci.ci_high + width, 23):
        if min(abs(theta0 - ci.ci_low), abs(theta0 - ci.ci_high)) < 0.05 * width:
            continue
        p = a.replace(null_value=float(theta0))(d).pvalue
        assert (p <= 0.05) == (theta0 < ci.ci_low or theta0 > ci.ci_high)


def test_bootstrap_one_sided_pvalues_complement():
    d, *_ = two_arm(5)
    g = BootstrapCI(alternative="greater", null_value=0.2)(d).pvalue
    le = BootstrapCI(alternative="less", null_value=0.2)(d).pvalue
    two = BootstrapCI(null_value=0.2)(d).pvalue
    assert g + le == pytest.approx(1.0)
    assert two == pytest.approx(min(1.0, 2 * min(g, le)))


# -- log-scale t-test ---------------------------------------------------------------------
@pytest.mark.parametrize("equal_var", [True, False])
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_log_t_matches_scipy_and_batch(equal_var, alternative):
    proc = LogNormalTwoArm(n=14, effect=0.3)
    b = proc.draw_batch(np.random.default_rng(1), 40)
    a = LogT(equal_var=equal_var, alternative=alternative, null_ratio=1.1)
    out = a.batch(b)
    for i in range(b.size):
        d = b.replicate(i)
        l0, l1 = np.log(d["y"][d["arm"] == 0]), np.log(d["y"][d["arm"] == 1])
        ref = stats.ttest_ind(l1 - math.log(1.1), l0, equal_var=equal_var, alternative=alternative)
        ci = stats.ttest_ind(l1, l0, equal_var=equal_var).confidence_interval(0.95)
        r = a(d)
        assert r.pvalue == pytest.approx(ref.pvalue, rel=1e-10)
        assert r.estimate == pytest.approx(math.exp(l1.mean() - l0.mean()))
        assert (r.ci_low, r.ci_high) == pytest.approx((math.exp(ci.low), math.exp(ci.high)), rel=1e-10)
        for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
            assert out[f][i] == pytest.approx(getattr(r, f), rel=1e-10, abs=1e-14)


def test_log_t_power_and_coverage_on_lognormal_data():
    # log y normal: Student's t on logs has the exact noncentral-t power (computed here from scipy) and
    # its exponentiated CI covers the ratio of geometric means exp(effect) at 95% (both within 4 MCSE)
    n, effect, reps = 20, 0.5, 4000
    sc = sp.Scenario(LogNormalTwoArm(n=n, effect=effect, sigma=0.8), LogT(equal_var=True))
    res = sp.run(sc, reps=reps, seed=9, n_jobs=1)
    df, nc = 2 * n - 2, effect / (0.8 * math.sqrt(2 / n))
    c = stats.t.ppf(0.975, df)
    power = stats.nct.sf(c, df, nc) + stats.nct.cdf(-c, df, nc)
    assert res.paths["log_t"] == "batch"
    assert abs(res.power - power) < 4 * math.sqrt(power * (1 - power) / reps)
    cov = res.summaries["log_t"]["coverage"]
    assert abs(cov - 0.95) < 4 * math.sqrt(0.95 * 0.05 / reps)


def shifted_lognormal(rng, n=10):
    y = np.exp(rng.normal(size=2 * n)) - 0.15  # now and then a value <= 0
    return {"y": y, "arm": np.repeat([0, 1], n)}


class ShiftedLogNormal(LogNormalTwoArm):
    def draw_batch(self, rng, size):
        b = super().draw_batch(rng, size)
        b.per_rep["y"] = b.per_rep["y"] - 0.15
        return b


def test_log_t_non_positive_outcomes_are_counted_failures_on_both_paths():
    per = sp.run(sp.Scenario(shifted_lognormal, LogT()), reps=200, seed=1, n_jobs=1)
    bat = sp.run(sp.Scenario(ShiftedLogNormal(n=10), LogT()), reps=200, seed=1, n_jobs=1)
    for res in (per, bat):
        s = res.summaries["log_t"]
        assert set(s["failures"]) == {"error:ValueError"}
        assert 0 < s["n_failed"] < 200
    assert bat.paths["log_t"] == "batch"
    b = ShiftedLogNormal(n=10).draw_batch(np.random.default_rng(0), 50)
    expected = np.any(b.per_rep["y"] <= 0, axis=1)
    assert np.array_equal(np.isnan(LogT().batch(b)["pvalue"]), expected)


def test_bad_parameters_name_the_field():
    with pytest.raises(ParameterError, match="null_ratio"):
        LogT(null_ratio=0)
    with pytest.raises(ParameterError, match="method"):
        BootstrapCI(method="bc")
    with pytest.raises(ParameterError, match="n_resamples"):
        PermutationTest(n_resamples=0)
