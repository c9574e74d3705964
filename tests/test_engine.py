"""The engine: seeding, chunking, reproducibility, records, failures, summaries.

External facts used: MCSE of a rejection rate sqrt(p(1-p)/R) and the other
performance measures (Morris, White & Crowther 2019, Statistics in Medicine,
Table 6); numpy's promise that a SeedSequence's spawn_key defines its stream
(numpy.random docs, "Parallel random number generation").
"""

import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower.engine import chunk_seed, plan_chunks, run_chunk


def _two_arm(n=30, effect=0.5, **kw):
    return sp.Scenario(sp.NormalTwoArm(n=n, effect=effect, **kw), analyses=[sp.TTest(), sp.WelchT()])


def test_chunk_seed_equals_spawned_child():
    # numpy: SeedSequence(e).spawn(k)[j] has spawn_key (j,); spawning again appends.
    root = np.random.SeedSequence(123)
    child = root.spawn(3)[2].spawn(5)[4]
    a = np.random.default_rng(child).random(5)
    b = np.random.default_rng(chunk_seed(123, 2, 4)).random(5)
    assert np.array_equal(a, b)


def test_plan_chunks_cover_reps():
    plan = plan_chunks(4500, 2000)
    assert plan == [(0, 2000), (1, 2000), (2, 500)]
    assert sum(s for _, s in plan) == 4500


def test_same_seed_same_numbers_any_jobs():
    sc = _two_arm()
    r1 = sp.run(sc, reps=3000, seed=7, n_jobs=1, chunk_size=500)
    r2 = sp.run(sc, reps=3000, seed=7, n_jobs=2, chunk_size=500)
    assert np.array_equal(r1.pvalues, r2.pvalues)
    assert np.array_equal(r1.records["welch_t"].estimate, r2.records["welch_t"].estimate)
    r3 = sp.run(sc, reps=3000, seed=8, n_jobs=1, chunk_size=500)
    assert not np.array_equal(r1.pvalues, r3.pvalues)


def test_longer_run_extends_shorter_chunk_for_chunk():
    sc = _two_arm()
    short = sp.run(sc, reps=1000, seed=3, n_jobs=1, chunk_size=500)
    long = sp.run(sc, reps=2500, seed=3, n_jobs=1, chunk_size=500)
    assert np.array_equal(short.pvalues, long.pvalues[:1000])


def test_seed_is_recorded_and_reproduces():
    sc = _two_arm()
    r1 = sp.run(sc, reps=500, n_jobs=1)
    r2 = sp.run(sc, reps=500, seed=r1.seed, n_jobs=1)
    assert np.array_equal(r1.pvalues, r2.pvalues)
    assert r1.to_dict()["seed"] == str(r1.seed)


def test_per_replicate_path_equals_batch_path_on_same_data():
    # The batch statistics equal scipy.stats applied replicate by replicate to the same data.
    proc = sp.NormalTwoArm(n=12, effect=0.4, ratio=1.5, sd_ratio=1.7)
    batch = proc.draw_batch(np.random.default_rng(5), 200)
    for an in (sp.TTest(), sp.WelchT(), sp.ZTest(sd=1.3), sp.TTest(alternative="less"),
               sp.WelchT(alternative="greater", ci_level=0.9)):
        b = an.batch(batch)
        for i in range(0, 200, 7):
            r = an(batch.replicate(i))
            assert b["pvalue"][i] == pytest.approx(r.pvalue, rel=1e-9, abs=1e-12)
            assert b["estimate"][i] == pytest.approx(r.estimate, rel=1e-12)
            assert b["ci_low"][i] == pytest.approx(r.ci_low, rel=1e-9)
            assert b["ci_high"][i] == pytest.approx(r.ci_high, rel=1e-9)
            assert b["se"][i] == pytest.approx(r.se, rel=1e-9)


