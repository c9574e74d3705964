"""Time to event: the survival_two_arm process and the logrank and cox analyses.

External references named beside each check: statsmodels (survdiff, PHReg), Schoenfeld (1981,
Biometrika 68:316-319) for log-rank power given the number of events, the event probability under
uniform accrual with exponential survival and exponential loss (Lachin & Foulkes 1986, Biometrics
42:507-519; from memory), the asymptotic SD of a sample median 1 / (2 f(m) sqrt(N)) (common
practice), Cox (1972) for the score test of the Cox model equalling the log-rank test without ties.
Monte Carlo tolerances are 4 MCSE.
"""

import math
import warnings

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower.analyses.survival import Cox, LogRank, batch_logrank_terms, logrank_terms
from simpower.errors import ParameterError
from simpower.processes.survival import SurvivalTwoArm


@pytest.mark.parametrize("kwargs, field", [
    (dict(median=10, hazard_ratio=0.0), "hazard_ratio"),
    (dict(median=10, hazard_ratio=-0.5), "hazard_ratio"),
    (dict(median=-1), "median"),
    (dict(hazard0=0.0), "hazard0"),
    (dict(median=10, hazard0=0.1), "median"),
    (dict(), "median"),
    (dict(median=10, shape=0.0), "shape"),
    (dict(median=10, dropout_rate=-0.1), "dropout_rate"),
    (dict(median=10, dropout_fraction=1.0, dropout_time=5), "dropout_fraction"),
    (dict(median=10, dropout_fraction=0.1), "dropout_time"),
    (dict(median=10, dropout_fraction=0.1, dropout_time=5, dropout_rate=0.1), "dropout_rate"),
    (dict(median=10, follow_up=0.0), "follow_up"),
    (dict(median=10, accrual=-1.0), "accrual"),
])
def test_bad_input_is_one_line_naming_the_field(kwargs, field):
    with pytest.raises(ParameterError) as e:
        SurvivalTwoArm(n=20, **kwargs)
    assert f"`{field}`" in str(e.value) and "\n" not in str(e.value)


def test_null_estimand_and_rates():
    p = SurvivalTwoArm(n=20, median=10, hazard_ratio=0.7)
    assert p.null().hazard_ratio == 1.0
    assert math.isclose(p.true_effect(), math.log(0.7))
    # exponential: median = log 2 / hazard (common practice)
    assert math.isclose(p.rate0, math.log(2) / 10)
    assert math.isclose(SurvivalTwoArm(n=20, hazard0=0.05).median0, math.log(2) / 0.05)
    # losing 20% by time 12 is the rate -log(0.8)/12
    q = SurvivalTwoArm(n=20, median=10, dropout_fraction=0.2, dropout_time=12)
    assert math.isclose(q.loss_rate, -math.log(0.8) / 12)


@pytest.mark.parametrize("shape", [1.0, 2.0])
def test_medians_without_censoring(shape):
    # Weibull PH: median_a = log(2)^(1/k) / (lam * HR_a^(1/k)); exponential when k = 1 (median = log 2 / hazard).
    # The sample median of N draws has SD 1 / (2 f(m) sqrt(N)) (common practice).
    hr = 0.6
    proc = SurvivalTwoArm(n=100, hazard0=0.1, hazard_ratio=hr, shape=shape)
    b = proc.draw_batch(np.random.default_rng(31), 400)
    assert np.all(b.per_rep["event"] == 1)
    arm = b.shared["arm"]
    for a, h in ((0, 1.0), (1, hr)):
        t = b.per_rep["time"][:, arm == a].ravel()
        m = math.log(2) ** (1 / shape) / (0.1 * h ** (1 / shape))
        # f(m) = h(m) S(m) with S(m) = 1/2 and the hazard of arm a at its median k lam^k HR_a m^(k-1)
        dens = shape * 0.1**shape * h * m ** (shape - 1) * 0.5
        assert abs(np.median(t) - m) < 4 / (2 * dens * math.sqrt(t.size))
    # and the survival functions are proportional hazards: S1(t) = S0(t)^HR at t = 8
    t0 = b.per_rep["time"][:, arm == 0]
    t1 = b.per_rep["time"][:, arm == 1]
    s0 = math.exp(-(0.1 * 8) ** shape)
    s1 = s0**hr
    assert abs((t0 > 8).mean() - s0) < 4 * math.sqrt(s0 * (1 - s0) / t0.size)
    assert abs((t1 > 8).mean() - s1) < 4 * math.sqrt(s1 * (1 - s1) / t1.size)


def _lachin_foulkes(lam, eta, accrual, follow_up):
    """P(event) and P(lost) under uniform accrual, exponential survival (lam) and loss (eta)."""
    g = lam + eta
    if follow_up is None:
        w = 1.0
    elif accrual == 0:
        w = 1 - math.exp(-g * follow_up)
    else:
        w = 1 - (math.exp(-g * follow_up) - math.exp(-g * (accrual + follow_up))) / (g * accrual)
    return lam / g * w, eta / g * w


