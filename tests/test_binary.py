"""Binary outcomes: the binary_two_arm process and the two_proportions, chi_square, fisher_exact and
logistic analyses.

External references named beside each check: scipy.stats (chi2_contingency, fisher_exact),
statsmodels (proportions_ztest, GLM Binomial), Yates (1934) for the continuity-corrected chi-square,
Woolf (1955) for the SE of a log odds ratio, Fleiss, Levin & Paik (2003, Statistical Methods for Rates
and Proportions, 3rd ed., section 4.2; from memory) for the power of the pooled two-proportion z-test.
Monte Carlo tolerances are 4 MCSE, MCSE = sqrt(p(1-p)/R) for a rate (Morris, White & Crowther 2019).
"""

import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from _helpers import per_replicate as _per_rep
from simpower.analyses.binary import ChiSquare, FisherExact, Logistic, TwoProportions, fisher_pvalues
from simpower.engine.chunk import chunk_seed
from simpower.errors import ParameterError
from simpower.processes.base import Missingness
from simpower.processes.binary import BinaryTwoArm


class _Hide(Missingness):
    """Test-only MCAR mechanism (no registry name): each outcome missing with probability 0.2."""

    params = {}

    def mask(self, rng, y, covariates):
        return rng.random(np.shape(y)) < 0.2




# -- the process -------------------------------------------------------------------------------------
@pytest.mark.parametrize("kwargs, field", [
    (dict(p0=1.2, odds_ratio=2.0), "p0"),
    (dict(p0=0.0, odds_ratio=2.0), "p0"),
    (dict(p0=0.4, risk_ratio=2.5), "risk_ratio"),     # 1.0: risk must be < 1
    (dict(p0=0.4, risk_ratio=3.0), "risk_ratio"),
    (dict(p0=0.4, odds_ratio=0.0), "odds_ratio"),
    (dict(p0=0.4, risk_ratio=-1.0), "risk_ratio"),
    (dict(p0=0.4, risk_difference=0.7), "risk_difference"),
    (dict(p0=0.4), "odds_ratio"),                     # no effect given
    (dict(p0=0.4, odds_ratio=2.0, risk_difference=0.1), "risk_difference"),
])
def test_bad_input_is_one_line_naming_the_field(kwargs, field):
    with pytest.raises(ParameterError) as e:
        BinaryTwoArm(n=20, **kwargs)
    msg = str(e.value)
    assert f"`{field}`" in msg and "\n" not in msg


def test_effect_measures_give_the_stated_treatment_risk_and_null():
    # definitions (common practice): odds(p1) = OR * odds(p0); p1 = RR * p0; p1 = p0 + RD
    assert math.isclose(BinaryTwoArm(n=10, p0=0.2, odds_ratio=3.0).p1, 0.75 / 1.75)
    assert math.isclose(BinaryTwoArm(n=10, p0=0.2, risk_ratio=1.5).p1, 0.3)
    assert math.isclose(BinaryTwoArm(n=10, p0=0.2, risk_difference=-0.05).p1, 0.15)
    for kw, param, value in ((dict(odds_ratio=3.0), "odds_ratio", 1.0), (dict(risk_ratio=1.5), "risk_ratio", 1.0),
                             (dict(risk_difference=0.1), "risk_difference", 0.0)):
        null = BinaryTwoArm(n=10, p0=0.2, **kw).null()
        assert getattr(null, param) == value and math.isclose(null.p1, 0.2)
    p = BinaryTwoArm(n=10, p0=0.2, odds_ratio=3.0, estimand="log_odds_ratio")
    assert math.isclose(p.true_effect(), math.log(3.0))
    assert math.isclose(p.replace(estimand="risk_difference").true_effect(), 0.75 / 1.75 - 0.2)


def test_realised_risks_match_p0_and_p1():
    # binomial mean: the event proportion of R*n draws has MCSE sqrt(p(1-p)/(R n)) (common practice)
    proc = BinaryTwoArm(n=40, p0=0.25, risk_ratio=1.8, ratio=1.5)
    b = proc.draw_batch(np.random.default_rng(2024), 2000)
    arm = b.shared["arm"]
    assert (arm == 0).sum() == 40 and (arm == 1).sum() == 60
    for a, p in ((0, proc.p0), (1, proc.p1)):
        y = b.per_rep["y"][:, arm == a]
        assert set(np.unique(y).tolist()) == {0.0, 1.0}
        assert abs(y.mean() - p) < 4 * math.sqrt(p * (1 - p) / y.size)