def test_one_sample_and_paired_batch_match_scipy():
    b1 = sp.NormalOneSample(n=9, effect=0.3).draw_batch(np.random.default_rng(1), 50)
    b2 = sp.NormalPaired(n=9, effect=0.3, corr=0.4).draw_batch(np.random.default_rng(1), 50)
    t1 = sp.TTest(alternative="greater").batch(b1)
    t2 = sp.PairedT().batch(b2)
    for i in range(50):
        y = b1.replicate(i)["y"]
        assert t1["pvalue"][i] == pytest.approx(stats.ttest_1samp(y, 0, alternative="greater").pvalue, rel=1e-9)
        d = b2.replicate(i)
        diff = d["y"][d["arm"] == 1] - d["y"][d["arm"] == 0]
        assert t2["pvalue"][i] == pytest.approx(stats.ttest_1samp(diff, 0).pvalue, rel=1e-9)
        assert sp.PairedT()(d).pvalue == pytest.approx(t2["pvalue"][i], rel=1e-9)


def test_user_function_process_and_analysis_per_replicate_path():
    def draw(rng, n, shift):
        return {"y": np.r_[rng.normal(size=n), rng.normal(shift, size=n)], "arm": np.repeat([0, 1], n)}

    def analyse(data):
        y, arm = data["y"], data["arm"]
        return stats.ttest_ind(y[arm == 1], y[arm == 0])

    sc = sp.Scenario(draw, analyse, params={"n": 20, "shift": 0.0})
    res = sp.run(sc, reps=400, seed=11, n_jobs=1)
    assert res.paths[res.primary] == "per-replicate"
    s = res.summaries[res.primary]
    assert s["n_failed"] == 0
    # type I error of a valid test: alpha within 4 MCSE (Morris et al. 2019)
    assert abs(s["power"] - 0.05) < 4 * math.sqrt(0.05 * 0.95 / 400)
    # the scenario is sweepable over the user parameters
    assert sc.with_params(shift=0.5).process.get_params()["shift"] == 0.5


def test_failures_counted_by_cause_not_as_rejections():
    def draw(rng, n):
        return {"y": rng.normal(size=n)}

    def flaky(data):
        y = data["y"]
        if y[0] > 1.0:
            raise ZeroDivisionError("first value too large")
        if y[0] < -1.5:
            return float("nan")
        return 0.0  # always "rejects"

    sc = sp.Scenario(draw, flaky, params={"n": 5})
    res = sp.run(sc, reps=2000, seed=2, n_jobs=1)
    s = res.summaries[res.primary]
    # Recompute the expected counts independently from the same random stream.
    rng_counts = {"error:ZeroDivisionError": 0, "nonfinite_pvalue": 0}
    for k, size in plan_chunks(2000, res.chunk_size):
        rng = np.random.default_rng(chunk_seed(res.seed, res.point, k))
        for _ in range(size):
            y0 = rng.normal(size=5)[0]
            if y0 > 1.0:
                rng_counts["error:ZeroDivisionError"] += 1
            elif y0 < -1.5:
                rng_counts["nonfinite_pvalue"] += 1
    assert s["failures"] == rng_counts
    assert s["n_failed"] == sum(rng_counts.values())
    assert s["power"] == 1.0  # every usable replicate rejected; failures are not rejections
    assert s["power_failures_as_nonrejections"] == pytest.approx(s["n_ok"] / 2000)
    assert "first value too large" in res.records[res.primary].messages["error:ZeroDivisionError"]
    df = res.records_frame()
    assert (df["failure"] == "error:ZeroDivisionError").sum() == rng_counts["error:ZeroDivisionError"]


def test_warnings_are_fit_trouble_with_policy():
    import warnings

    def draw(rng):
        return {"y": rng.normal(size=3)}

    def warns(data):
        if data["y"][0] > 0:
            warnings.warn("did not converge", RuntimeWarning)
            return {"pvalue": 0.001, "estimate": 100.0}  # a runaway estimate of a failed fit
        return {"pvalue": 0.001, "estimate": 1.0}

    sc = sp.Scenario(draw, warns)
    fail = sp.run(sc, reps=1000, seed=4, n_jobs=1, fit_trouble="failure").summaries[sc.primary]
    nonrej = sp.run(sc, reps=1000, seed=4, n_jobs=1, fit_trouble="nonrejection").summaries[sc.primary]
    k = fail["n_fit_trouble"]
    # k ~ Binomial(1000, 1/2): within 4 SD of 500
    assert abs(k - 500) < 4 * math.sqrt(1000 * 0.25) and fail["failures"] == {"warning:RuntimeWarning": k}
    assert fail["power"] == 1.0 and fail["n_ok"] == 1000 - k
    assert nonrej["n_ok"] == 1000 and nonrej["power"] == pytest.approx((1000 - k) / 1000)
    # estimates of fits that warned are left out of the estimate measures under both policies
    assert fail["mean_estimate"] == 1.0 and nonrej["mean_estimate"] == 1.0
    assert fail["n_estimate"] == nonrej["n_estimate"] == 1000 - k


