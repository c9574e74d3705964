"""Mann-Whitney and Wilcoxon signed-rank analyses: scipy agreement, batch paths, estimates, efficiency."""

import math

import numpy as np
import pytest
from scipy import optimize, stats

import simpower as sp
from simpower.analyses.nonparametric import MannWhitney, WilcoxonSignedRank, rank_rows
from simpower.errors import ParameterError
from simpower.processes.base import Batch

ALTERNATIVES = ("two-sided", "greater", "less")


def tied_two_arm_batch(seed=3, reps=60, n0=13, n1=17, shift=0.4):
    """Normal data rounded to halves, so ties are common."""
    rng = np.random.default_rng(seed)
    y = rng.normal(size=(reps, n0 + n1))
    y[:, n0:] += shift
    y = np.round(y * 2) / 2
    return Batch(reps, {"y": y}, {"arm": np.repeat(np.array([0, 1], np.int8), [n0, n1])})


def test_rank_rows_matches_scipy_rankdata_with_ties():
    # reference: scipy.stats.rankdata(method="average") and the tie term sum(t^3 - t)
    rng = np.random.default_rng(0)
    a = np.round(rng.normal(size=(40, 25)), 0)
    ranks, tie = rank_rows(a)
    np.testing.assert_array_equal(ranks, stats.rankdata(a, axis=1))
    ref = [sum(c**3 - c for c in np.unique(row, return_counts=True)[1]) for row in a]
    np.testing.assert_array_equal(tie, ref)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("continuity", [True, False])
def test_mann_whitney_matches_scipy_per_replicate(alternative, continuity):
    # reference: scipy.stats.mannwhitneyu(arm 1, arm 0, method="asymptotic")
    b = tied_two_arm_batch()
    a = MannWhitney(alternative=alternative, continuity=continuity)
    for i in range(10):
        d = b.replicate(i)
        y0, y1 = d["y"][d["arm"] == 0], d["y"][d["arm"] == 1]
        ref = stats.mannwhitneyu(y1, y0, use_continuity=continuity, alternative=alternative, method="asymptotic")
        r = a(d)
        assert r.pvalue == pytest.approx(ref.pvalue, rel=1e-12, abs=1e-15)
        assert r.statistic == ref.statistic


def test_mann_whitney_direction_greater_means_arm1_larger():
    # common practice: H1 'greater' = arm 1 tends to exceed arm 0
    rng = np.random.default_rng(1)
    d = {"y": np.r_[rng.normal(size=30), rng.normal(size=30) + 1.5], "arm": np.repeat([0, 1], 30)}
    assert MannWhitney(alternative="greater")(d).pvalue < 0.001
    assert MannWhitney(alternative="less")(d).pvalue > 0.999


@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("continuity", [True, False])
@pytest.mark.parametrize("estimand", ["shift", "probability"])
def test_mann_whitney_batch_equals_per_replicate(alternative, continuity, estimand):
    b = tied_two_arm_batch()
    a = MannWhitney(alternative=alternative, continuity=continuity, estimand=estimand,
                    null_value=0.25 if estimand == "shift" else 0.0)
    assert a.supports_batch(b)
    out = a.batch(b)
    per = [a(b.replicate(i)) for i in range(b.size)]
    for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
        ref = np.array([getattr(r, f) for r in per])
        np.testing.assert_allclose(out[f], ref, rtol=0, atol=1e-10, equal_nan=True, err_msg=f)


def test_hodges_lehmann_shift_and_probability_index_definitions():
    # Hodges & Lehmann (1963): median of all differences y1_j - y0_i;
    # probability index P(Y1 > Y0) + P(Y1 = Y0)/2 = U1 / (n0 n1) (Mann & Whitney 1947), with the
    # placement variance of DeLong, DeLong & Clarke-Pearson (1988, eq. 2) computed here by brute force
    b = tied_two_arm_batch(reps=5)
    for i in range(b.size):
        d = b.replicate(i)
        y0, y1 = d["y"][d["arm"] == 0], d["y"][d["arm"] == 1]
        diffs = np.subtract.outer(y1, y0)
        assert MannWhitney()(d).estimate == pytest.approx(np.median(diffs), abs=1e-12)
        psi = (diffs > 0) + 0.5 * (diffs == 0)
        v10, v01 = psi.mean(axis=1), psi.mean(axis=0)
        se = math.sqrt(v10.var(ddof=1) / y1.size + v01.var(ddof=1) / y0.size)
        r = MannWhitney(estimand="probability")(d)
        assert r.estimate == pytest.approx(psi.mean(), abs=1e-12)
        assert r.se == pytest.approx(se, rel=1e-10)