def test_missingness_hides_outcomes_and_is_recorded():
    b = BinaryTwoArm(n=200, p0=0.3, odds_ratio=1.5, missing=_Hide()).draw_batch(np.random.default_rng(3), 50)
    hidden = np.isnan(b.per_rep["y"])
    assert b.info["missing"] is True
    assert np.array_equal(b.per_rep["observed"] == 0, hidden)
    frac = hidden.mean()
    assert abs(frac - 0.2) < 4 * math.sqrt(0.2 * 0.8 / hidden.size)


def test_draws_depend_only_on_the_rng():
    proc = BinaryTwoArm(n=30, p0=0.3, odds_ratio=2.0)
    a = proc.draw_batch(np.random.default_rng(9), 10).per_rep["y"]
    b = proc.draw_batch(np.random.default_rng(9), 10).per_rep["y"]
    assert np.array_equal(a, b)


# -- analyses against scipy / statsmodels --------------------------------------------------------------
def test_two_proportions_matches_statsmodels_and_yates():
    from statsmodels.stats.proportion import proportions_ztest

    b = BinaryTwoArm(n=30, p0=0.3, odds_ratio=2.0, ratio=2.0).draw_batch(np.random.default_rng(1), 100)
    for i in range(b.size):
        r = b.replicate(i)
        y, a = r["y"], r["arm"]
        x0, x1, n0, n1 = y[a == 0].sum(), y[a == 1].sum(), (a == 0).sum(), (a == 1).sum()
        # statsmodels: pooled-variance z-test (its default)
        for alt, sm_alt in (("two-sided", "two-sided"), ("greater", "larger"), ("less", "smaller")):
            z, p = proportions_ztest([x1, x0], [n1, n0], alternative=sm_alt)
            assert math.isclose(TwoProportions(alternative=alt)(r).pvalue, p, rel_tol=1e-10, abs_tol=1e-14)
        # Yates (1934): the corrected two-sided z-test is the corrected chi-square of the 2x2 table
        ref = stats.chi2_contingency([[x1, n1 - x1], [x0, n0 - x0]], correction=True).pvalue
        assert math.isclose(TwoProportions(continuity=True)(r).pvalue, ref, rel_tol=1e-10, abs_tol=1e-14)


def test_chi_square_batch_equals_scipy_per_replicate():
    for proc in (BinaryTwoArm(n=25, p0=0.2, odds_ratio=2.5, ratio=1.4),
                 BinaryTwoArm(n=60, p0=0.5, risk_difference=0.1, missing=_Hide())):
        b = proc.draw_batch(np.random.default_rng(7), 300)
        for corr in (True, False):
            out = ChiSquare(correction=corr).batch(b)
            ref = []
            for i in range(b.size):
                r = b.replicate(i)
                ok = np.isfinite(r["y"])
                y, a = r["y"][ok], r["arm"][ok]
                t = [[y[a == 1].sum(), (a == 1).sum() - y[a == 1].sum()], [y[a == 0].sum(), (a == 0).sum() - y[a == 0].sum()]]
                ref.append(stats.chi2_contingency(t, correction=corr).pvalue)  # scipy reference
            np.testing.assert_allclose(out["pvalue"], ref, rtol=1e-10, atol=1e-14)


def test_fisher_batch_is_exact_like_scipy():
    # vectorised hypergeometric sums against scipy.stats.fisher_exact, table by table, all three alternatives;
    # equal arms (mirror ties), unequal arms, small and moderate arms, missing outcomes
    procs = (BinaryTwoArm(n=12, p0=0.3, odds_ratio=3.0), BinaryTwoArm(n=12, p0=0.3, odds_ratio=3.0, ratio=1.5),
             BinaryTwoArm(n=80, p0=0.4, risk_difference=0.15, missing=_Hide()))
    for proc in procs:
        b = proc.draw_batch(np.random.default_rng(11), 300)
        for alt in ("two-sided", "less", "greater"):
            out = FisherExact(alternative=alt).batch(b)
            ref = [FisherExact(alternative=alt)(b.replicate(i)).pvalue for i in range(b.size)]
            np.testing.assert_allclose(out["pvalue"], ref, rtol=1e-10, atol=1e-13)
            assert np.all(out["pvalue"] <= 1.0)
    # and the per-replicate path is scipy with the treatment row first: 'greater' = higher odds in arm 1
    data = {"y": np.r_[np.zeros(8), np.ones(2), np.ones(7), np.zeros(3)], "arm": np.repeat([0, 1], 10)}
    assert math.isclose(FisherExact(alternative="greater")(data).pvalue,
                        stats.fisher_exact([[7, 3], [2, 8]], alternative="greater").pvalue)
    assert math.isclose(FisherExact()(data).estimate, math.log(7 * 8 / (3 * 2)))