def test_power_summary_formulas():
    # Morris, White & Crowther (2019) Table 6; Wilson (1927) interval.
    res = sp.run(_two_arm(n=20, effect=0.6), reps=1500, seed=9, n_jobs=1)
    s = res.summaries["t_test"]
    p = np.mean(res.pvalues <= 0.05)
    assert s["power"] == p
    assert s["mcse"] == pytest.approx(math.sqrt(p * (1 - p) / 1500))
    from statsmodels.stats.proportion import proportion_confint

    lo, hi = proportion_confint(s["rejections"], 1500, alpha=0.05, method="wilson")
    assert (s["ci_low"], s["ci_high"]) == pytest.approx((lo, hi), rel=1e-9)
    est = res.records["t_test"].estimate
    assert s["bias"] == pytest.approx(est.mean() - 0.6)
    assert s["empirical_se_mcse"] == pytest.approx(est.std(ddof=1) / math.sqrt(2 * 1499))
    cover = np.mean((res.records["t_test"].ci_low <= 0.6) & (0.6 <= res.records["t_test"].ci_high))
    assert s["coverage"] == pytest.approx(cover)
    # a 95% t interval under normality covers 95% of the time: within 4 MCSE
    assert abs(s["coverage"] - 0.95) < 4 * s["coverage_mcse"]


def test_json_and_frames():
    import json

    res = sp.run(_two_arm(), reps=300, seed=1, n_jobs=1)
    d = json.loads(res.to_json())
    assert d["analyses"]["t_test"]["power"] == pytest.approx(res.power)
    assert d["fingerprint"] == res.scenario.fingerprint()
    assert list(res.summary()["analysis"]) == ["t_test", "welch_t"]
    assert len(res.records_frame()) == 600


def test_run_chunk_is_pure_function_of_seed_point_chunk():
    sc = _two_arm()
    a = run_chunk(sc, 99, 1, 3, 100)
    b = run_chunk(sc, 99, 1, 3, 100)
    c = run_chunk(sc, 99, 2, 3, 100)
    assert np.array_equal(a.records["t_test"]["pvalue"], b.records["t_test"]["pvalue"])
    assert not np.array_equal(a.records["t_test"]["pvalue"], c.records["t_test"]["pvalue"])


@pytest.mark.parametrize("bad, msg", [
    (dict(reps=0), "`reps` must be an integer >= 1"),
    (dict(seed=-1), "`seed` must be an integer >= 0"),
    (dict(fit_trouble="drop"), "`fit_trouble`"),
])
def test_run_bad_input(bad, msg):
    with pytest.raises(sp.ParameterError, match=msg):
        sp.run(_two_arm(), **{"reps": 10, **bad})


class _BrokenBatchT(sp.TTest):
    """A t-test whose batch path raises: the engine must fall back, not crash."""

    def batch(self, batch):
        raise FloatingPointError("broken batch")


def test_batch_path_that_raises_falls_back_to_per_replicate():
    sc = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.5), analyses={"ok": sp.TTest(), "broken": _BrokenBatchT()})
    res = sp.run(sc, reps=300, seed=5, n_jobs=1)
    assert res.paths["ok"] == "batch"
    assert res.paths["broken"] == "per-replicate (batch path raised FloatingPointError)"
    # same data, same test: the per-replicate answers equal the batch ones
    assert np.allclose(res.records["broken"].pvalue, res.records["ok"].pvalue, rtol=1e-9)
    assert res.summaries["broken"]["n_failed"] == 0