def mann_whitney_null_counts(n0, n1):
    """Counts of U = 0..n0 n1 under H0 (Mann & Whitney 1947 recurrence c(u; m, n) = c(u - n; m - 1, n) + c(u; m, n - 1))."""
    table = {}

    def c(m, n):
        if (m, n) in table:
            return table[(m, n)]
        if m == 0 or n == 0:
            out = np.zeros(m * n + 1)
            out[0] = 1.0
        else:
            out = np.zeros(m * n + 1)
            a = c(m - 1, n)  # the largest observation is from the first sample: it beats all n of the second
            out[n:n + a.size] += a
            b = c(m, n - 1)
            out[:b.size] += b
        table[(m, n)] = out
        return out

    return c(n0, n1)


def test_hodges_lehmann_interval_has_its_exact_coverage():
    # The interval [D_(k), D_(m+1-k)] covers the true shift exactly when k <= U <= m - k, U ~ the
    # Mann-Whitney null distribution (Hollander & Wolfe 1999, sec. 4.3). Simulated coverage must match
    # that exact probability within 4 MCSE; an off-by-one k would move it by about 2 P(U = k) (> 6 MCSE here).
    n0 = n1 = 10
    m = n0 * n1
    counts = mann_whitney_null_counts(n0, n1)
    assert counts.sum() == math.comb(n0 + n1, n0) and np.array_equal(counts, counts[::-1])
    pmf = counts / counts.sum()
    z = stats.norm.ppf(0.975)
    k = int(math.floor(m / 2 - z * math.sqrt(m * (n0 + n1 + 1) / 12) + 0.5))
    exact = pmf[k:m - k + 1].sum()
    assert abs(exact - 0.95) < 0.01  # the large-sample k is close to nominal at this size
    assert 2 * pmf[k] > 0.006
    sc = sp.Scenario(sp.NormalTwoArm(n=n0, effect=0.7), MannWhitney())
    res = sp.run(sc, reps=6000, seed=11, n_jobs=1)
    s = res.summaries["mann_whitney"]
    assert res.paths["mann_whitney"] == "batch"
    assert abs(s["coverage"] - exact) < 4 * math.sqrt(exact * (1 - exact) / s["n_ci"])


def test_mann_whitney_efficiency_under_normality_is_three_over_pi():
    # Hodges & Lehmann (1956, Ann Math Stat 27:324-335): under normality the Mann-Whitney test's
    # asymptotic efficiency relative to the t-test is 3/pi = 0.955. Find the t-test size n_t with the
    # Mann-Whitney power at n = 60 per arm (exact noncentral-t power, computed here from scipy):
    # n_t / n over the power's +-4 MCSE band must contain 3/pi and exclude 1 and 0.9.
    n, effect, reps = 60, 0.45, 40000

    def t_power(m):
        df = 2 * m - 2
        nc = effect / math.sqrt(2 / m)
        c = stats.t.ppf(0.975, df)
        return stats.nct.sf(c, df, nc) + stats.nct.cdf(-c, df, nc)

    sc = sp.Scenario(sp.NormalTwoArm(n=n, effect=effect), MannWhitney(estimand="probability"))
    res = sp.run(sc, reps=reps, seed=7, n_jobs=1)
    lo_p, hi_p = res.power - 4 * res.mcse, res.power + 4 * res.mcse
    eff_lo = optimize.brentq(lambda m: t_power(m) - lo_p, 10, 200) / n
    eff_hi = optimize.brentq(lambda m: t_power(m) - hi_p, 10, 200) / n
    assert eff_lo < 3 / math.pi < eff_hi
    assert eff_hi < 1.0 and eff_lo > 0.9


# -- signed rank ---------------------------------------------------------------------------
def tied_one_sample_batch(seed=5, reps=60, n=20, shift=0.3):
    rng = np.random.default_rng(seed)
    y = np.round((rng.normal(size=(reps, n)) + shift) * 2) / 2  # ties and zeros
    return Batch(reps, {"y": y})


@pytest.mark.parametrize("alternative", ALTERNATIVES)
@pytest.mark.parametrize("continuity", [True, False])
def test_signed_rank_matches_scipy_and_batch(alternative, continuity):
    # reference: scipy.stats.wilcoxon(d, method="asymptotic") with zeros dropped (zero_method="wilcox")
    b = tied_one_sample_batch()
    assert np.any(b.per_rep["y"] == 0)
    a = WilcoxonSignedRank(alternative=alternative, continuity=continuity)
    per = [a(b.replicate(i)) for i in range(b.size)]
    for i in range(5):
        ref = stats.wilcoxon(b.per_rep["y"][i], correction=continuity, alternative=alternative, method="asymptotic")
        assert per[i].pvalue == pytest.approx(ref.pvalue, rel=1e-12)
    out = a.batch(b)
    for f in ("pvalue", "estimate", "ci_low", "ci_high"):
        np.testing.assert_allclose(out[f], [getattr(r, f) for r in per], rtol=0, atol=1e-10, err_msg=f)


