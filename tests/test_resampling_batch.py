"""Batch paths of the permutation test and the bootstrap CI: the per-replicate numbers, exactly.

The reference is scipy (``scipy.stats.permutation_test`` with ``permutation_type='independent'``,
``scipy.stats.bootstrap``) run replicate by replicate with the replicate's own generator
``data_rng(seed, ...)``, as the per-replicate path does; numpy's ``Generator.permutation`` is the
reference of the compiled permutation kernel. Equality is exact (the batch path draws the same
random numbers in the same order and does the same floating-point operations per resample).
"""

import itertools
import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower.analyses import resampling
from simpower.analyses.base import rowwise
from simpower.analyses.resampling import BootstrapCI, PermutationTest, data_rng
from simpower.processes.base import Batch

FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high")


def arms_batch(seed, reps=6, n0=9, n1=11, missing=False, shuffled=False, padding=False):
    """Normal outcomes, arm 1 shifted by 0.5; optionally NaN outcomes, arms interleaved per replicate, padding."""
    rng = np.random.default_rng(seed)
    y = rng.normal(size=(reps, n0 + n1))
    arm = np.repeat(np.array([0, 1]), [n0, n1])
    per_rep, info = {"y": y}, {}
    if shuffled:
        arm = np.stack([rng.permutation(arm) for _ in range(reps)])
        per_rep["arm"] = arm
    y += 0.5 * (arm == 1)
    if missing:
        y[rng.random(y.shape) < 0.15] = np.nan
        y[1, np.flatnonzero(np.broadcast_to(arm, y.shape)[1] == 0)[1:]] = np.nan  # one arm-0 value left: error
        info["missing"] = True
    if padding:
        present = np.ones(y.shape, bool)
        present[2, -3:] = False
        present[3, :2] = False
        per_rep["present"] = present
    shared = {} if shuffled else {"arm": arm}
    return Batch(reps, per_rep, shared, info)


def per_replicate(analysis, batch):
    """Fields (R, 5) and trouble of the per-replicate path, as the engine records them."""
    vals, trouble, _ = rowwise(analysis, batch, np.arange(batch.size))
    return np.stack([vals[f] for f in FIELDS], axis=1), {k: v.tolist() for k, v in trouble.items()}


def batch_path(analysis, batch):
    assert analysis.supports_batch(batch)
    res = analysis.batch(batch)
    got = np.stack([np.full(batch.size, np.nan) if getattr(res, f) is None else getattr(res, f)
                    for f in FIELDS], axis=1)
    return got, {k: np.asarray(v).tolist() for k, v in res.trouble.items()}


BATCHES = {
    "complete": dict(),
    "missing": dict(missing=True),
    "interleaved_padding": dict(missing=True, shuffled=True, padding=True),
}


# -- the permutation kernel against numpy --------------------------------------------------------
@pytest.mark.parametrize("n", [2, 5, 33, 128, 129, 1000])
def test_permutations_are_those_of_generator_permutation(n):
    # reference: numpy's Generator.permutation, called as scipy's independent-sample loop calls it
    rng = np.random.default_rng(n + 7)
    want = np.stack([rng.permutation(n) for _ in range(25)])
    x = np.random.default_rng(n).normal(size=n)
    got = np.empty((25, n))
    resampling._permuted(np.random.default_rng(n + 7), x, got)
    np.testing.assert_array_equal(got, x[want])


def test_kernel_is_compiled_where_numba_is_installed():
    pytest.importorskip("numba")
    assert resampling._compiled_permuter() is not None


# -- permutation test -----------------------------------------------------------------------------
@pytest.mark.parametrize("kind", sorted(BATCHES))
@pytest.mark.parametrize("statistic,alternative", list(itertools.product(["mean", "median"],
                                                                          ["two-sided", "greater", "less"])))
def test_permutation_batch_equals_per_replicate(kind, statistic, alternative):
    batch = arms_batch(11, **BATCHES[kind])
    an = PermutationTest(n_resamples=199, statistic=statistic, alternative=alternative, null_value=0.25)
    got, got_trouble = batch_path(an, batch)
    want, want_trouble = per_replicate(an, batch)
    np.testing.assert_array_equal(got, want)
    assert got_trouble == want_trouble
    assert np.isfinite(got[:, 0]).sum() >= batch.size - 1
    if kind == "missing":  # the replicate with one arm-0 value: scipy's ValueError, per replicate too
        assert want_trouble == {"error:ValueError": [i == 1 for i in range(batch.size)]}


def test_permutation_batch_matches_scipy_directly():
    # scipy.stats.permutation_test (independent samples) with the replicate's generator
    batch = arms_batch(3, missing=True)
    an = PermutationTest(n_resamples=199)
    res = an.batch(batch)
    for i in (0, 2, 4):
        t = batch.replicate(i)
        y0, y1 = (t["y"][(t["arm"] == a) & np.isfinite(t["y"])] for a in (0, 1))
        r = stats.permutation_test((y1, y0), lambda a, b, axis: a.mean(axis=axis) - b.mean(axis=axis),
                                   permutation_type="independent", vectorized=True, n_resamples=199,
                                   rng=data_rng(0, y1, y0))
        assert res.pvalue[i] == r.pvalue
        assert res.estimate[i] == r.statistic


