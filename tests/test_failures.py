"""Failure policy: failing replicates are counted by cause, never kill the run, and stop it past a threshold.

The failing analysis raises as a deterministic function of the data ("the
first observation exceeds z_0.95"), so its failure count can be checked two
ways: exactly, against an independent analysis that reports the first
observation of the same simulated data sets (common random numbers), and
statistically, against Binomial(R, 0.05) within 4 SD.
"""

from __future__ import annotations

import math
import time
import warnings

import numpy as np
import pytest

import simpower as sp
from simpower.errors import ParameterError, RunError

# standard normal quantiles (e.g. Abramowitz & Stegun 1964, Table 26.5); scipy.stats.norm.ppf agrees
Z95 = 1.6448536269514722
Z99 = 2.3263478740408408
Z70 = 0.5244005127080407


def first_obs(data):
    """Reports the first observation as the estimate (the independent count)."""
    return {"pvalue": 0.5, "estimate": float(np.asarray(data["y"])[0])}


def picky(data):
    y = np.asarray(data["y"])
    if y[0] > Z95:
        raise ValueError(f"first observation {y[0]:.6f} above z_0.95")
    if y[0] < -Z99:
        raise ZeroDivisionError(f"first observation {y[0]:.6f} below z_0.01")
    y0, y1 = y[data["arm"] == 0], y[data["arm"] == 1]
    return {"pvalue": float(2 * min(0.5, abs(y1.mean() - y0.mean()))), "estimate": float(y1.mean() - y0.mean())}


def often_bad(data):
    if np.asarray(data["y"])[0] > Z70:  # about 30% of replicates
        raise KeyError("too high")
    return 0.5


def grumbles(data):
    if np.asarray(data["y"])[0] > -Z70:  # about 70% of replicates warn: fit trouble, not a hard failure
        warnings.warn("boundary fit", RuntimeWarning)
    return 0.5


def sleepy(data):
    if np.asarray(data["y"])[0] > Z99:
        time.sleep(2.0)
    return 0.5


def nan_p(data):
    return float("nan") if np.asarray(data["y"])[0] > Z95 else 0.5


def scenario(*fns, n=6):
    return sp.Scenario(sp.NormalTwoArm(n=n), analyses={"first": first_obs, **{f.__name__: f for f in fns}})


def test_failing_analysis_completes_with_exact_counts_by_cause():
    reps = 4000
    res = sp.run(scenario(picky), reps=reps, seed=2024, n_jobs=1)
    y0 = res.records["first"].estimate
    fail = res.records["picky"].failure
    n_hi, n_lo = int((y0 > Z95).sum()), int((y0 < -Z99).sum())
    assert int((fail == "error:ValueError").sum()) == n_hi
    assert int((fail == "error:ZeroDivisionError").sum()) == n_lo
    s = res.summaries["picky"]
    assert s["failures"] == {"error:ValueError": n_hi, "error:ZeroDivisionError": n_lo}
    assert s["n_failed"] == n_hi + n_lo and s["n_ok"] == reps - n_hi - n_lo
    # Binomial(R, 0.05) and Binomial(R, 0.01): within 4 SD (common practice for Monte Carlo checks)
    for k, p in ((n_hi, 0.05), (n_lo, 0.01)):
        assert abs(k - reps * p) < 4 * math.sqrt(reps * p * (1 - p)), (k, p)
    # the first message of each cause is the one of the first failing replicate
    i = int(np.argmax(y0 > Z95))
    assert res.records["picky"].messages["error:ValueError"] == f"ValueError: first observation {y0[i]:.6f} above z_0.95"
    # failing replicates never touch the other analysis
    assert res.summaries["first"]["n_failed"] == 0