def test_signed_rank_paired_batch_and_pseudo_median():
    # paired layout: differences arm 1 - arm 0; Hodges-Lehmann pseudo-median = median of Walsh averages
    sc = sp.NormalPaired(n=15, effect=0.5, corr=0.4)
    b = sc.draw_batch(np.random.default_rng(2), 30)
    a = WilcoxonSignedRank(null_value=0.2)
    assert a.supports_batch(b)
    out = a.batch(b)
    for i in range(b.size):
        r = a(b.replicate(i))
        assert out["pvalue"][i] == pytest.approx(r.pvalue, abs=1e-10)
        d = b.per_rep["y"][i, 15:] - b.per_rep["y"][i, :15]
        ref = stats.wilcoxon(d - 0.2, method="asymptotic", correction=False)
        assert r.pvalue == pytest.approx(ref.pvalue, rel=1e-12)
        walsh = [(d[p] + d[q]) / 2 for p in range(15) for q in range(p, 15)]
        assert r.estimate == pytest.approx(np.median(walsh), abs=1e-12)


def test_signed_rank_type_one_error_within_bradley_band():
    # the signed-rank statistic is distribution-free under a symmetric null, and its normal
    # approximation is accurate from about n = 20 (from memory: Hollander & Wolfe 1999, sec. 3.1):
    # type I error within 4 MCSE of alpha, and inside Bradley's (1978) liberal band
    reps = 4000
    sc = sp.Scenario(sp.NormalOneSample(n=25), WilcoxonSignedRank())
    res = sp.run(sc, reps=reps, seed=3, n_jobs=1)
    assert res.paths["wilcoxon_signed_rank"] == "batch"
    assert sp.bradley_liberal(res.power, 0.05)
    assert abs(res.power - 0.05) < 4 * math.sqrt(0.05 * 0.95 / reps)


def test_bad_parameters_name_the_field():
    with pytest.raises(ParameterError, match="estimand"):
        MannWhitney(estimand="median")
    with pytest.raises(ParameterError, match="ci_level"):
        WilcoxonSignedRank(ci_level=1.5)
    with pytest.raises(ParameterError, match="continuity"):
        MannWhitney(continuity="yes")


def test_mann_whitney_rejects_one_sample_layout():
    with pytest.raises(ValueError, match="arm"):
        MannWhitney()({"y": np.arange(5.0)})


def test_probability_index_is_unbiased_and_labelled():
    # U / (n0 n1) is unbiased for P(Y1 > Y0) (Mann & Whitney 1947); for normal arms with unit SD and
    # shift d that probability is Phi(d / sqrt(2)). Without the true value the summary has no bias.
    reps, d = 3000, 0.5
    proc = sp.NormalTwoArm(n=20, effect=d)
    a = MannWhitney(estimand="probability")
    assert a.estimand_label == "probability index" and MannWhitney().estimand_label == "location shift"
    plain = sp.run(sp.Scenario(proc, a), reps=200, seed=1, n_jobs=1)
    assert "bias" not in plain.summaries["mann_whitney"]
    truth = stats.norm.cdf(d / math.sqrt(2))
    res = sp.run(sp.Scenario(proc, a, true_effects={"mann_whitney": truth}), reps=reps, seed=2, n_jobs=1)
    s = res.summaries["mann_whitney"]
    assert abs(s["bias"]) < 4 * s["bias_mcse"]


def test_rank_rows_mixed_tied_and_untied_rows_match_scipy():
    # reference: scipy.stats.rankdata (average ranks) and the tie term sum(t^3 - t)
    rng = np.random.default_rng(11)
    y = rng.standard_normal((30, 25))
    y[::3] = np.round(y[::3], 1)  # every third row has ties, the others none
    ranks, tie = rank_rows(y)
    assert np.allclose(ranks, stats.rankdata(y, axis=1))
    expect = [sum(c**3 - c for c in np.unique(row, return_counts=True)[1]) for row in y]
    assert np.allclose(tie, expect)


def test_mann_whitney_pvalue_only_estimand():
    from simpower.processes.normal import NormalTwoArm

    batch = NormalTwoArm(n=15, effect=0.4).draw_batch(np.random.default_rng(2), 40)
    an = MannWhitney(estimand="none")
    out = an.batch(batch)
    assert set(out) == {"pvalue"}
    for i in range(40):
        d = batch.replicate(i)
        ref = stats.mannwhitneyu(d["y"][d["arm"] == 1], d["y"][d["arm"] == 0], method="asymptotic").pvalue
        assert out["pvalue"][i] == pytest.approx(ref, rel=1e-10)
        assert an(d).pvalue == pytest.approx(ref, rel=1e-12)