def test_default_jobs_probe_gives_the_same_numbers_as_one_job():
    # n_jobs left at its default (-1) runs a fast vectorised scenario's first chunk in this
    # process and only starts workers if that pays; the numbers must not depend on it.
    sc = _two_arm()
    a = sp.run(sc, reps=5000, seed=21, chunk_size=1000)
    b = sp.run(sc, reps=5000, seed=21, chunk_size=1000, n_jobs=1)
    assert np.array_equal(a.pvalues, b.pvalues)


def test_probe_starts_workers_only_when_it_pays(monkeypatch):
    import time

    from simpower.engine import executor

    started = []
    real = executor._loky_results

    def counting(fn, tasks, jobs, fallback):
        started.append(jobs)
        return real(fn, tasks, jobs, fallback)

    monkeypatch.setattr(executor, "_loky_results", counting)
    monkeypatch.setattr(executor, "effective_jobs", lambda n: 2)
    # a cold start each time: a warm pool left by an earlier test would be counted as nearly free, and under load
    # time.sleep(0) can then take long enough for workers to look worth it
    monkeypatch.setattr(executor, "pool_start_seconds", lambda jobs: executor.POOL_START_SECONDS)
    # tiny tasks: 1 s of pool start-up cannot pay for itself
    assert list(executor.execute(time.sleep, [(0.0,)] * 6, n_jobs=-1, probe=True)) == [None] * 6
    assert started == []
    # 0.6 s tasks: the remaining 2.4 s over 2 workers plus start-up (2.2 s) beats 2.4 s serially
    assert list(executor.execute(time.sleep, [(0.6,)] * 5, n_jobs=-1, probe=True)) == [None] * 5
    assert started == [2]


def test_an_analysis_that_cannot_read_the_design_is_refused_before_running():
    sc = sp.Scenario(sp.SurvivalTwoArm(n=20, median=12, hazard_ratio=0.7, accrual=12, follow_up=12), sp.TTest())
    with pytest.raises(sp.ParameterError, match="analysis `t_test` cannot analyse the data of process "
                                                "`survival_two_arm`: it raised KeyError"):
        sp.run(sc, reps=100, seed=1, n_jobs=1)


def test_a_cheap_per_replicate_run_stays_in_this_process_and_an_expensive_one_starts_workers(monkeypatch):
    # the preflight times one warm replicate; when workers cannot save more than they cost to start
    # (runner.HEAVY_POOL_START_SECONDS), an explicit n_jobs = 2 still runs here -- numbers unchanged
    from simpower.engine import executor, runner

    started = []
    real = executor._loky_results

    def counting(fn, tasks, jobs, fallback):
        started.append(jobs)
        return real(fn, tasks, jobs, fallback)

    monkeypatch.setattr(executor, "_loky_results", counting)
    monkeypatch.setattr(executor, "_last_pool", None)  # no warm workers from earlier tests
    monkeypatch.setattr(type(sp.TTest()), "has_batch", property(lambda self: False))
    # the warm timing is fixed at 20 microseconds per replicate (a t-test's on an idle machine), so the decision
    # does not depend on how loaded the machine running the tests is
    real_preflight = runner.preflight
    monkeypatch.setattr(runner, "preflight", lambda *a, **k: None if real_preflight(*a, **k) is None else 2e-5)
    sc = sp.Scenario(sp.NormalTwoArm(n=20, effect=0.5), sp.TTest())
    here = sp.run(sc, reps=200, seed=3, n_jobs=2, progress=False)
    assert started == []
    monkeypatch.setattr(runner, "HEAVY_POOL_START_SECONDS", -1.0)   # workers now always "pay"
    monkeypatch.setattr(executor, "_last_pool", None)
    there = sp.run(sc, reps=200, seed=3, n_jobs=2, progress=False)
    assert started == [2]
    # the workers do not see this test's patch, so they take the t-test's batch path: the same p-values to
    # rounding (the two paths are checked bit for bit elsewhere without the patch)
    np.testing.assert_allclose(here.pvalues, there.pvalues, rtol=1e-12)
