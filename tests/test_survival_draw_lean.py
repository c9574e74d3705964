"""The in-place time-to-event draw and the blocked log-rank merge: same numbers as the whole-array forms.

The draw (:func:`simpower.processes.survival_rules.censor_drawn`) censors in place, block by block,
drawing the loss variates in pieces; the log-rank batch path builds and sorts its keys in scratch
blocks. Neither may change a number: each is checked bit for bit against the whole-array
arithmetic it replaces (written out below, as the module docstrings state it), at several block
sizes. The piecewise draw rests on a property of numpy's ``Generator``: filling an array in pieces
gives the stream of one fill (checked here, since the draw depends on it). The log-rank sums are
checked against statsmodels' ``survdiff`` (an implementation outside the project) on the 6-MP
remission data of Freireich et al. (1963), as in tests/test_logrank_batch.py.
"""

from __future__ import annotations


import numpy as np
import pytest

import simpower as sp
from simpower.analyses import _survival_kernels as kern
from simpower.analyses import survival as surv
from simpower.processes import survival_rules
from simpower.processes.survival_rules import contiguous
from simpower.registry import build

from test_factories import _old_survival_two_arm

needs_numba = pytest.mark.skipif(surv.logrank_backend() != "numba", reason="numba not importable")

SETTINGS = [  # every branch of the censoring step: accrual, follow-up, loss, rounding, shape
    dict(median=12.0, hazard_ratio=0.7, shape=1.4, accrual=10.0, follow_up=8.0, dropout_fraction=0.1,
         dropout_time=12.0, time_resolution=0.5),
    dict(median=10.0, hazard_ratio=0.7, follow_up=16.0),
    dict(hazard0=0.2, hazard_ratio=1.6, dropout_rate=0.05),
    dict(median=3.0, hazard_ratio=0.5),
    dict(median=3.0, hazard_ratio=0.8, shape=2.0, accrual=4.0, follow_up=3.0),
    dict(median=3.0, hazard_ratio=0.8, shape=0.5, follow_up=3.0, dropout_rate=0.1, time_resolution=0.25),
    dict(median=5.0, hazard_ratio=1.2, dropout_rate=0.3, time_resolution=0.25),
    dict(median=5.0, hazard_ratio=0.6, accrual=2.0, follow_up=4.0, shape=1 / 3, dropout_rate=0.2),
]


def whole_array_draw(p, rng, size):
    """The whole-array form of the draw (survival_two_arm's arithmetic before the in-place step; the
    reference kept in tests/test_factories.py)."""
    time, event, entry = _old_survival_two_arm(p, rng, size)
    return {"time": time, "event": event, "entry": entry}


@pytest.mark.parametrize("cells", [1, 50, 333, 1 << 14])
@pytest.mark.parametrize("fields", SETTINGS)
def test_the_in_place_draw_gives_the_whole_array_numbers_at_any_block_size(monkeypatch, fields, cells):
    monkeypatch.setattr(survival_rules, "CENSOR_BLOCK_CELLS", cells)
    proc = sp.SurvivalTwoArm(n=9, ratio=1.5, **fields)
    batch = proc.draw_batch(np.random.default_rng(3), 23)
    want = whole_array_draw(proc, np.random.default_rng(3), 23)
    for name, arr in want.items():
        got = batch.per_rep[name]
        assert got.dtype == arr.dtype and got.shape == arr.shape
        np.testing.assert_array_equal(got, arr, err_msg=name)
    # the generator is left where the whole-array draw leaves it (the next chunk's numbers do not move)
    r1, r2 = np.random.default_rng(3), np.random.default_rng(3)
    proc.draw_batch(r1, 23)
    whole_array_draw(proc, r2, 23)
    assert r1.random() == r2.random()


@pytest.mark.parametrize("pieces", [[6], [1, 2, 3], [4, 0, 2]])
def test_a_generator_fills_in_pieces_the_numbers_of_one_fill(pieces):
    # what the piecewise loss draw relies on (numpy's Generator draws one value after another)
    whole = np.random.default_rng(9).standard_exponential((6, 5))
    rng, parts = np.random.default_rng(9), []
    for k in pieces:
        buf = np.empty((k, 5))
        rng.standard_exponential(out=buf)
        parts.append(buf)
    np.testing.assert_array_equal(np.concatenate(parts), whole)