def test_fisher_vectorised_handles_exact_mode_ties_like_scipy():
    # tables whose hypergeometric probabilities tie exactly (equal arms, mirror tables; and empty margins)
    x0 = np.array([0, 3, 5, 2, 0, 10])
    x1 = np.array([10, 7, 5, 2, 0, 10])
    n = np.full(6, 10.0)
    p = fisher_pvalues(x0, n, x1, n, "two-sided")
    assert np.all(np.isfinite(p))  # exact mirror ties are decided without falling back to scipy
    for i in range(6):
        ref = stats.fisher_exact([[x1[i], 10 - x1[i]], [x0[i], 10 - x0[i]]]).pvalue
        assert math.isclose(p[i], ref, rel_tol=1e-10)


def test_logistic_is_woolf_and_agrees_with_glm():
    import statsmodels.api as sm

    b = BinaryTwoArm(n=50, p0=0.3, odds_ratio=2.0).draw_batch(np.random.default_rng(5), 40)
    for i in range(b.size):
        r = b.replicate(i)
        res = Logistic()(r)
        y, a = r["y"], r["arm"]
        x0, x1 = y[a == 0].sum(), y[a == 1].sum()
        # Woolf (1955): log OR and its SE from the 2x2 table
        assert math.isclose(res.estimate, math.log(x1 * (50 - x0) / ((50 - x1) * x0)), rel_tol=1e-9, abs_tol=1e-12)
        assert math.isclose(res.se, math.sqrt(1 / x1 + 1 / (50 - x1) + 1 / x0 + 1 / (50 - x0)), rel_tol=1e-9)
        # an independent fitter: statsmodels GLM Binomial (IRLS, tolerance 1e-8)
        glm = sm.GLM(y, np.column_stack([np.ones(100), a]), family=sm.families.Binomial()).fit()
        assert math.isclose(res.pvalue, glm.pvalues[1], rel_tol=1e-5)


@pytest.mark.parametrize("analysis", [TwoProportions(), TwoProportions(continuity=True, alternative="less"),
                                      ChiSquare(), ChiSquare(correction=False), FisherExact(alternative="greater"),
                                      Logistic(), Logistic(alternative="greater")])
def test_batch_equals_per_replicate(analysis):
    # small arms and a low risk so some tables are degenerate (no events, zero cells)
    for proc in (BinaryTwoArm(n=12, p0=0.1, risk_ratio=3.0, ratio=1.5), BinaryTwoArm(n=40, p0=0.3, odds_ratio=2.0, missing=_Hide())):
        b = proc.draw_batch(np.random.default_rng(13), 400)
        assert analysis.supports_batch(b)
        out = analysis.batch(b)
        ref, warned = _per_rep(analysis, b)
        for f, v in out.items():
            if f in ref:
                np.testing.assert_allclose(v, ref[f], rtol=1e-9, atol=1e-12, equal_nan=True, err_msg=f)
        trouble = out.get("trouble", {})
        flagged = np.zeros(b.size, object)
        flagged[:] = ""
        for cause, m in trouble.items():
            flagged[np.asarray(m)] = cause
        keep = np.isfinite(ref["pvalue"])
        assert list(flagged[keep]) == list(warned[keep])


def test_logistic_zero_cells_are_counted_as_fit_trouble_by_the_engine():
    proc = BinaryTwoArm(n=10, p0=0.08, risk_ratio=2.0)
    res = sp.run(sp.Scenario(proc, analyses=[Logistic(), FisherExact()]), reps=1000, seed=21, n_jobs=1)
    assert res.paths["logistic"] == "batch"
    b = proc.draw_batch(np.random.default_rng(chunk_seed(res.seed, res.point, 0)), 1000)  # the engine's own stream
    y, arm = b.per_rep["y"], b.shared["arm"]
    x0, x1 = y[:, arm == 0].sum(1), y[:, arm == 1].sum(1)
    zero = (np.minimum(x0, 10 - x0) == 0) | (np.minimum(x1, 10 - x1) == 0)
    assert zero.sum() > 100
    s = res.summaries["logistic"]
    assert s["failures"] == {"warning:PerfectSeparationWarning": int(zero.sum())}
    assert res.summaries["fisher_exact"]["failures"] == {}


