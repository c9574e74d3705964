"""The batch path of the ``cox`` analysis against statsmodels ``PHReg`` and the log-rank terms.

External references named beside each check: statsmodels ``PHReg`` (Breslow and Efron partial
likelihoods, Newton-Raphson from 0, SE from the observed information); the score test of the Cox
model at beta = 0 with Breslow's ties is the log-rank test (Cox 1972; Collett 2015, Modelling
Survival Data in Medical Research, 3rd ed., sec. 3.9 -- from memory); a Cox model with a binary
covariate has no finite estimate when the partial likelihood is monotone, e.g. an arm without
events (common practice). The tolerances are floating-point agreement of two converged fits of
the same likelihood (1e-6 relative, as for every iterative batch path), not Monte Carlo error.
"""

import math
import warnings

import numpy as np
import pytest

import simpower as sp
from simpower.analyses import survival as S
from simpower.analyses.base import rowwise
from simpower.analyses.survival import Cox, batch_logrank_terms
from simpower.processes.survival import SurvivalTwoArm

# censoring by staggered entry, administrative end of follow-up and loss; time_resolution=1
# records times rounded up to whole units, which ties many events (and events with censorings)
CENSORED = dict(n=40, median=10, hazard_ratio=0.6, accrual=10, follow_up=10, dropout_rate=0.02)


def _statsmodels(b, ties):
    from statsmodels.duration.hazard_regression import PHReg

    est, se, p = (np.empty(b.size) for _ in range(3))
    for i in range(b.size):
        r = b.replicate(i)
        fit = PHReg(r["time"], r["arm"][:, None].astype(float), status=r["event"], ties=ties).fit()
        est[i], se[i], p[i] = fit.params[0], fit.bse[0], fit.pvalues[0]
    return est, se, p


@pytest.mark.parametrize("resolution", [None, 1.0])
@pytest.mark.parametrize("ties", ["breslow", "efron"])
def test_batch_matches_statsmodels_phreg(ties, resolution):
    proc = SurvivalTwoArm(**CENSORED, time_resolution=resolution)
    b = proc.draw_batch(np.random.default_rng(2015), 300)
    time = b.per_rep["time"]
    if resolution is not None:
        ev_times = [t[e == 1] for t, e in zip(time, b.per_rep["event"])]
        assert np.mean([np.unique(t).size < t.size for t in ev_times]) > 0.9  # tied events: Efron != Breslow
    res = Cox(ties=ties).batch(b)
    assert not res.trouble
    est, se, p = _statsmodels(b, ties)
    np.testing.assert_allclose(res["estimate"], est, rtol=1e-6, atol=1e-12)
    np.testing.assert_allclose(res["se"], se, rtol=1e-6)
    np.testing.assert_allclose(res["pvalue"], p, rtol=1e-6, atol=1e-12)
    assert np.mean((res["pvalue"] < 0.05) == (p < 0.05)) >= 0.999
    # the Wald CI is estimate -/+ z se (statsmodels conf_int, normal reference)
    np.testing.assert_allclose(res["ci_high"] - res["ci_low"], 2 * 1.959963984540054 * se, rtol=1e-6)


def test_efron_and_breslow_differ_only_with_tied_events():
    # Efron's correction changes nothing when no two events share a time (Efron 1977), so the two
    # ties options agree there, and differ once events are tied
    b = SurvivalTwoArm(**CENSORED).draw_batch(np.random.default_rng(3), 50)
    assert all(np.unique(t[e == 1]).size == e.sum() for t, e in zip(b.per_rep["time"], b.per_rep["event"]))
    np.testing.assert_allclose(Cox(ties="efron").batch(b)["estimate"], Cox().batch(b)["estimate"], rtol=1e-12)
    bt = SurvivalTwoArm(**CENSORED, time_resolution=2.0).draw_batch(np.random.default_rng(3), 50)
    assert np.mean(np.abs(Cox(ties="efron").batch(bt)["estimate"] - Cox().batch(bt)["estimate"]) > 1e-6) > 0.9