@pytest.mark.parametrize("accrual, follow_up, eta", [(12.0, 12.0, 0.02), (0.0, 10.0, 0.0), (6.0, None, 0.05),
                                                      (10.0, 5.0, 0.0)])
def test_realised_event_and_censoring_proportions(accrual, follow_up, eta):
    proc = SurvivalTwoArm(n=200, median=12, hazard_ratio=0.7, accrual=accrual, follow_up=follow_up,
                          dropout_rate=eta)
    b = proc.draw_batch(np.random.default_rng(17), 200)
    arm = b.shared["arm"]
    lam0 = math.log(2) / 12
    for a, lam in ((0, lam0), (1, 0.7 * lam0)):
        p_event, p_lost = _lachin_foulkes(lam, eta, accrual, follow_up)
        # the process's quadrature agrees with the closed form
        assert math.isclose(proc.event_probability(a), p_event, rel_tol=1e-7)
        ev = b.per_rep["event"][:, arm == a]
        assert abs(ev.mean() - p_event) < 4 * math.sqrt(p_event * (1 - p_event) / ev.size)
        if follow_up is not None:
            # administrative censoring happens exactly at accrual + follow_up - entry >= follow_up;
            # censoring earlier than follow_up can only be loss to follow-up
            t = b.per_rep["time"][:, arm == a]
            early_cens = ((ev == 0) & (t < follow_up)).mean()
            p_early = eta / (lam + eta) * (1 - math.exp(-(lam + eta) * follow_up))
            assert abs(early_cens - p_early) < 4 * math.sqrt(max(p_early * (1 - p_early), 1e-12) / ev.size)
            assert np.all(t <= accrual + follow_up)
        else:
            lost = 1 - ev.mean()
            assert abs(lost - p_lost) < 4 * math.sqrt(p_lost * (1 - p_lost) / ev.size)
    assert math.isclose(proc.expected_events(), 200 * (proc.event_probability(0) + proc.event_probability(1)))


def test_time_resolution_rounds_up_and_makes_ties():
    proc = SurvivalTwoArm(n=50, median=5, follow_up=10, time_resolution=1.0)
    t = proc.draw_batch(np.random.default_rng(2), 5).per_rep["time"]
    assert np.all(t == np.ceil(t)) and np.all(t >= 1)
    assert len(np.unique(t[0])) < t.shape[1]


# -- analyses against statsmodels ------------------------------------------------------------------------
PROCS = [
    SurvivalTwoArm(n=40, median=10, hazard_ratio=0.7, accrual=10, follow_up=10, dropout_rate=0.02),
    SurvivalTwoArm(n=30, hazard0=0.1, hazard_ratio=1.5, shape=1.5, follow_up=8, time_resolution=1.0, ratio=1.5),
    SurvivalTwoArm(n=25, median=5, follow_up=6),  # everyone censored at the same time: ties among the censored
]


@pytest.mark.parametrize("proc", PROCS)
def test_logrank_batch_matches_statsmodels_survdiff(proc):
    from statsmodels.duration.survfunc import survdiff

    b = proc.draw_batch(np.random.default_rng(5), 200)
    u, v = batch_logrank_terms(b.per_rep["time"], b.per_rep["event"], b.shared["arm"])
    out = LogRank().batch(b)
    for i in range(b.size):
        r = b.replicate(i)
        chisq, p = survdiff(r["time"], r["event"], r["arm"])  # statsmodels reference
        assert math.isclose(u[i] ** 2 / v[i], chisq, rel_tol=1e-8, abs_tol=1e-12)
        assert math.isclose(out["pvalue"][i], p, rel_tol=1e-8, abs_tol=1e-12)
        assert (u[i], v[i]) == pytest.approx(logrank_terms(r["time"], r["event"].astype(float), r["arm"].astype(float)),
                                             rel=1e-10, abs=1e-12)


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_logrank_batch_equals_per_replicate(alternative):
    an = LogRank(alternative=alternative)
    for proc in PROCS:
        b = proc.draw_batch(np.random.default_rng(6), 150)
        assert an.supports_batch(b)
        out = an.batch(b)
        for i in range(b.size):
            r = an(b.replicate(i))
            for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
                assert math.isclose(out[f][i], getattr(r, f), rel_tol=1e-8, abs_tol=1e-12), f
    # direction: 'greater' = more events than expected in arm 1 = hazard ratio above 1
    b = SurvivalTwoArm(n=200, median=5, hazard_ratio=2.0).draw_batch(np.random.default_rng(1), 20)
    assert np.all(LogRank(alternative="greater").batch(b)["pvalue"] < 0.05)
    assert np.all(LogRank(alternative="less").batch(b)["pvalue"] > 0.95)