def test_exact_permutation_tests_are_handed_to_scipy():
    # 4 + 4 values: comb(8, 4) = 70 <= 199 splits, so scipy enumerates them (no +1 correction)
    batch = arms_batch(5, n0=4, n1=4)
    an = PermutationTest(n_resamples=199, alternative="greater")
    got, _ = batch_path(an, batch)
    want, _ = per_replicate(an, batch)
    np.testing.assert_array_equal(got, want)
    assert math.comb(8, 4) == 70
    assert np.all(np.round(got[:, 0] * 70, 9) % 1 == 0)  # multiples of 1/70: every split counted once


def test_fallback_without_the_kernel_gives_the_same_numbers(monkeypatch):
    batch = arms_batch(9, missing=True)
    an = PermutationTest(n_resamples=99, statistic="median")
    compiled, _ = batch_path(an, batch)
    monkeypatch.setattr(resampling, "_KERNEL", [None])
    plain, _ = batch_path(an, batch)
    np.testing.assert_array_equal(compiled, plain)


def test_pairs_keep_the_per_replicate_path():
    # paired data are analysed as sign flips of the differences, which the batch path does not do
    batch = sp.NormalPaired(n=8, effect=0.4).draw_batch(np.random.default_rng(1), 3)
    assert not PermutationTest(n_resamples=99).supports_batch(batch)
    assert not BootstrapCI(n_resamples=99).supports_batch(batch)


# -- bootstrap ------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", sorted(BATCHES))
@pytest.mark.parametrize("method,statistic,alternative",
                         list(itertools.product(["percentile", "basic", "bca"], ["mean", "median"],
                                                ["two-sided", "greater", "less"])))
def test_bootstrap_batch_equals_per_replicate(kind, method, statistic, alternative):
    batch = arms_batch(21, **BATCHES[kind])
    an = BootstrapCI(n_resamples=199, method=method, statistic=statistic, alternative=alternative,
                     null_value=0.1, ci_level=0.9)
    got, got_trouble = batch_path(an, batch)
    want, want_trouble = per_replicate(an, batch)
    np.testing.assert_array_equal(got, want)
    assert got_trouble == want_trouble
    assert np.isfinite(got[:, 3]).sum() >= batch.size - 1


@pytest.mark.parametrize("method", ["percentile", "basic", "bca"])
def test_bootstrap_batch_matches_scipy_directly(method):
    # scipy.stats.bootstrap (two samples, arm 1 minus arm 0) with the replicate's generator
    batch = arms_batch(4, reps=4)
    an = BootstrapCI(n_resamples=199, method=method)
    res = an.batch(batch)
    for i in range(batch.size):
        t = batch.replicate(i)
        y0, y1 = t["y"][t["arm"] == 0], t["y"][t["arm"] == 1]
        r = stats.bootstrap((y0, y1), lambda a, b, axis=-1: b.mean(axis=axis) - a.mean(axis=axis),
                            n_resamples=199, vectorized=True, method=method, rng=data_rng(0, y0, y1))
        assert (res.ci_low[i], res.ci_high[i]) == (r.confidence_interval.low, r.confidence_interval.high)
        assert res.se[i] == r.standard_error


def test_degenerate_bca_is_handed_to_the_per_replicate_path():
    # an arm of identical values makes scipy's jackknife acceleration 0/0: scipy warns, the engine
    # records the warning; the batch path must record the same for that replicate only
    batch = arms_batch(8, reps=4)
    batch.per_rep["y"][2] = 1.0
    an = BootstrapCI(n_resamples=99)
    got, got_trouble = batch_path(an, batch)
    want, want_trouble = per_replicate(an, batch)
    np.testing.assert_array_equal(got, want)
    assert got_trouble == want_trouble
    assert want_trouble and all(v == [False, False, True, False] for v in want_trouble.values())


# -- through the engine -----------------------------------------------------------------------------
def test_run_takes_the_batch_path_and_keeps_the_numbers(monkeypatch):
    # the same run with the batch paths switched off (same chunks, same data) gives the same records
    proc = sp.TwoArm(n=8, effect=0.5, missing=sp.MCAR(rate=0.2))
    scenario = sp.Scenario(proc, analyses=[PermutationTest(n_resamples=99),
                                           BootstrapCI(n_resamples=99, method="percentile")])
    fast = sp.run(scenario, reps=60, seed=2, n_jobs=1, chunk_size=30)
    for cls in (PermutationTest, BootstrapCI):
        monkeypatch.setattr(cls, "supports_batch", lambda self, batch: False)
    slow = sp.run(scenario, reps=60, seed=2, n_jobs=1, chunk_size=30)
    assert set(fast.paths.values()) == {"batch"} and set(slow.paths.values()) == {"per-replicate"}
    for name in ("permutation_test", "bootstrap_ci"):
        f, w = fast.records[name], slow.records[name]
        for field in FIELDS + ("status",):
            np.testing.assert_array_equal(getattr(f, field), getattr(w, field))
        assert f.causes == w.causes
        assert np.isfinite(f.pvalue).mean() > 0.9


@pytest.mark.parametrize("an", [PermutationTest(n_resamples=99, statistic="median"),
                                BootstrapCI(n_resamples=99, method="bca")], ids=["permutation", "bca"])
def test_small_memory_blocks_give_the_same_numbers(monkeypatch, an):
    # blocks of a few replicates (down to one) bound the memory; the numbers must not depend on them
    batch = arms_batch(13, reps=7, missing=True)
    monkeypatch.setattr(resampling, "_BLOCK_VALUES", 500)
    got, got_trouble = batch_path(an, batch)
    want, want_trouble = per_replicate(an, batch)
    np.testing.assert_array_equal(got, want)
    assert got_trouble == want_trouble