def test_in_place_powers_are_the_powers_of_the_whole_array_form():
    # ``t **= 1 / shape`` on a block and ``t ** (1 / shape)`` take numpy's same path, also for the exponents it
    # special-cases (0.5: sqrt, 2: square, -1, 1)
    x = np.random.default_rng(2).standard_exponential((7, 9))
    for power in (0.5, 2.0, 1.0, -1.0, 1 / 1.4, 3.0, 1 / 3):
        y = x.copy()
        y[2:5] **= power
        np.testing.assert_array_equal(y[2:5], x[2:5] ** power)


def test_contiguous_gives_a_slice_for_one_run_of_columns():
    assert contiguous(np.array([False, True, True, False])) == slice(1, 3)
    assert contiguous(np.array([True, True])) == slice(0, 2)
    for mask in ([True, False, True], [False, False]):
        got = contiguous(np.array(mask))
        assert isinstance(got, np.ndarray) and got.tolist() == mask


def test_a_clustered_draw_is_the_whole_array_arithmetic(monkeypatch):
    # frailty and arms per replicate: the scaling of each block equals the whole array's
    spec = {"type": "trial", "design": {"type": "clusters", "clusters": 4, "cluster_size": 6, "cluster_size_cv": 0.4,
                                        "icc": 0.1, "randomise": "individual"},
            "outcome": {"type": "time_to_event", "median": 1.0, "hazard_ratio": 0.6, "shape": 1.5, "accrual": 1.0,
                        "follow_up": 2.0, "dropout_rate": 0.1}}
    proc = build("process", spec)
    ref = proc.draw_batch(np.random.default_rng(4), 31)
    for cells in (1, 40):
        monkeypatch.setattr(survival_rules, "CENSOR_BLOCK_CELLS", cells)
        again = proc.draw_batch(np.random.default_rng(4), 31)
        for name in ("time", "event", "entry", "arm", "cluster"):
            np.testing.assert_array_equal(again.per_rep[name], ref.per_rep[name], err_msg=name)


# -- the log-rank keys and the blocked merge ------------------------------------------------------------
def test_keys_written_in_place_equal_the_keys_of_copies():
    rng = np.random.default_rng(1)
    time = np.round(rng.exponential(3.0, (5, 12)), 1)
    time[0, 0] = -0.0  # the key of 0.0
    event = (rng.random((5, 12)) < 0.6).astype(np.int8)
    take = rng.random((5, 12)) < 0.8
    view_t, view_e = time[:, 3:9], event[:, 3:9]  # strided views of a block of columns
    out = np.empty((5, 6), np.uint64)
    got = kern.time_event_keys(view_t, view_e, take[:, 3:9], out=out)
    assert got is out
    want = (np.ascontiguousarray(view_t + 0.0).view(np.uint64) << np.uint64(1)) | view_e.astype(np.uint64)
    want[~take[:, 3:9]] = kern.NO_KEY
    np.testing.assert_array_equal(got, want)
    for ev in (view_e.astype(float), view_e.astype(bool), view_e.astype(np.int64)):
        np.testing.assert_array_equal(kern.time_event_keys(view_t, ev, take[:, 3:9]), want)
    assert kern.time_event_keys(np.array([-0.0]), np.array([1]), None)[0] == np.uint64(1)


def six_mp():
    # Freireich et al. (1963) 6-MP trial (Gehan 1965; Kleinbaum & Klein 2012, ch. 2): weeks in remission
    six = ([6, 6, 6, 7, 10, 13, 16, 22, 23, 6, 9, 10, 11, 17, 19, 20, 25, 32, 32, 34, 35], [1] * 9 + [0] * 12)
    placebo = ([1, 1, 2, 2, 3, 4, 4, 5, 5, 8, 8, 8, 8, 11, 11, 12, 12, 15, 17, 22, 23], [1] * 21)
    return (np.array(placebo[0] + six[0], float), np.array(placebo[1] + six[1], np.int8),
            np.array([0] * 21 + [1] * 21, np.int8))