def test_cox_score_test_is_the_logrank_test_without_ties():
    # Cox (1972): without ties the partial-likelihood score test at beta = 0 is the log-rank test
    from statsmodels.duration.hazard_regression import PHReg

    b = PROCS[0].draw_batch(np.random.default_rng(8), 20)
    for i in range(b.size):
        r = b.replicate(i)
        assert len(np.unique(r["time"])) == r["time"].size
        model = PHReg(r["time"], r["arm"][:, None].astype(float), status=r["event"])
        score = model.score(np.zeros(1))[0]
        info = -model.hessian(np.zeros(1))[0, 0]
        u, v = logrank_terms(r["time"], r["event"].astype(float), r["arm"].astype(float))
        assert math.isclose(score, u, rel_tol=1e-9, abs_tol=1e-12)
        assert math.isclose(info, v, rel_tol=1e-9)
        res = Cox()(r)
        fit = model.fit()
        assert math.isclose(res.estimate, fit.params[0]) and math.isclose(res.se, fit.bse[0])
        assert math.isclose(res.pvalue, fit.pvalues[0], rel_tol=1e-9)


def test_cox_warns_when_an_arm_has_no_events():
    data = {"time": np.arange(1.0, 11.0), "event": np.r_[np.ones(5), np.zeros(5)], "arm": np.repeat([0, 1], 5)}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        Cox()(data)
    assert caught and caught[0].category.__name__ == "PerfectSeparationWarning"


# -- power and size ------------------------------------------------------------------------------------------
@pytest.mark.slow
def test_logrank_power_matches_schoenfeld():
    # HR 0.75 (near 1), 1:1, 300 per arm, control median 12, accrual 12, follow-up 12: about 353
    # expected events -- the setting in which Schoenfeld's (1981) approximation is known to be good,
    # so no allowance beyond 4 MCSE. Power = Phi(sqrt(d r/(1+r)^2) |log HR| - z_{1-alpha/2}).
    proc = SurvivalTwoArm(n=300, median=12, hazard_ratio=0.75, accrual=12, follow_up=12)
    lam0 = math.log(2) / 12
    d = 300 * (_lachin_foulkes(lam0, 0, 12, 12)[0] + _lachin_foulkes(0.75 * lam0, 0, 12, 12)[0])
    assert 340 < d < 365
    ref = stats.norm.cdf(math.sqrt(d / 4) * abs(math.log(0.75)) - stats.norm.ppf(0.975))
    reps = 4000
    res = sp.run(sp.Scenario(proc, LogRank()), reps=reps, seed=1981, n_jobs=1)
    s = res.summaries["logrank"]
    assert s["path"] == "batch"
    assert abs(s["power"] - ref) < 4 * math.sqrt(ref * (1 - ref) / reps)
    # the analytic hook gives the same formula (plus the negligible far tail)
    assert abs(s["analytic_power"] - ref) < 1e-4
    # and the size at HR = 1 is alpha within 4 MCSE
    null = sp.run(sp.Scenario(proc, LogRank()).null(), reps=reps, seed=1982, n_jobs=1)
    assert abs(null.power - 0.05) < 4 * math.sqrt(0.05 * 0.95 / reps)


@pytest.mark.slow
def test_cox_ci_covers_the_log_hazard_ratio():
    # Wald CI of the Cox estimate: coverage 0.95 within 4 MCSE (sqrt(c(1-c)/R), Morris et al. 2019),
    # Weibull shape 1.5 with censoring; the estimand is the process's true_effect = log HR
    proc = SurvivalTwoArm(n=50, median=10, hazard_ratio=0.6, shape=1.5, accrual=6, follow_up=8)
    reps = 1000
    res = sp.run(sp.Scenario(proc, analyses=[Cox(), LogRank()]), reps=reps, seed=72, n_jobs=1)
    s = res.summaries["cox"]
    assert res.paths == {"cox": "batch", "logrank": "batch"}
    assert s["n_ok"] == reps
    assert abs(s["coverage"] - 0.95) < 4 * math.sqrt(0.95 * 0.05 / reps)
    assert abs(s["bias"]) < 4 * s["bias_mcse"]


def test_logrank_batch_in_memory_blocks_gives_the_same_numbers(monkeypatch):
    import simpower.analyses.survival as mod

    b = PROCS[1].draw_batch(np.random.default_rng(9), 120)
    whole = LogRank().batch(b)
    monkeypatch.setattr(mod, "_BLOCK_CELLS", 7 * b.per_rep["time"].shape[1])  # 7 replicates per block
    blocked = LogRank().batch(b)
    for f in whole:
        np.testing.assert_array_equal(whole[f], blocked[f])
    ref = [LogRank()(b.replicate(i)).pvalue for i in (0, 50, 119)]
    np.testing.assert_allclose(blocked["pvalue"][[0, 50, 119]], ref, rtol=1e-8, atol=1e-12)