@pytest.mark.parametrize("resolution", [None, 1.0])
def test_breslow_score_at_zero_is_the_logrank_statistic(resolution):
    # Cox (1972); Collett (2015, sec. 3.9): at beta = 0 the Breslow score is O1 - E1 of the log-rank
    # test, with or without ties; without tied events the information is the log-rank variance too
    # (with ties the log-rank variance carries the hypergeometric factor (r - d) / (r - 1)).
    b = SurvivalTwoArm(**CENSORED, time_resolution=resolution).draw_batch(np.random.default_rng(1972), 200)
    time, event, arm = b.per_rep["time"], b.per_rep["event"], b.shared["arm"]
    u_lr, v_lr = batch_logrank_terms(time, event, arm)
    q, w, d1, _, _ = S._cox_event_terms(time, event, arm, "breslow")
    u, info = S._cox_score_info(np.zeros(b.size), q, w, d1)
    np.testing.assert_allclose(u, u_lr, rtol=1e-9, atol=1e-9)
    if resolution is None:
        np.testing.assert_allclose(info, v_lr, rtol=1e-9)
    else:
        assert np.all(info >= v_lr - 1e-12) and np.mean(info > v_lr + 1e-9) > 0.9


def _batch(time, event):
    time, event = np.asarray(time, float), np.asarray(event, np.int8)
    return sp.Batch(len(time), {"time": time, "event": event}, {"arm": np.repeat([0, 1], time.shape[1] // 2)})


@pytest.mark.parametrize("ties", ["breslow", "efron"])
def test_replicates_without_a_finite_estimate_go_to_the_per_replicate_path(ties):
    from statsmodels.duration.hazard_regression import PHReg

    b = _batch([[1, 2, 3, 4, 5, 6],      # arm 0 fails at 1-3, before any arm-1 failure: monotone
                [1, 2, 3, 4, 5, 6],      # the same with a censored arm-0 participant
                [4, 5, 6, 1, 2, 3],      # mirror image: monotone towards +inf
                [1, 2.5, 3, 4, 5, 6],    # no events in arm 1
                [1, 4, 2, 5, 3, 6],      # finite estimate
                [2, 2, 5, 2, 5, 7]],     # finite estimate with tied events
               [[1, 1, 1, 1, 1, 1], [1, 0, 1, 1, 1, 1], [1, 1, 1, 1, 1, 1],
                [1, 1, 1, 0, 0, 0], [1, 1, 1, 1, 1, 1], [1, 1, 1, 1, 0, 1]])
    an = Cox(ties=ties)
    _, _, ok = S._cox_newton(*S._cox_event_terms(b.per_rep["time"], b.per_rep["event"], b.shared["arm"], ties))
    assert ok.tolist() == [False, False, False, False, True, True]
    # the monotone rows really have no maximum: statsmodels' log partial likelihood keeps rising
    for i, sign in ((0, -1), (1, -1), (2, 1)):
        r = b.replicate(i)
        model = PHReg(r["time"], r["arm"][:, None].astype(float), status=r["event"], ties=ties)
        ll = [model.loglike(np.array([sign * x])) for x in (1.0, 5.0, 20.0)]
        assert ll[0] < ll[1] < ll[2]
    res = an.batch(b)
    vals, trouble, _ = rowwise(an, b, np.arange(b.size))
    for f, v in vals.items():
        np.testing.assert_allclose(res[f], v, rtol=1e-6, atol=1e-12, equal_nan=True, err_msg=f)
    assert set(res.trouble) == set(trouble)
    for cause, mask in trouble.items():
        assert np.array_equal(res.trouble[cause], mask), cause
    assert res.trouble["warning:PerfectSeparationWarning"].tolist() == [False, False, False, True, False, False]


def test_small_trials_agree_with_the_per_replicate_path_replicate_by_replicate():
    # 6 per arm, strong effect, short follow-up: many replicates without events in an arm or with a
    # monotone likelihood, and some without any event (statsmodels raises); every field and
    # every trouble flag must be those of the per-replicate path
    b = SurvivalTwoArm(n=6, median=1.0, hazard_ratio=0.3, follow_up=0.7).draw_batch(np.random.default_rng(6), 100)
    for ties in ("breslow", "efron"):
        an = Cox(ties=ties, alternative="less")
        res = an.batch(b)
        vals, trouble, _ = rowwise(an, b, np.arange(b.size))
        assert 0 < trouble["warning:PerfectSeparationWarning"].sum() < b.size
        for f, v in vals.items():
            np.testing.assert_allclose(res[f], v, rtol=1e-6, atol=1e-12, equal_nan=True, err_msg=f)
        assert set(res.trouble) == set(trouble)
        assert all(np.array_equal(res.trouble[c], m) for c, m in trouble.items())


@pytest.mark.parametrize("alternative", ["greater", "less"])
def test_one_sided_direction(alternative):
    # a hazard ratio above 1 in arm 1 gives a positive log hazard ratio (statsmodels' sign)
    b = SurvivalTwoArm(n=150, median=5, hazard_ratio=2.0).draw_batch(np.random.default_rng(4), 20)
    res = Cox(alternative=alternative).batch(b)
    est, _, p = _statsmodels(b, "breslow")
    assert np.all(est > 0)
    expect = p / 2 if alternative == "greater" else 1 - p / 2  # one-sided Wald p from the two-sided
    np.testing.assert_allclose(res["pvalue"], expect, rtol=1e-6, atol=1e-12)


def test_memory_blocks_give_the_same_numbers(monkeypatch):
    b = SurvivalTwoArm(**CENSORED, time_resolution=1.0).draw_batch(np.random.default_rng(9), 60)
    whole = Cox(ties="efron").batch(b)
    monkeypatch.setattr(S, "_BLOCK_CELLS", 7 * b.per_rep["time"].shape[1])  # 7 replicates per block
    blocked = Cox(ties="efron").batch(b)
    for f in ("pvalue", "estimate", "se"):
        assert np.array_equal(whole[f], blocked[f])


def test_the_engine_takes_the_batch_path():
    proc = SurvivalTwoArm(n=30, median=10, hazard_ratio=0.7, follow_up=12)
    res = sp.run(sp.Scenario(proc, Cox()), reps=200, seed=11, n_jobs=1)
    assert res.paths == {"cox": "batch"}
    assert math.isfinite(res.power) and res.summaries["cox"]["n_ok"] == 200


@pytest.mark.parametrize("ties", ["breslow", "efron"])
def test_missing_times_keep_the_batch_path_as_complete_cases_like_phreg(ties):
    # 20% of the times hidden (NaN), as a missingness mechanism leaves them: the batch path leaves those rows
    # out, as the per-replicate path does, and equals statsmodels PHReg fitted on the complete cases
    from simpower.processes.design import apply_missing
    from simpower.processes.missing import MCAR

    proc = SurvivalTwoArm(**CENSORED, time_resolution=1.0)
    b = proc.draw_batch(np.random.default_rng(77), 200)
    apply_missing(MCAR(rate=0.2), np.random.default_rng(78), b.per_rep["time"], {}, b.per_rep, b.info)
    assert b.info.get("missing") and np.isnan(b.per_rep["time"]).mean() > 0.15
    an = Cox(ties=ties)
    assert an.supports_batch(b)
    res = an.batch(b)
    est, se, p = (np.empty(b.size) for _ in range(3))
    from statsmodels.duration.hazard_regression import PHReg

    for i in range(b.size):
        r = b.replicate(i)
        keep = ~np.isnan(r["time"])
        fit = PHReg(r["time"][keep], r["arm"][keep][:, None].astype(float), status=r["event"][keep], ties=ties).fit()
        est[i], se[i], p[i] = fit.params[0], fit.bse[0], fit.pvalues[0]
    np.testing.assert_allclose(res["estimate"], est, rtol=1e-6, atol=1e-12)
    np.testing.assert_allclose(res["se"], se, rtol=1e-6)
    assert np.mean((res["pvalue"] < 0.05) == (p < 0.05)) >= 0.999
    vals, _, _ = rowwise(an, b, np.arange(b.size))
    np.testing.assert_allclose(res["pvalue"], vals["pvalue"], rtol=1e-6, atol=1e-12)