@needs_numba
def test_the_compiled_merge_and_its_python_twin_give_survdiff_on_the_6mp_data():
    from statsmodels.duration.survfunc import survdiff

    time, event, arm = six_mp()
    keys = [np.sort(kern.time_event_keys(time[arm == g][None], event[arm == g][None], None), axis=1) for g in (0, 1)]
    counts = np.array([21], np.int64)
    chisq, _ = survdiff(time, event, arm)
    for fn in (kern.merge_terms, kern.merge_terms.py_func):
        u, v = np.empty(1), np.empty(1)
        fn(keys[0], keys[1], counts, counts, u, v)
        # Kleinbaum & Klein (2012, ch. 2), from memory: chi-square 16.79; statsmodels is the exact reference
        assert u[0] ** 2 / v[0] == pytest.approx(chisq, rel=1e-12)
        assert 9 - u[0] == pytest.approx(19.25, abs=0.005)  # expected events in the 6-MP arm


@needs_numba
@pytest.mark.parametrize("cells", [1, 70, 1 << 15])
def test_the_blocked_merge_gives_the_same_sums_at_any_block_size(monkeypatch, cells):
    proc = sp.SurvivalTwoArm(n=30, hazard0=0.1, hazard_ratio=1.5, shape=1.5, follow_up=8, time_resolution=1.0,
                             ratio=1.5)  # ties
    b = proc.draw_batch(np.random.default_rng(6), 57)
    t, e, a = b.per_rep["time"], b.per_rep["event"], b.shared["arm"]
    seen = np.random.default_rng(7).random(t.shape) > 0.2
    ref = [surv.merged_logrank_terms(t, e, a), surv.merged_logrank_terms(t, e, a, seen)]
    monkeypatch.setattr(surv, "_MERGE_BLOCK_CELLS", cells)
    for obs, (u0, v0) in zip((None, seen), ref):
        u, v = surv.merged_logrank_terms(t, e, a, obs)
        np.testing.assert_array_equal(u, u0)
        np.testing.assert_array_equal(v, v0)
        # the numpy twin sums the same terms in another order: equal to rounding
        un, vn = surv.batch_logrank_terms(t, e, a, obs)
        np.testing.assert_allclose(u, un, rtol=0, atol=1e-12 * np.sqrt(vn).max())
        np.testing.assert_allclose(v, vn, rtol=1e-12)


@needs_numba
def test_interleaved_arm_columns_give_the_sums_of_the_sorted_layout():
    # arm columns that are not one run each take the gathered path; the sums are those of the same rows sorted
    b = sp.SurvivalTwoArm(n=20, median=5, follow_up=6).draw_batch(np.random.default_rng(2), 40)
    t, e, a = b.per_rep["time"], b.per_rep["event"], b.shared["arm"]
    perm = np.random.default_rng(3).permutation(a.size)
    seen = np.random.default_rng(4).random(t.shape) > 0.3
    for obs in (None, seen):
        u0, v0 = surv.merged_logrank_terms(t, e, a, obs)
        u1, v1 = surv.merged_logrank_terms(t[:, perm], e[:, perm], a[perm], None if obs is None else obs[:, perm])
        np.testing.assert_array_equal(u1, u0)
        np.testing.assert_array_equal(v1, v0)


def test_the_whole_array_value_check_passes_over_missing_times_only_when_asked():
    # the batch path skips its per-cell checks when this holds; any bad kept value must make it False
    t = np.array([[1.0, np.nan, 2.0], [0.0, 3.0, np.nan]])
    e = np.array([[1, 0, 1], [0, 1, 1]], np.int8)
    assert surv._plain(t, e, nan_ok=True) and not surv._plain(t, e)
    for bad in (-1.0, np.inf, -np.inf):
        t2 = t.copy()
        t2[1, 1] = bad
        assert not surv._plain(t2, e, nan_ok=True)
    assert not surv._plain(np.full((2, 3), np.nan), e, nan_ok=True)
    e2 = e.copy()
    e2[0, 1] = 2  # an event code other than 0/1, even beside a missing time
    assert not surv._plain(t, e2, nan_ok=True)
