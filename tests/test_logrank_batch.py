"""The log-rank batch path: the compiled merge of sorted arms, its numpy twin, and the masks.

External references named beside each check: a textbook worked example (Freireich et al.'s 1963
6-MP remission data as analysed by Kleinbaum & Klein 2012, "Survival Analysis: A Self-Learning
Text", 3rd ed., ch. 2: log-rank chi-square 16.79, expected events in the 6-MP arm 19.25 -- values
from memory; the same data and values are in Gehan 1965) and statsmodels' ``survdiff``
(statsmodels.duration.survfunc), an implementation outside the project. The per-replicate path
(``LogRank.__call__``) is the contract the batch path must meet.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from simpower.analyses.base import as_batch_result, rowwise
from simpower.analyses.survival import (
    LogRank,
    batch_logrank_terms,
    logrank_backend,
    logrank_terms,
    merged_logrank_terms,
)
from simpower.batch import Batch
from simpower.processes.survival import SurvivalTwoArm

needs_numba = pytest.mark.skipif(logrank_backend() != "numba", reason="numba not importable")

# Freireich et al. (1963) 6-MP trial (Gehan 1965; Kleinbaum & Klein 2012, ch. 2): weeks in remission
SIX_MP = ([6, 6, 6, 7, 10, 13, 16, 22, 23, 6, 9, 10, 11, 17, 19, 20, 25, 32, 32, 34, 35], [1] * 9 + [0] * 12)
PLACEBO = ([1, 1, 2, 2, 3, 4, 4, 5, 5, 8, 8, 8, 8, 11, 11, 12, 12, 15, 17, 22, 23], [1] * 21)

PROCS = [
    SurvivalTwoArm(n=40, median=10, hazard_ratio=0.7, accrual=10, follow_up=10, dropout_rate=0.02),
    SurvivalTwoArm(n=30, hazard0=0.1, hazard_ratio=1.5, shape=1.5, follow_up=8, time_resolution=1.0, ratio=1.5),
    SurvivalTwoArm(n=25, median=5, follow_up=6),  # ties among the censored at the end of follow-up
]

BOTH = [batch_logrank_terms, pytest.param(merged_logrank_terms, marks=needs_numba)]


def six_mp_batch(copies=3):
    """The 6-MP data as a batch: control (placebo) first; later copies permute the columns."""
    time = np.array(PLACEBO[0] + SIX_MP[0], float)
    event = np.array(PLACEBO[1] + SIX_MP[1], np.int8)
    arm = np.array([0] * 21 + [1] * 21, np.int8)
    rng = np.random.default_rng(0)
    perms = [np.arange(42)] + [rng.permutation(42) for _ in range(copies - 1)]
    # the arm is shared, so a permutation moves whole (time, event, arm) triples only within an arm
    perms = [np.concatenate([p[p < 21], p[p >= 21]]) for p in perms]
    return Batch(copies, {"time": np.stack([time[p] for p in perms]), "event": np.stack([event[p] for p in perms])},
                 {"arm": arm})


@pytest.mark.parametrize("terms", BOTH)
def test_six_mp_worked_example(terms):
    # Kleinbaum & Klein (2012, ch. 2), from memory: log-rank statistic 16.79 (1 df); E = 19.25 in the
    # 6-MP arm, which had O = 9 events. statsmodels' survdiff is the exact reference.
    from statsmodels.duration.survfunc import survdiff

    b = six_mp_batch()
    u, v = terms(b.per_rep["time"], b.per_rep["event"], b.shared["arm"])
    chisq, p = survdiff(b.per_rep["time"][0], b.per_rep["event"][0], b.shared["arm"])
    np.testing.assert_allclose(u**2 / v, chisq, rtol=1e-12)
    assert np.allclose(u**2 / v, 16.79, atol=0.005)
    np.testing.assert_allclose(9 - u, 19.25, atol=0.005)  # E1 = O1 - (O1 - E1)
    out = LogRank().batch(b)
    np.testing.assert_allclose(out["pvalue"], p, rtol=1e-10)


@pytest.mark.parametrize("terms", BOTH)
@pytest.mark.parametrize("proc", PROCS)
def test_batch_terms_equal_the_per_replicate_terms(terms, proc):
    b = proc.draw_batch(np.random.default_rng(11), 150)
    t, e, a = b.per_rep["time"], b.per_rep["event"], b.shared["arm"]
    u, v = terms(t, e, a)
    ref = np.array([logrank_terms(t[i], e[i].astype(float), a.astype(float)) for i in range(b.size)])
    # the sums differ only in the order of their terms: rounding, scaled by the size of V
    np.testing.assert_allclose(u, ref[:, 0], rtol=0, atol=1e-12 * np.sqrt(ref[:, 1]).max())
    np.testing.assert_allclose(v, ref[:, 1], rtol=1e-12)


def masked_batch(proc, size, seed, missing=0.2, padding=0.1):
    """A draw of ``proc`` with missing times (NaN, MCAR) and padding rows (``present`` False)."""
    rng = np.random.default_rng(seed)
    b = proc.draw_batch(rng, size)
    time = b.per_rep["time"].copy()
    time[rng.random(time.shape) < missing] = np.nan
    present = rng.random(time.shape) >= padding
    return Batch(size, {"time": time, "event": b.per_rep["event"], "present": present}, dict(b.shared),
                 info={"missing": True})


@pytest.mark.parametrize("alternative", ["two-sided", "less"])
@pytest.mark.parametrize("proc", PROCS)
def test_missing_times_and_padding_are_left_out(proc, alternative):
    from statsmodels.duration.survfunc import survdiff

    an = LogRank(alternative=alternative)
    b = masked_batch(proc, 120, seed=3)
    assert an.supports_batch(b)
    out = as_batch_result(an.batch(b))
    for i in range(b.size):
        r = an(b.replicate(i))  # padding dropped by the batch, missing times by the analysis
        for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"):
            assert math.isclose(getattr(out, f)[i], getattr(r, f), rel_tol=1e-9, abs_tol=1e-12), f
        if alternative == "two-sided":  # statsmodels on the complete cases, picked here by hand
            keep = b.per_rep["present"][i] & np.isfinite(b.per_rep["time"][i])
            _, p = survdiff(b.per_rep["time"][i][keep], b.per_rep["event"][i][keep], b.shared["arm"][keep])
            assert math.isclose(out.pvalue[i], p, rel_tol=1e-9, abs_tol=1e-12)


@pytest.mark.parametrize("terms", BOTH)
def test_arms_per_replicate_give_the_shared_answer(terms):
    b = PROCS[1].draw_batch(np.random.default_rng(4), 60)
    t, e, a = b.per_rep["time"], b.per_rep["event"], b.shared["arm"]
    seen = np.random.default_rng(5).random(t.shape) > 0.25
    u0, v0 = terms(t, e, a, seen)
    u1, v1 = terms(t, e, np.broadcast_to(a, t.shape).copy(), seen)
    np.testing.assert_allclose(u1, u0, rtol=0, atol=1e-12)
    np.testing.assert_allclose(v1, v0, rtol=1e-12)


def test_refused_replicates_get_the_per_replicate_trouble():
    an = LogRank()
    b = masked_batch(PROCS[0], 30, seed=8, missing=0.1, padding=0.0)
    time = b.per_rep["time"]
    time[2, 0] = -1.0                  # a negative time: the per-replicate path raises
    time[5, b.shared["arm"] == 1] = np.nan  # no arm-1 participant with a time: it raises too
    b.per_rep["event"][7, 3] = 2       # an event code other than 0/1
    b = Batch(b.size, dict(b.per_rep), dict(b.shared), info=dict(b.info))
    out = as_batch_result(an.batch(b))
    _, trouble, _ = rowwise(an, b, np.arange(b.size))
    assert set(out.trouble) == set(trouble) == {"error:ValueError"}
    np.testing.assert_array_equal(out.trouble["error:ValueError"], trouble["error:ValueError"])
    assert np.flatnonzero(trouble["error:ValueError"]).tolist() == [2, 5, 7]
    fine = np.setdiff1d(np.arange(b.size), [2, 5, 7])
    ref = np.array([an(b.replicate(int(i))).pvalue for i in fine])
    np.testing.assert_allclose(out.pvalue[fine], ref, rtol=1e-9, atol=1e-12)


def test_no_event_gives_a_missing_p_value_like_the_per_replicate_path():
    b = PROCS[2].draw_batch(np.random.default_rng(1), 4)
    event = b.per_rep["event"].copy()
    event[1] = 0
    b = Batch(4, {"time": b.per_rep["time"], "event": event}, dict(b.shared))
    out = as_batch_result(LogRank().batch(b))
    assert math.isnan(LogRank()(b.replicate(1)).pvalue)
    assert all(math.isnan(getattr(out, f)[1]) for f in ("pvalue", "estimate", "se", "ci_low", "ci_high"))
    assert np.all(np.isfinite(out.pvalue[[0, 2, 3]]))


@needs_numba
def test_the_two_backends_agree_and_the_switch_is_read_at_each_call(monkeypatch):
    an = LogRank(alternative="greater")
    b = masked_batch(PROCS[1], 80, seed=9)
    fast = as_batch_result(an.batch(b))
    monkeypatch.setenv("SIMPOWER_NO_NUMBA", "1")
    assert logrank_backend() == "numpy"
    slow = as_batch_result(an.batch(b))
    for f in ("pvalue", "estimate", "se"):
        np.testing.assert_allclose(getattr(fast, f), getattr(slow, f), rtol=1e-12, atol=1e-15)