# -- power and size ----------------------------------------------------------------------------------------
def _flp_power(p0, p1, n0, n1, alpha):
    """Power of the pooled two-sided z-test, normal approximation (Fleiss, Levin & Paik 2003, sec. 4.2)."""
    pbar = (n0 * p0 + n1 * p1) / (n0 + n1)
    s0 = math.sqrt(pbar * (1 - pbar) * (1 / n0 + 1 / n1))
    s1 = math.sqrt(p0 * (1 - p0) / n0 + p1 * (1 - p1) / n1)
    z = stats.norm.ppf(1 - alpha / 2)
    d = abs(p1 - p0)
    return stats.norm.cdf((d - z * s0) / s1) + stats.norm.cdf((-d - z * s0) / s1)


def test_two_proportion_power_matches_the_normal_approximation():
    # 150 and 225 per arm, risks 0.30 vs 0.42: arms large and risks away from 0 and 1, where the
    # normal approximation is known to be good; no allowance beyond 4 MCSE
    proc = BinaryTwoArm(n=150, p0=0.3, risk_difference=0.12, ratio=1.5)
    reps = 6000
    res = sp.run(sp.Scenario(proc, TwoProportions()), reps=reps, seed=150, n_jobs=1)
    s = res.summaries["two_proportions"]
    ref = _flp_power(0.3, 0.42, 150, 225, 0.05)
    assert 0.6 < ref < 0.9
    assert abs(s["power"] - ref) < 4 * math.sqrt(ref * (1 - ref) / reps)
    # the analytic hook is simpower.analytic.prop2_power, the same formula
    assert math.isclose(s["analytic_power"], ref, rel_tol=1e-9)
    assert s["cross_check_flag"] is False or s["cross_check_flag"] == np.False_
    # type I error at the null (risk difference 0) within 4 MCSE of alpha
    null = sp.run(sp.Scenario(proc, TwoProportions()).null(), reps=reps, seed=151, n_jobs=1)
    assert abs(null.power - 0.05) < 4 * math.sqrt(0.05 * 0.95 / reps)


def test_exact_and_corrected_tests_are_conservative_at_the_null():
    # Fisher's exact test and the Yates-corrected chi-square have size <= alpha (Yates 1934; common practice)
    proc = BinaryTwoArm(n=30, p0=0.3, odds_ratio=1.0)
    reps = 4000
    res = sp.run(sp.Scenario(proc, analyses=[FisherExact(), ChiSquare(), ChiSquare(correction=False)]),
                 reps=reps, seed=30, n_jobs=1)
    mc = 4 * math.sqrt(0.05 * 0.95 / reps)
    assert res.summaries["fisher_exact"]["power"] < 0.05
    assert res.summaries["chi_square"]["power"] < 0.05
    # the uncorrected test is closer to alpha than the corrected one
    assert abs(res.summaries["chi_square_2"]["power"] - 0.05) < mc
    assert res.summaries["chi_square_2"]["power"] > res.summaries["chi_square"]["power"]


def test_fisher_grid_in_memory_blocks_gives_the_same_numbers(monkeypatch):
    import simpower.analyses.binary as mod

    b = BinaryTwoArm(n=30, p0=0.3, odds_ratio=2.0, ratio=1.3).draw_batch(np.random.default_rng(4), 100)
    whole = FisherExact().batch(b)["pvalue"]
    monkeypatch.setattr(mod, "_GRID_CELLS", 3 * 40)  # 3 replicates per block
    np.testing.assert_array_equal(FisherExact().batch(b)["pvalue"], whole)
    ref = [stats.fisher_exact([[r["y"][r["arm"] == 1].sum(), 39 - r["y"][r["arm"] == 1].sum()],
                               [r["y"][r["arm"] == 0].sum(), 30 - r["y"][r["arm"] == 0].sum()]]).pvalue
           for r in (b.replicate(i) for i in range(b.size))]
    np.testing.assert_allclose(whole, ref, rtol=1e-10, atol=1e-13)