def test_failure_codes_and_messages_do_not_depend_on_jobs():
    one = sp.run(scenario(picky), reps=3000, seed=5, n_jobs=1, chunk_size=150)
    two = sp.run(scenario(picky), reps=3000, seed=5, n_jobs=2, chunk_size=150)
    r1, r2 = one.records["picky"], two.records["picky"]
    assert r1.causes == r2.causes and r1.messages == r2.messages
    assert r1.status.tobytes() == r2.status.tobytes() and r1.pvalue.tobytes() == r2.pvalue.tobytes()


def test_threshold_stops_the_run_with_a_clear_message(tmp_path):
    store = tmp_path / "bad.sqlite"
    with pytest.raises(RunError) as info:
        sp.run(scenario(often_bad), reps=5000, seed=1, n_jobs=1, chunk_size=200, max_failure_rate=0.2,
               store=store)
    msg = str(info.value)
    assert "often_bad" in msg and "error:KeyError" in msg and "max_failure_rate" in msg and "too high" in msg
    assert str(store) in msg
    with sp.engine.open_store(store) as st:
        assert 1 <= len(st.done_chunks()) < 25  # stopped early, finished chunks kept
    # with a higher threshold the same run completes and reports the share
    res = sp.run(scenario(often_bad), reps=1000, seed=1, n_jobs=1, chunk_size=200, max_failure_rate=0.5)
    k = res.summaries["often_bad"]["failures"]["error:KeyError"]
    assert k == int((res.records["first"].estimate > Z70).sum())


def test_fit_trouble_warnings_do_not_trip_the_threshold():
    res = sp.run(scenario(grumbles), reps=600, seed=3, n_jobs=1, max_failure_rate=0.5)
    s = res.summaries["grumbles"]
    expected = int((res.records["first"].estimate > -Z70).sum())
    assert s["n_fit_trouble"] == expected and s["failures"] == {"warning:RuntimeWarning": expected}
    assert expected > 0.6 * 600


def test_nonfinite_pvalue_and_failing_process_are_counted():
    res = sp.run(scenario(nan_p), reps=800, seed=8, n_jobs=1)
    assert res.summaries["nan_p"]["failures"] == {"nonfinite_pvalue": int((res.records["first"].estimate > Z95).sum())}

    def shaky(rng, n=5):
        y = rng.standard_normal(2 * n)
        if y[0] > Z95:
            raise OverflowError("draw failed")
        return {"y": y, "arm": np.repeat([0, 1], n)}

    res = sp.run(sp.Scenario(shaky, sp.TTest()), reps=1000, seed=9, n_jobs=1)
    k = res.summaries["t_test"]["failures"].get("process:OverflowError", 0)
    assert abs(k - 50) < 4 * math.sqrt(1000 * 0.05 * 0.95)


@pytest.mark.parametrize("jobs", [1, 2])
def test_timeout_counts_as_failure(jobs):
    res = sp.run(scenario(sleepy), reps=400, seed=13, n_jobs=jobs, chunk_size=100, timeout=0.1)
    expected = int((res.records["first"].estimate > Z99).sum())
    assert expected >= 1  # the seed gives a few slow replicates
    assert res.summaries["sleepy"]["failures"] == {"timeout": expected}
    assert "time limit of 0.1 s" in res.records["sleepy"].messages["timeout"]


def test_timeout_not_enforceable_on_threads_warns():
    with pytest.warns(RuntimeWarning, match="could not be enforced"):
        res = sp.run(scenario(nan_p), reps=200, seed=1, n_jobs=2, chunk_size=100, backend="threading",
                     timeout=5.0)
    assert "timeout" not in res.summaries["nan_p"]["failures"]


@pytest.mark.parametrize("field,value", [("max_failure_rate", 0), ("max_failure_rate", 1.5),
                                         ("timeout", -1), ("timeout", float("inf"))])
def test_bad_policy_values_name_the_field(field, value):
    with pytest.raises(ParameterError, match=f"`{field}`"):
        sp.run(scenario(), reps=10, seed=1, n_jobs=1, **{field: value})
